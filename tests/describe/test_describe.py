"""Cohort table, standardised mean differences and cell suppression, checked by hand and by brute force."""

import itertools
import json

import numpy as np
import pandas as pd
import pytest
from support.tiny import REPOSITORY

from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.describe.balance import balance_by_step, smd, weighted_smd
from regimewise.describe.cohort import cohort_table
from regimewise.describe.suppression import determined_cells, suppress_cells
from regimewise.protocol import load_protocol
from regimewise.report.figures import balance_figure


def test_smd_equals_hand_calculation():
    # Hand calculation (Austin 2009, Stat Med 28:3083): d = (m1 - m0) / sqrt((s1^2 + s0^2) / 2).
    # x1 = 1,2,3,4: mean 2.5, sample variance 5/3; x0 = 2,4,6: mean 4, sample variance 4.
    assert smd([1.0, 2.0, 3.0, 4.0], [2.0, 4.0, 6.0]) == pytest.approx(-1.5 / np.sqrt((5 / 3 + 4) / 2), rel=1e-12)
    # Binary: p1 = 1/2, p0 = 1/4, variances p(1 - p) = 1/4 and 3/16.
    expected = 0.25 / np.sqrt((0.25 + 0.1875) / 2)
    assert smd([1, 0, 1, 0], [1, 0, 0, 0], binary=True) == pytest.approx(expected, rel=1e-12)


def test_weighted_smd_with_unit_weights_equals_unweighted():
    rng = np.random.default_rng(3)
    x1, x0 = rng.normal(0.3, 1.2, 57), rng.normal(0.0, 0.8, 91)
    # Identity (Austin & Stuart 2015, Stat Med 34:3661): with all weights 1 the weighted SMD is the SMD.
    assert weighted_smd(x1, x0, np.ones(57), np.ones(91)) == pytest.approx(smd(x1, x0), rel=1e-12)
    b1, b0 = (x1 > 0).astype(float), (x0 > 0).astype(float)
    assert weighted_smd(b1, b0, np.ones(57), np.ones(91), True) == pytest.approx(smd(b1, b0, True), rel=1e-12)


def test_weighted_smd_hand_formula():
    x1, w1 = np.array([1.0, 2.0, 4.0]), np.array([1.0, 2.0, 3.0])
    x0, w0 = np.array([0.0, 1.0]), np.array([2.0, 2.0])
    # Hand calculation with Austin & Stuart's (2015) weighted mean and variance
    # s^2 = sum(w) / (sum(w)^2 - sum(w^2)) * sum(w (x - m)^2).
    m1 = (1 + 4 + 12) / 6
    v1 = 6 / (36 - 14) * (1 * (1 - m1) ** 2 + 2 * (2 - m1) ** 2 + 3 * (4 - m1) ** 2)
    m0, v0 = 0.5, 4 / (16 - 8) * (2 * 0.25 + 2 * 0.25)
    assert weighted_smd(x1, x0, w1, w0) == pytest.approx((m1 - m0) / np.sqrt((v1 + v0) / 2), rel=1e-12)
    # Scaling all weights by a constant changes nothing.
    assert weighted_smd(x1, x0, 7 * w1, 7 * w0) == pytest.approx(weighted_smd(x1, x0, w1, w0), rel=1e-12)


def test_inverse_probability_weights_balance_a_confounder():
    rng = np.random.default_rng(11)
    x = rng.normal(size=40_000)
    p = 1 / (1 + np.exp(-(0.8 * x - 0.3)))
    a = rng.random(x.size) < p
    before = smd(x[a], x[~a])
    after = weighted_smd(x[a], x[~a], 1 / p[a], 1 / (1 - p[~a]))
    # Theory (Rosenbaum & Rubin 1983, Biometrika 70:41): weighting by the true propensity balances x in
    # expectation; the sampling SD of the SMD here is about sqrt(2 / 20000) = 0.01, so 0.05 is a wide margin.
    assert abs(before) > 0.5
    assert abs(after) < 0.05


# ---------------------------------------------------------------------------------------------- suppression
def _brute_force_values(table, mask, window=3):
    """Every value each suppressed cell takes among the non-negative integer tables that agree with the published
    cells and the additivity of rows and columns, searching every interior suppressed cell within ``window`` of
    its true value: an exhaustive check that at least one other completion exists."""
    values = np.asarray(table)
    free = [(r, c) for r in range(values.shape[0] - 1) for c in range(values.shape[1] - 1) if mask[r, c]]
    seen = {cell: set() for cell in zip(*np.nonzero(mask))}
    ranges = [range(max(0, values[cell] - window), values[cell] + window + 1) for cell in free]
    for filling in itertools.product(*ranges):
        candidate = values.copy()
        for cell, v in zip(free, filling):
            candidate[cell] = v
        candidate[:-1, -1] = candidate[:-1, :-1].sum(axis=1)
        candidate[-1, :] = candidate[:-1, :].sum(axis=0)
        if np.all(candidate[~mask] == values[~mask]):
            for cell in seen:
                seen[cell].add(int(candidate[cell]))
    return seen


def _with_margins(interior):
    interior = np.asarray(interior)
    table = np.column_stack([interior, interior.sum(axis=1)])
    return np.vstack([table, table.sum(axis=0)])


