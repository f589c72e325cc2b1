"""Follow-up diagnostics: risk-set counts, weight sums, Kish ESS, largest weight and the unreliable-from rule."""

import json

import numpy as np
import pandas as pd
import pytest
from surv_helpers import one_hot, random_cohort

from regimewise.survival import CloneTable, clone_censor_weight, follow_diagnostics, make_timeline


def test_without_censoring_the_risk_set_is_n_times_survival():
    # Source: exact identity of the Kaplan–Meier estimator without censoring, Ŝ(t-) = (number still at risk) / n
    # (Kaplan & Meier 1958); every weight is 1 in the natural course.
    decisions, episodes, proba, _ = random_cohort(12)
    horizon = 100.0
    episodes = episodes.assign(event=np.where(episodes["followup_days"] < horizon, 1, episodes["event"]))
    table = clone_censor_weight(make_timeline(decisions, episodes, proba, horizon))
    times = np.arange(0.0, horizon + 1, 5.0)
    result = follow_diagnostics(table, times, min_ess=1, horizon=horizon)
    alive = np.array([(np.minimum(episodes["followup_days"], horizon) >= t).sum() for t in times])
    np.testing.assert_array_equal(result.n_following, alive)
    np.testing.assert_allclose(result.expected_sum, alive, rtol=1e-12)
    np.testing.assert_allclose(result.sum_weights, alive, rtol=1e-12)
    np.testing.assert_allclose(result.ess, alive, rtol=1e-12)


def test_risk_set_summaries_match_an_episode_by_episode_count():
    # Source: Kish (1965) ESS = (Σw)² / Σw², recomputed here clone by clone from the rows in plain Python.
    decisions, episodes, proba, _ = random_cohort(13, n_episodes=120)
    timeline = make_timeline(decisions, episodes, proba, 120.0)
    table = clone_censor_weight(timeline, one_hot(np.zeros(len(decisions), dtype=int), 3), grace=1)
    times = np.array([0.0, 15.0, 30.0, 31.0, 64.5, 90.0, 120.0])
    result = follow_diagnostics(table, times, min_ess=1)
    for j, t in enumerate(times):
        in_force = []
        for _, rows in table.rows.groupby("episode"):
            for start, stop, weight in rows[["start", "stop", "weight"]].itertuples(index=False):
                if (start < t <= stop) or (t == 0 and start == 0):
                    in_force.append(weight)
        w = np.array(in_force)
        assert result.n_following[j] == w.size
        assert result.sum_weights[j] == pytest.approx(w.sum(), rel=1e-12)
        assert result.ess[j] == pytest.approx(w.sum() ** 2 / np.sum(w**2), rel=1e-12)
        assert result.max_weight[j] == pytest.approx(w.max(), rel=1e-12)


def test_unreliable_from_the_first_low_ess_time_on_even_if_it_recovers():
    # Source: the rule of issue 14 ("unreliable from that time on"); ESS by hand: t=1: 3²/3 = 3; t=4: 12²/102;
    # t=7: 2²/2 = 2 (the heavy clone had its event at 5, so the ESS recovers, but the flag stays).
    rows = pd.DataFrame(
        {
            "episode": [0, 1, 1, 2],
            "episode_id": ["a", "b", "b", "c"],
            "patient_id": ["a", "b", "b", "c"],
            "step": [0, 0, 1, 0],
            "start": [0.0, 0.0, 3.0, 0.0],
            "stop": [10.0, 3.0, 5.0, 10.0],
            "event": [False, False, True, False],
            "weight": [1.0, 1.0, 10.0, 1.0],
        }
    )
    table = CloneTable("hand", rows, n_clones=3, kind="deterministic", grace=0, n_censored=0, truncation=None)
    result = follow_diagnostics(table, [1, 4, 7], min_ess=1.8)
    np.testing.assert_allclose(result.ess, [3.0, 144 / 102, 2.0])
    assert result.reliable.tolist() == [True, False, False] and result.unreliable_from == 4.0
    out = result.to_dict()
    json.dumps(out, allow_nan=False)
    assert out["unreliable_from"] == 4.0 and list(out) == sorted(out)
    assert follow_diagnostics(table, [1, 4, 7], min_ess=1.0).to_dict()["unreliable_from"] is None
