"""Clone–censor–weight rows by hand: censoring at deviation, grace period, pre-decision time, truncation."""

import json

import numpy as np
import pandas as pd
import pytest
from surv_helpers import one_hot, random_cohort

from regimewise.survival import clone_censor_weight, make_timeline

# Source for every expectation in this file: the definitions of Cain et al. (2010, Int J Biostat 6(2):18) and
# Hernán (2018, BMJ 360:k182), worked by hand on a few episodes (documented in regimewise.survival.clones).


def _small():
    """Episode a: decisions on days 0, 10, 20 taking actions 0, 0, 1; follow-up 30, no event.
    Episode b: first decision on day 5 (so [0, 5) precedes any decision), actions 1, 1; event on day 12.
    Episode c: decisions on days 0, 10, 20, actions 1, 1, 0; event on day 15 (its day-20 decision comes after)."""
    decisions = pd.DataFrame(
        {
            "episode_id": list("aaabbccc"),
            "step": [0, 1, 2, 0, 1, 0, 1, 2],
            "day": [0, 10, 20, 5, 10, 0, 10, 20],
            "action": [0, 0, 1, 1, 1, 1, 1, 0],
        }
    )
    episodes = pd.DataFrame({"episode_id": list("abc"), "followup_days": [30, 12, 15], "event": [0, 1, 1]})
    taken = np.array([0.5, 0.8, 0.25, 0.5, 0.4, 0.2, 0.5, 0.9])
    proba = np.column_stack([1 - taken, taken])
    proba[decisions["action"].to_numpy() == 0] = proba[decisions["action"].to_numpy() == 0][:, ::-1]
    return make_timeline(decisions, episodes, proba, horizon=30), one_hot(np.ones(8, dtype=int), 2)


def _rows(table):
    return table.rows[["episode_id", "start", "stop", "event", "weight"]].values.tolist()


def test_censoring_at_first_deviation_and_weights_without_grace():
    timeline, always_1 = _small()
    table = clone_censor_weight(timeline, always_1, name="always 1")
    # a deviates at its day-0 decision: censored at time zero, no row. b: [0, 5) before any decision (weight 1),
    # then 1/0.5 and 1/(0.5 * 0.4); event at 12. c: 1/0.2, 1/(0.2 * 0.5); its day-20 deviation is after its event.
    assert _rows(table) == [
        ["b", 0.0, 5.0, False, 1.0],
        ["b", 5.0, 10.0, False, 2.0],
        ["b", 10.0, 12.0, True, 5.0],
        ["c", 0.0, 10.0, False, 5.0],
        ["c", 10.0, 15.0, True, 10.0],
    ]
    assert table.n_censored == 1 and table.kind == "deterministic" and table.n_clones == 3
    summary = json.loads(json.dumps(table.to_dict(), allow_nan=False))
    assert list(summary) == sorted(summary)
    assert (summary["n_rows"], summary["n_events"], summary["weight_max"], summary["truncation"]) == (5, 2, 10.0, None)


@pytest.mark.parametrize(
    "grace, rows_of_a",
    [
        (1, [["a", 0.0, 10.0, False, 1.0]]),  # decision 0 in grace; decision 1 (action 0) deviates: censored at 10
        (2, [["a", 0.0, 10.0, False, 1.0], ["a", 10.0, 20.0, False, 1.0], ["a", 20.0, 30.0, False, 4.0]]),
    ],
)
def test_grace_period_follows_usual_care_without_weight_then_binds(grace, rows_of_a):
    timeline, always_1 = _small()
    table = clone_censor_weight(timeline, always_1, grace=grace)
    assert [row for row in _rows(table) if row[0] == "a"] == rows_of_a
    # b's decisions 0..grace-1 contribute the factor 1: with grace 1 its weights are 1, 1, 1/0.4.
    b_weights = [row[4] for row in _rows(table) if row[0] == "b"]
    assert b_weights == ([1.0, 1.0, 2.5] if grace == 1 else [1.0, 1.0, 1.0])