def test_complementary_suppression_hand_example():
    table = _with_margins([[3, 20, 30], [25, 40, 12]])
    mask = suppress_cells(table, threshold=11)
    # Primary: 3 (1..10). Its row and column then need a second hidden cell, and the cells chosen need partners
    # too; no line may end with exactly one hidden cell.
    assert mask[0, 0]
    for line in [*mask, *mask.T]:
        assert line.sum() != 1
    # Exhaustive check: every suppressed cell can take at least two values given what is published.
    seen = _brute_force_values(table, mask)
    assert all(len(v) >= 2 for v in seen.values())
    # The same check catches primary suppression alone: 3 = 53 - 20 - 30 is recovered from the row total.
    only_primary = np.zeros(table.shape, dtype=bool)
    only_primary[0, 0] = True
    assert _brute_force_values(table, only_primary) == {(0, 0): {3}}


@pytest.mark.parametrize("seed", range(6))
def test_no_suppressed_cell_is_recoverable_on_random_tables(seed):
    rng = np.random.default_rng(seed)
    interior = rng.choice([0, 1, 2, 4, 6, 9], size=(2, 3))
    table = _with_margins(interior)
    mask = suppress_cells(table, threshold=3)
    # Exhaustive check of every completion near the true table.
    seen = _brute_force_values(table, mask)
    assert all(len(v) >= 2 for v in seen.values()), (table, mask)
    # The linear-programming audit agrees with brute force: nothing is pinned down.
    assert not determined_cells(table, mask).any()


@pytest.mark.parametrize("row", [[3, 20, 23], [3, 23], [3, 0, 3], [0, 2, 2], [12, 15, 27]])
def test_one_row_tables_finish_and_hide_what_they_can(row):
    # A one-row table (patients by first action, with their total last; no totals row) once looped forever: a
    # one-cell column can never get a second hidden cell. What must hold, by hand: every count from 1 to 10 is
    # hidden, and a hidden count is not recoverable as the total minus the published counts, i.e. at least two
    # counts are hidden or the total is.
    mask = suppress_cells(np.asarray([row]), threshold=11)[0]
    counts, hidden = np.asarray(row[:-1]), mask[:-1]
    assert np.all(hidden[(counts > 0) & (counts < 11)])
    assert hidden.sum() != 1 or mask[-1]
    if not any(0 < c < 11 for c in counts):
        assert not mask.any()


def test_interval_audit_finds_a_recoverable_cell():
    table = _with_margins([[3, 20], [25, 40]])
    only_primary = np.zeros(table.shape, dtype=bool)
    only_primary[0, 0] = True
    # Exact: with the row total published, 3 = 23 - 20 is recovered.
    assert determined_cells(table, only_primary)[0, 0]


# ---------------------------------------------------------------------------------------------- cohort table
@pytest.fixture(scope="module")
def simulated():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    cohort = simulate_cohort(600, seed=5, confounding_strength=0.0)
    frame = clean_decisions(pf, cohort.decisions)
    return pf.protocol, frame, cohort.behaviour_proba


def test_cohort_table_counts_and_small_cells(simulated):
    protocol, frame, _ = simulated
    table = cohort_table(frame, protocol)
    json.dumps(table)
    first = frame[frame["step"] == 0]
    counts = first["action"].value_counts()
    threshold = protocol.report.min_cell_count
    # Reference: pandas value_counts of the first action; 1..10 shown as "<11".
    for label in protocol.action_labels:
        n = int(counts.get(label, 0))
        shown = table["n"][label]
        assert shown == f"<{threshold}" if 0 < n < threshold else shown in (f"{n:,}", "suppressed")
    female = next(r for r in table["rows"] if r["state"] == "female")
    hold = first[first["action"] == "hold"]["female"]
    if female["cells"]["hold"] not in ("suppressed", f"<{threshold}"):
        assert female["cells"]["hold"] == f"{int(hold.sum()):,} ({100 * hold.mean():.1f}%)"
    sbp = next(r for r in table["rows"] if r["state"] == "sbp")
    x1 = first.loc[first["action"] == "step_up", "sbp"]
    x0 = first.loc[first["action"] == "hold", "sbp"]
    # Hand formula of Austin (2009) with pandas' sample variances.
    expected = (x1.mean() - x0.mean()) / np.sqrt((x1.var() + x0.var()) / 2)
    assert sbp["smd"]["step_up"] == pytest.approx(expected, rel=1e-10)


def test_balance_by_step_with_true_probabilities(simulated):
    protocol, frame, truth = simulated
    balance = balance_by_step(frame, truth, protocol)
    assert sorted(balance, key=int) == [str(t) for t in range(protocol.horizon)]
    rows = frame["step"].to_numpy() == 2
    x = frame["sbp"].to_numpy()[rows]
    action = frame["action"].to_numpy()[rows]
    taken = truth[rows][np.arange(rows.sum()), pd.Categorical(action, categories=protocol.action_labels).codes]
    w = 1 / taken
    up, hold = action == "step_up", action == "hold"
    # Reference: weighted_smd on the hand-selected rows of step 2 with weights 1 / p(action taken).
    assert balance["2"]["states"]["sbp"]["weighted"]["step_up"] == pytest.approx(
        weighted_smd(x[up], x[hold], w[up], w[hold]), rel=1e-12
    )
    figure = balance_figure(balance, {s.name: s.label for s in protocol.states})
    assert figure.startswith("<svg")
