"""The readable summary of a regime: a shallow tree, its fidelity, its rules in words, the two-state table.

Source: scikit-learn's DecisionTreeClassifier and accuracy_score (an independent fit with the same settings),
and the plain-words rules re-applied to the data by a small parser written here.
"""

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import accuracy_score
from sklearn.tree import DecisionTreeClassifier

from regimewise.errors import UserInputError
from regimewise.protocol import StateVariable
from regimewise.regime.readable import (
    _bin_index,
    _bins,
    distill_regime,
    fitting_rows,
    leaf_predictions,
    tree_rules,
    two_state_table,
)

STATES = [
    StateVariable(name="sbp", label="SBP", kind="continuous", plausible_range=(70, 250)),
    StateVariable(name="level", label="Level", kind="integer", plausible_range=(0, 4)),
    StateVariable(name="female", label="Female", kind="binary", plausible_range=(0, 1)),
]
LABELS = ("hold", "down", "up")


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(3)
    n = 2000
    frame = pd.DataFrame(
        {
            "sbp": np.round(rng.normal(145, 18, n), 1),
            "level": rng.integers(0, 5, n),
            "female": rng.integers(0, 2, n),
        }
    )
    regime = np.where(frame.sbp > 150, 2, np.where((frame.sbp < 120) & (frame.level > 0), 1, 0))
    noisy = np.where(rng.random(n) < 0.1, rng.integers(0, 3, n), regime)  # a regime a depth-3 tree cannot copy
    return frame, noisy, rng.integers(0, 400, n)


OPS = {"≤": np.less_equal, "<": np.less, ">": np.greater, "≥": np.greater_equal, "=": np.equal}


def rows_of(conditions, frame):
    """Rows selected by a rule's plain-words conditions: 'name op value' or 'low op name op high'."""
    mask = np.ones(len(frame), dtype=bool)
    for cond in conditions:
        parts = cond.split(" ")
        if len(parts) == 3:
            name, op, value = parts
            mask &= OPS[op](frame[name].to_numpy(dtype=float), float(value))
        else:
            low, op_low, name, op_high, high = parts
            col = frame[name].to_numpy(dtype=float)
            mask &= OPS[op_low](float(low), col) & OPS[op_high](col, float(high))
    return mask


def test_rules_merge_thresholds_and_show_integers_as_integers(data):
    frame, recommended, groups = data
    readable = distill_regime(frame, recommended, STATES, LABELS, groups=groups, random_state=0)
    for rule in readable.rules:
        names = [c.split(" ")[0] if c.split(" ")[1] in OPS else c.split(" ")[2] for c in rule.conditions]
        assert len(names) == len(set(names)), rule.conditions  # one condition per state
        assert ".5" not in " ".join(c for c in rule.conditions if "level" in c)  # whole numbers for an integer state


def test_fidelity_matches_sklearn_tree(data):
    # source: scikit-learn DecisionTreeClassifier(max_depth=3) fitted independently, accuracy_score
    frame, recommended, groups = data
    readable = distill_regime(frame, recommended, STATES, LABELS, groups=groups, random_state=0)
    tree = DecisionTreeClassifier(max_depth=3, random_state=0).fit(frame[["sbp", "level", "female"]], recommended)
    assert readable.fidelity == pytest.approx(
        accuracy_score(recommended, tree.predict(frame[["sbp", "level", "female"]]))
    )
    assert 0.5 < readable.fidelity_out_of_fold <= 1.0
    assert max(readable.importance, key=readable.importance.get) == "sbp"


def test_leaf_predictions_are_the_trees_predictions_exactly(data):
    # source: DecisionTreeClassifier.predict; the fidelity is read off the leaves the rules use, so it must be the
    # same predictions to the last row and the same mean to the last bit
    frame, recommended, groups = data
    X = frame[["sbp", "level", "female"]].to_numpy(dtype=float)
    tree = DecisionTreeClassifier(max_depth=3, random_state=0).fit(X, recommended)
    leaf_of, predicted = leaf_predictions(tree, X)
    np.testing.assert_array_equal(predicted, tree.predict(X))
    np.testing.assert_array_equal(leaf_of, tree.apply(X))
    readable = distill_regime(frame, recommended, STATES, LABELS, groups=groups, random_state=0)
    assert readable.fidelity == float(np.mean(tree.predict(X) == recommended))


def test_above_the_row_cap_the_tree_is_fitted_on_whole_patients_and_judged_on_every_decision(data):
    # source: scikit-learn DecisionTreeClassifier(max_depth=3) fitted independently on the chosen rows, and
    # accuracy_score over every decision
    frame, recommended, groups = data
    columns = ["sbp", "level", "female"]
    full = distill_regime(frame, recommended, STATES, LABELS, groups=groups, random_state=0)
    assert full.fitted_decisions == len(frame)
    unchanged = distill_regime(frame, recommended, STATES, LABELS, groups=groups, random_state=0, max_rows=len(frame))
    assert unchanged == full  # at or below the cap nothing changes
    capped = distill_regime(frame, recommended, STATES, LABELS, groups=groups, random_state=0, max_rows=600)
    rows = fitting_rows(len(frame), groups, 600, 0)
    assert capped.fitted_decisions == rows.size <= 600 and rows.size > 500  # patients of 1 to 15 decisions
    chosen = np.unique(groups[rows])
    assert np.isin(groups, chosen).sum() == rows.size  # whole patients: every decision of a chosen patient
    tree = DecisionTreeClassifier(max_depth=3, random_state=0).fit(frame[columns].iloc[rows], recommended[rows])
    assert capped.fidelity == pytest.approx(accuracy_score(recommended, tree.predict(frame[columns])))
    assert sum(rule.decisions for rule in capped.rules) == len(frame)  # the rules still count every decision
    assert 0.5 < capped.fidelity_out_of_fold <= 1.0
    without_patients = fitting_rows(len(frame), None, 600, 0)
    assert without_patients.size == 600 and np.all(np.diff(without_patients) > 0)