def test_natural_course_rows_and_horizon_cut():
    timeline, _ = _small()
    assert _rows(clone_censor_weight(timeline)) == [
        ["a", 0.0, 10.0, False, 1.0],
        ["a", 10.0, 20.0, False, 1.0],
        ["a", 20.0, 30.0, False, 1.0],
        ["b", 0.0, 5.0, False, 1.0],
        ["b", 5.0, 10.0, False, 1.0],
        ["b", 10.0, 12.0, True, 1.0],
        ["c", 0.0, 10.0, False, 1.0],
        ["c", 10.0, 15.0, True, 1.0],
    ]
    decisions, episodes, proba, _ = random_cohort(7)
    short = make_timeline(decisions, episodes, proba, horizon=50.0)
    rows = clone_censor_weight(short).rows
    assert rows["stop"].max() == 50.0
    late = episodes["followup_days"].to_numpy() > 50
    assert not rows.loc[rows["episode_id"].isin(episodes.loc[late, "episode_id"]), "event"].any()


def test_stochastic_strategy_weights_are_running_ratios_without_censoring():
    # Source: per-decision importance ratio π_s(a)/p̂(a) (Precup, Sutton & Singh 2000), recomputed episode by episode.
    decisions, episodes, proba, _ = random_cohort(8, n_episodes=40)
    rng = np.random.default_rng(np.random.SeedSequence(8))
    strategy = rng.dirichlet(np.ones(3), size=len(decisions))
    timeline = make_timeline(decisions, episodes, proba, horizon=100.0)
    table = clone_censor_weight(timeline, strategy)
    assert table.kind == "stochastic" and table.n_censored == 0
    expected = []
    for episode, frame in decisions.groupby("episode_id", sort=False):
        end = min(episodes.set_index("episode_id").loc[episode, "followup_days"], 100.0)
        weight = 1.0
        for i in frame.index[frame["day"] < end]:
            weight *= strategy[i, decisions.at[i, "action"]] / proba[i, decisions.at[i, "action"]]
            expected.append(weight)
    np.testing.assert_allclose(table.rows.loc[table.rows["step"] >= 0, "weight"], expected, rtol=1e-13)


def test_truncation_clips_at_percentiles_of_the_table_weights():
    # Source: Cole & Hernán (2008, Am J Epidemiol 168:656), truncation at percentiles; numpy.percentile as reference.
    decisions, episodes, proba, _ = random_cohort(9)
    timeline = make_timeline(decisions, episodes, proba, horizon=100.0)
    strategy = one_hot(np.zeros(len(decisions), dtype=int), 3)
    raw = clone_censor_weight(timeline, strategy).rows["weight"].to_numpy()
    cut = clone_censor_weight(timeline, strategy, truncate=(1, 95))
    low, high = np.percentile(raw, 1), np.percentile(raw, 95)
    assert cut.truncation == (low, high) and high < raw.max()
    np.testing.assert_array_equal(cut.rows["weight"].to_numpy(), np.clip(raw, low, high))


def test_censoring_weights_multiply_the_clone_weights():
    decisions, episodes, proba, _ = random_cohort(10)
    timeline = make_timeline(decisions, episodes, proba, horizon=100.0)
    strategy = one_hot(np.ones(len(decisions), dtype=int), 3)
    ipcw = np.linspace(1.0, 2.0, timeline.row.shape[0])
    plain_rows = clone_censor_weight(timeline, strategy).rows
    weighted = clone_censor_weight(timeline, strategy, censoring_weights=ipcw).rows
    decision = plain_rows["step"] >= 0
    lookup = pd.Series(ipcw, index=pd.MultiIndex.from_arrays([timeline.episode, timeline.step]))
    factor = lookup.loc[list(zip(plain_rows.loc[decision, "episode"], plain_rows.loc[decision, "step"]))].to_numpy()
    np.testing.assert_allclose(weighted.loc[decision, "weight"], plain_rows.loc[decision, "weight"] * factor)
    assert (weighted.loc[~decision, "weight"] == 1.0).all()
