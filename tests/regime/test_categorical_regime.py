"""A protocol with a categorical state end to end (validation, usual care, regime, evaluation, description) on
made-up records whose best action depends only on the level, so the answers are exact."""

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_decisions, tiny_protocol_dict, write_tiny

from regimewise.bootstrap.replicates import fit_replicate
from regimewise.core.features import StateScaler
from regimewise.data.validate import validate_records
from regimewise.describe.balance import balance_by_step
from regimewise.describe.cohort import cohort_table
from regimewise.evaluation.values import evaluate_all, point_values
from regimewise.protocol import load_protocol
from regimewise.regime.clinical_rules import ClinicalRuleSet
from regimewise.regime.readable import distill_regime

LEVELS = ["low", "mid", "high"]
ACTIONS = ["hold", "up", "down"]
# Reward of each action at each level; 'down' is forbidden at 'low' by the protocol's clinical rule, so the best
# permitted actions are hold (0.5) at low, hold (1) at mid and up (1) at high.
REWARD = {"low": [0.5, 0.0, 1.0], "mid": [1.0, 0.2, 0.0], "high": [0.0, 1.0, 0.3]}
BEST = {"low": (0, 0.5), "mid": (0, 1.0), "high": (1, 1.0)}


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    folder = tmp_path_factory.mktemp("categorical")
    raw = tiny_protocol_dict()
    raw["states"].append({"name": "edu", "label": "Education", "kind": "categorical", "levels": LEVELS})
    low = {"state": "edu", "comparison": "in", "values": ["low"]}
    raw["constraints"] = {"clinical_rules": [{"name": "no_down_low", "forbid": ["down"], "when": [low]}]}
    raw["evaluation"] = {"replicates": 0, "fqe_ridge_alpha": 0.0, "estimators": ["pdwis", "wdr", "fqe"]}
    raw["behaviour_model"] = {"folds": 1}
    frame = tiny_decisions(300)
    rng = np.random.default_rng(5)
    level = np.repeat(rng.choice(LEVELS, 300), 3)  # a baseline characteristic: one level per episode
    frame["edu"] = level
    frame["action"] = np.asarray(ACTIONS)[rng.integers(0, 3, len(frame))]
    frame["reward"] = [REWARD[v][ACTIONS.index(a)] for v, a in zip(level, frame["action"])]
    pf = load_protocol(write_tiny(folder, raw, frame))
    return pf.protocol, validate_records(pf).decisions


def test_rule_in_levels_masks_the_named_level(study):
    protocol, decisions = study
    permitted = ClinicalRuleSet.from_protocol(protocol).permitted(decisions)
    # Exact: 'down' (column 2) is forbidden exactly at the 'low' decisions, nothing else is.
    np.testing.assert_array_equal(permitted[:, 2], (decisions["edu"] != "low").to_numpy())
    assert permitted[:, :2].all()


def test_learns_the_best_permitted_action_and_evaluates_it_exactly(study):
    protocol, decisions = study
    proba, recommended, q, folds = fit_replicate(decisions, protocol)
    # Exact: the rewards depend on the level and the action only, so the linear Q-model with the level's dummies
    # fits them without error and the cross-fitted regime takes the best permitted action at every decision.
    expected = decisions["edu"].map(lambda v: BEST[v][0]).to_numpy()
    np.testing.assert_array_equal(recommended, expected)
    values = point_values(
        evaluate_all(decisions, proba, recommended, protocol, strict=False, learned_folds=folds, learned_q=q)
    )
    # Exact: three decisions per episode, each worth the level's best permitted reward (computed by hand from
    # REWARD); with exact outcome models and deterministic rewards, every doubly robust correction term is 0.
    truth = 3 * float(np.mean([BEST[v][1] for v in decisions["edu"].iloc[::3]]))
    assert values["learned"]["fqe"] == pytest.approx(truth, abs=1e-8)
    assert values["learned"]["wdr"] == pytest.approx(truth, abs=1e-8)
    # Exact: at each step the per-decision weighted estimate averages rewards of decisions that followed the
    # regime, each its level's best permitted reward (0.5 or 1), so the sum over three steps lies in [1.5, 3].
    assert 1.5 - 1e-9 <= values["learned"]["pdwis"] <= 3 + 1e-9


def test_cohort_and_balance_show_level_shares(study):
    protocol, decisions = study
    proba = np.full((len(decisions), 3), 1 / 3)
    cohort = cohort_table(decisions, protocol)
    rows = {row["state"]: row for row in cohort["rows"]}
    baseline = decisions[decisions["step"] == 0]
    counts = pd.crosstab(baseline["edu"], baseline["action"])
    # Reference: pandas crosstab of the first decisions; each level is a row of counts and shares, not a mean.
    for level in LEVELS:
        n = int(counts.loc[level].sum())
        assert rows[f"edu[{level}]"]["cells"]["overall"] == f"{n:,} ({100 * n / len(baseline):.1f}%)"
        k = int(counts.loc[level, "up"])
        assert rows[f"edu[{level}]"]["cells"]["up"] == f"{k:,} ({100 * k / counts['up'].sum():.1f}%)"
    assert "edu" not in rows
    balance = balance_by_step(decisions, proba, protocol)
    assert set(balance["0"]["states"]) == {"bp", "flag", "edu[low]", "edu[mid]", "edu[high]"}


def test_readable_tree_names_levels(study):
    protocol, decisions = study
    scaler = StateScaler.fit(decisions, protocol)
    best = decisions["edu"].map(lambda v: BEST[v][0]).to_numpy()
    readable = distill_regime(scaler.covariate_frame(decisions), best, scaler.covariate_states(protocol), ACTIONS)
    # Exact: the best action is hold at low and mid and up at high, so a depth-1 split on the 'high' dummy (or
    # deeper splits on the levels) reproduces it; the conditions name the level, never a 0/1 dummy.
    assert readable.fidelity == 1.0
    texts = [c for rule in readable.rules for c in rule.conditions]
    assert texts and all(c.startswith("edu = ") or c.startswith("edu ≠ ") for c in texts), texts
