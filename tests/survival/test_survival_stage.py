"""The survival stage on validated records: strategies, the natural course, intervals and bad settings."""

from __future__ import annotations

import numpy as np
import pytest
import yaml
from lifelines import KaplanMeierFitter
from scipy.stats.mstats import mquantiles
from support.tiny import REPOSITORY

from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import ProtocolError, UserInputError
from regimewise.protocol import Protocol, load_protocol
from regimewise.survival.analysis import survival_analysis, survival_intervals, survival_values, time_grid
from regimewise.usual_care.fitting import fit_usual_care


def demo_protocol(**survival) -> Protocol:
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["survival"] = {"horizon_days": 730, "time_points": [365], **survival}
    raw.pop("strategies", None)  # derived strategies need the cross-fitted Q-values; tested with the workflow
    return Protocol.model_validate(raw)


@pytest.fixture(scope="module")
def cohort():
    sim = simulate_cohort(600, seed=11, confounding_strength=0.0)
    decisions = sim.decisions.copy()
    protocol = demo_protocol(dropout_model=False)
    proba = fit_usual_care(decisions, protocol).record_proba
    return decisions, sim.episodes, proba, protocol


def test_usual_care_without_dropout_model_is_the_episodes_kaplan_meier(cohort):
    # Reference: lifelines' unweighted Kaplan–Meier of (min(follow-up, horizon), event by the horizon) — the natural
    # course has every weight 1 and no artificial censoring (METHODS.md, survival checks).
    decisions, episodes, proba, protocol = cohort
    recommended = proba.argmax(axis=1)
    out = survival_analysis(decisions, episodes, proba, recommended, protocol)
    usual = next(row for row in out["strategies"] if row["name"] == "usual_care")
    assert usual["clones"]["weight_min"] == usual["clones"]["weight_max"] == 1.0
    follow = episodes["followup_days"].to_numpy(dtype=float)
    event = (episodes["event"].to_numpy() == 1) & (follow <= 730)
    km = KaplanMeierFitter().fit(np.minimum(follow, 730), event)
    expected = km.survival_function_at_times(usual["curve"]["times"]).to_numpy()
    np.testing.assert_allclose(usual["curve"]["survival"], expected, atol=1e-12)


def test_strategies_are_the_evaluated_regimes_and_a_deviation_censors(cohort):
    decisions, episodes, proba, protocol = cohort
    hold = np.zeros(len(decisions), dtype=np.int64)
    out = survival_analysis(decisions, episodes, proba, hold, protocol)
    names = [row["name"] for row in out["strategies"]]
    comparators = [c.name for c in protocol.comparators]  # the demo's guideline rule: one more strategy
    assert comparators == ["guideline"]
    assert names == ["learned", "usual_care", *(f"always_{a}" for a in protocol.action_labels), *comparators]
    learned, always_hold = out["strategies"][0], out["strategies"][2]
    # a learned regime of "hold everywhere" is the always-hold strategy: same clones, same curve
    assert learned["curve"]["survival"] == always_hold["curve"]["survival"]
    assert always_hold["clones"]["n_censored"] > 0


def test_the_grid_holds_the_time_points_and_the_horizon(cohort):
    decisions, _, _, protocol = cohort
    grid = time_grid(decisions, protocol)
    assert 365.0 in grid and grid[-1] == 730.0 and np.all(np.diff(grid) > 0)
    # default spacing: the median gap between an episode's decisions (quarterly reviews in the demo scenario)
    assert 80 <= grid[0] <= 100


def test_intervals_are_the_quantile_rule_of_the_replicates(cohort):
    decisions, episodes, proba, protocol = cohort
    recommended = proba.argmax(axis=1)
    point = survival_analysis(decisions, episodes, proba, recommended, protocol)
    rng = np.random.default_rng(0)
    replicates = []
    for _ in range(9):
        rows = np.sort(rng.choice(len(episodes), size=len(episodes)))
        chosen = set(episodes["episode_id"].iloc[rows])
        keep = decisions["episode_id"].isin(chosen).to_numpy()
        sub = episodes[episodes["episode_id"].isin(chosen)]
        replicates.append(survival_values(decisions[keep], sub, proba[keep], recommended[keep], protocol))
    limits = survival_intervals(point, replicates, protocol)["strategies"]["usual_care"]["rmst"]
    draws = [r["usual_care"]["rmst"] for r in replicates]
    # Reference: scipy's mquantiles with alphap = betap = 0 (Hyndman & Fan type 6), the (R + 1)α-th ordered
    # replicate of Davison & Hinkley (1997, §5.2) that every interval of the project uses.
    low, high = mquantiles(draws, [0.025, 0.975], alphap=0, betap=0)
    assert limits == {"low": pytest.approx(low), "high": pytest.approx(high)}


def test_without_replicates_no_strategy_gets_an_interval(cohort):
    """evaluation.replicates: 0 runs no bootstrap shard: every interval is absent (null), never a list of nulls
    that the report would index."""
    decisions, episodes, proba, protocol = cohort
    point = survival_analysis(decisions, episodes, proba, proba.argmax(axis=1), protocol)
    out = survival_intervals(point, [], protocol)
    assert out["replicates"] == 0
    assert all(limits is None for row in out["strategies"].values() for limits in row.values())


def test_time_points_beyond_the_horizon_are_refused():
    with pytest.raises(ValueError, match="lies beyond horizon_days"):
        demo_protocol(time_points=[900])


def test_survival_without_episodes_is_refused(tmp_path):
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"].update(root=str(REPOSITORY), decisions=str(REPOSITORY / "synthetic_cohort" / "decisions.csv"))
    raw["data"]["episodes"] = None
    raw["survival"] = {"horizon_days": 730}
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump(raw), encoding="utf-8")
    with pytest.raises(ProtocolError, match="survival needs the episodes table"):
        load_protocol(tmp_path / "protocol.yaml")


def test_a_horizon_beyond_the_longest_follow_up_is_refused(cohort):
    decisions, episodes, proba, _ = cohort
    protocol = demo_protocol(horizon_days=5000)
    with pytest.raises(UserInputError, match="longest follow-up"):
        survival_analysis(decisions, episodes, proba, proba.argmax(axis=1), protocol)


def test_episodes_without_outcome_columns_are_refused(cohort):
    decisions, episodes, proba, protocol = cohort
    with pytest.raises(UserInputError, match="'event' is absent"):
        survival_analysis(decisions, episodes.drop(columns="event"), proba, proba.argmax(axis=1), protocol)