def test_rules_in_words_partition_the_decisions_and_reproduce_the_tree(data):
    frame, recommended, _ = data
    readable = distill_regime(frame, recommended, STATES, LABELS)
    tree = DecisionTreeClassifier(max_depth=3, random_state=0).fit(frame[["sbp", "level", "female"]], recommended)
    predicted = np.asarray(LABELS)[tree.predict(frame[["sbp", "level", "female"]])]
    covered = np.zeros(len(frame), dtype=int)
    for rule in readable.rules:
        rows = rows_of(rule.conditions, frame)
        covered += rows
        assert rows.sum() == rule.decisions
        assert np.all(predicted[rows] == rule.action)
        assert len(rule.conditions) <= 3 and rule.text.startswith("if ")
    assert np.all(covered == 1)  # every decision falls under exactly one rule


def test_two_state_table_counts_every_decision(data):
    frame, recommended, _ = data
    table = distill_regime(frame, recommended, STATES, LABELS).table
    assert table["rows_state"] == "sbp"
    total = sum(cell["decisions"] for row in table["cells"] for cell in row)
    assert total == len(frame)
    assert len(table["cells"]) == len(table["row_bins"]) and len(table["cells"][0]) == len(table["column_bins"])


@pytest.mark.parametrize("second", ["level", "female"])
def test_two_state_table_cells_are_those_of_a_mask_per_cell(data, second):
    # source: each cell's decisions selected by a mask of their own and counted, as the table was first computed;
    # the counts, actions and shares must be equal exactly (empty cells included: no decision with level 4 in the
    # lowest pressure bin below)
    frame, recommended, _ = data
    sbp = frame.sbp.to_numpy(dtype=float)
    lowest = _bin_index(sbp, _bins(sbp, 4)[0], False) == 0
    frame = frame.assign(level=np.where(lowest, np.minimum(frame.level, 3), frame.level))
    table = two_state_table(frame, recommended, "sbp", second, LABELS)
    idx = []
    for name in ("sbp", second):
        values = frame[name].to_numpy(dtype=float)
        edges, discrete = _bins(values, 4)
        idx.append(_bin_index(values, edges, discrete))
    empty = 0
    for i, row in enumerate(table["cells"]):
        for j, cell in enumerate(row):
            rows = (idx[0] == i) & (idx[1] == j)
            counts = np.bincount(recommended[rows], minlength=len(LABELS))
            top = int(counts.argmax())
            assert cell == {
                "decisions": int(rows.sum()),
                "action": LABELS[top] if rows.any() else None,
                "share": float(counts[top] / rows.sum()) if rows.any() else None,
            }
            empty += not rows.any()
    assert second == "female" or empty > 0


def test_summary_says_it_is_a_summary(data):
    frame, recommended, _ = data
    out = distill_regime(frame, recommended, STATES, LABELS).to_dict()
    assert "not the tree, is what was evaluated" in out["note"]
    with pytest.raises(UserInputError, match="max_depth"):
        distill_regime(frame, recommended, STATES, LABELS, max_depth=5)


def test_rule_agreement_is_that_of_the_tree_predictions(data):
    # each leaf's decisions and agreement against sklearn's own predict (the rules read the class off the leaves)
    frame, recommended, _ = data
    names = [s.name for s in STATES]
    X = frame[names].to_numpy(dtype=float)
    tree = DecisionTreeClassifier(max_depth=3, random_state=0).fit(X, recommended)
    rules = tree_rules(tree, names, [s.kind == "binary" for s in STATES], LABELS, X, recommended)
    leaf, predicted = tree.apply(X), tree.predict(X)
    expected = sorted(
        (int((leaf == node).sum()), float(np.mean(recommended[leaf == node] == predicted[leaf == node])))
        for node in np.unique(leaf)
    )
    assert sorted((r.decisions, r.agreement) for r in rules) == expected
    assert {r.action for r in rules} <= set(LABELS)


def test_a_frame_of_exactly_the_states_gives_the_same_summary_as_a_wider_one(data):
    frame, recommended, groups = data
    names = [s.name for s in STATES]
    exact = pd.DataFrame(frame[names].to_numpy(dtype=float), columns=names)  # as the stage's covariate frame
    wider = exact.assign(other=1.0)
    first = distill_regime(exact, recommended, STATES, LABELS, groups=groups).to_dict()
    assert first == distill_regime(wider, recommended, STATES, LABELS, groups=groups).to_dict()
