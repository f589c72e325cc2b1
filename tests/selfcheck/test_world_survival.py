"""The self-check's survival part: the look-alike world's events and loss to follow-up checked against the demo
simulator (an external truth: its cohorts come from a model the world does not see) with lifelines' Kaplan–Meier
estimator as the external reference, exact common random numbers, the pipeline's own validation and timeline, and
the summary's arithmetic by hand (Morris, White & Crowther 2019, Table 6)."""

import math
from dataclasses import replace

import numpy as np
import pytest
from lifelines import KaplanMeierFitter
from support.tiny import REPOSITORY

from regimewise.data.records import check_episodes, clean_decisions, clean_episodes
from regimewise.demo.scenario import ScenarioParams
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.strategies import PartialAdoption
from regimewise.errors import UserInputError
from regimewise.io import dumps_json
from regimewise.protocol import load_protocol
from regimewise.report.html import template_environment
from regimewise.selfcheck.cohort import AfterGrace, run_cohort
from regimewise.selfcheck.fitcheck import follow_up_reproduction
from regimewise.selfcheck.page import selfcheck_page
from regimewise.selfcheck.run import summarise
from regimewise.selfcheck.world import LookAlikeWorld
from regimewise.survival.analysis import survival_inputs
from regimewise.survival.timeline import make_timeline

HORIZON = 730.0  # the demo protocol's survival.horizon_days


def _records(n, seed, params=None):
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    cohort = simulate_cohort(n, seed=seed, confounding_strength=0.0, params=params)
    decisions = clean_decisions(pf, cohort.decisions)
    return pf, decisions, clean_episodes(pf, cohort.episodes, decisions, set())


@pytest.fixture(scope="module")
def demo_world():
    pf, decisions, episodes = _records(2000, 31)
    return pf, decisions, episodes, LookAlikeWorld.fit(decisions, pf.protocol, episodes)


def _always_hold(frame):
    """A regime: the protocol's first action (hold) at every decision."""
    return np.zeros(len(frame), dtype=np.int64)


def _lifelines_km(episodes, at):
    """Kaplan–Meier survival at ``at`` by lifelines (the external reference), follow-up cut at the horizon."""
    follow = episodes["followup_days"].to_numpy(dtype=float)
    event = (episodes["event"].to_numpy() == 1) & (follow <= HORIZON)
    fitter = KaplanMeierFitter().fit(np.minimum(follow, HORIZON), event)
    return float(fitter.survival_function_at_times([at]).iloc[0])


def _shares(episodes):
    follow = episodes["followup_days"].to_numpy(dtype=float)
    event = (episodes["event"].to_numpy() == 1) & (follow <= HORIZON)
    return event.mean(), np.mean(~event & (follow < HORIZON))


def test_world_reproduces_the_demo_events_losses_and_survival(demo_world):
    # The demo simulator's records (2000 episodes) against 6000 simulated ones: event share, dropout share and the
    # Kaplan–Meier survival at the horizon agree within 3 standard errors of their difference (binomial SEs; for
    # the KM, √(S(1−S)/n) with n the episodes, slightly small under censoring, so the bound is 3.5 SEs).
    pf, decisions, episodes, world = demo_world
    _, simulated, _ = world.simulate_records(6000, seed=5)
    (real_event, real_loss), (sim_event, sim_loss) = _shares(episodes), _shares(simulated)
    for real, sim in ((real_event, sim_event), (real_loss, sim_loss)):
        se = math.sqrt(real * (1 - real) / 2000 + sim * (1 - sim) / 6000)
        assert abs(real - sim) < 3 * se
    real_km, sim_km = _lifelines_km(episodes, HORIZON), _lifelines_km(simulated, HORIZON)
    assert abs(real_km - sim_km) < 3.5 * math.sqrt(real_km * (1 - real_km) * (1 / 2000 + 1 / 6000))
    # the fit check's own figures equal lifelines' Kaplan–Meier and the shares counted here
    fit = follow_up_reproduction(episodes, simulated, HORIZON)
    assert fit["records"]["survival_at_horizon"] == pytest.approx(real_km, abs=1e-12)
    assert fit["simulated"]["survival_at_horizon"] == pytest.approx(sim_km, abs=1e-12)
    assert fit["simulated"]["event_share"] == pytest.approx(sim_event)
    assert fit["records"]["dropout_share"] == pytest.approx(real_loss)


def test_usual_care_truth_is_the_km_of_a_cohort_without_loss():
    # Records without loss to follow-up before the horizon (the demo's loss and data cut-off moved beyond it): the
    # world learns no loss, and its true usual-care survival (100 000 episodes) equals lifelines' Kaplan–Meier of
    # a simulated usual-care cohort (20 000 episodes, other draws) within 3 Monte Carlo SEs (binomial, both parts).
    params = ScenarioParams(dropout_mean_years=1e6, cutoff_min_days=200, cutoff_max_days=300)
    pf, decisions, episodes = _records(1500, 7, params)
    assert _shares(episodes)[1] == 0.0
    world = LookAlikeWorld.fit(decisions, pf.protocol, episodes)
    _, cohort, _ = world.simulate_records(20_000, seed=11)
    assert _shares(cohort)[1] == 0.0
    _, event_days = world.returns_and_event_days("usual_care", 100_000, seed=12)
    for at in (365.0, HORIZON):
        truth, km = float(np.mean(event_days > at)), _lifelines_km(cohort, at)
        mcse = math.sqrt(truth * (1 - truth) / 100_000 + km * (1 - km) / 20_000)
        assert abs(truth - km) < 3 * mcse


def test_survival_truths_use_common_random_numbers(demo_world):
    # The same draws for every policy: a strategy that never overrides usual care (partial adoption at share 0)
    # gets exactly usual care's event days, so its risk difference is exactly 0; a regime that always holds differs.
    _, _, _, world = demo_world
    usual_returns, usual = world.returns_and_event_days("usual_care", 3000, seed=4)
    never = PartialAdoption(_always_hold, 0.0)
    returns, same = world.returns_and_event_days(never, 3000, seed=4)
    assert np.array_equal(same, usual) and np.array_equal(returns, usual_returns)
    assert float(np.mean(usual > HORIZON)) - float(np.mean(same > HORIZON)) == 0.0
    _, hold = world.returns_and_event_days(_always_hold, 3000, seed=4)
    assert not np.array_equal(hold, usual)


def test_a_grace_period_covering_every_decision_is_usual_care(demo_world):
    # The survival analysis's grace period: usual care for the first g decisions, then the strategy. With g = 8 (every
    # demo decision) the strategy is usual care, event day for event day (common random numbers); with g = 2 it is
    # neither usual care nor the strategy from the start.
    _, _, _, world = demo_world
    hold = _always_hold
    _, usual = world.returns_and_event_days("usual_care", 3000, seed=6)
    _, from_start = world.returns_and_event_days(hold, 3000, seed=6)
    assert np.array_equal(world.returns_and_event_days(AfterGrace(hold, 8), 3000, seed=6)[1], usual)
    _, after_two = world.returns_and_event_days(AfterGrace(hold, 2), 3000, seed=6)
    assert not np.array_equal(after_two, usual) and not np.array_equal(after_two, from_start)


def test_episodes_without_follow_up_are_refused_in_one_line(demo_world):
    pf, decisions, episodes, _ = demo_world
    with pytest.raises(UserInputError, match="needs 'followup_days' in the episodes table"):
        LookAlikeWorld.fit(decisions, pf.protocol, episodes.drop(columns="followup_days"))


def test_without_a_survival_section_nothing_changes(demo_world):
    # Appended streams: the survival part leaves every earlier draw alone, so the decisions and returns are the
    # same bytes with or without it; without a survival section the world has no follow-up model at all.
    pf, decisions, episodes, world = demo_world
    plain = pf.protocol.model_copy(update={"survival": None})
    without = LookAlikeWorld.fit(decisions, plain, episodes)
    assert without.follow_up is None and LookAlikeWorld.fit(decisions, pf.protocol).follow_up is None
    a, no_episodes, proba_a = without.simulate_records(500, seed=9)
    b, _, proba_b = world.simulate_records(500, seed=9)
    assert no_episodes is None
    assert dumps_json(a.to_dict("list")) == dumps_json(b.to_dict("list")) and np.array_equal(proba_a, proba_b)
    assert np.array_equal(without.returns("usual_care", 500, 9), world.returns_and_event_days("usual_care", 500, 9)[0])


def test_a_cohorts_episodes_pass_the_pipelines_validation_and_timeline(demo_world):
    # The pipeline's own checks: the episodes rules (whole days, one row per episode, censored follow-up reaching
    # the last decision) find nothing, and the timeline counts the table's events and losses.
    pf, _, _, world = demo_world
    decisions, episodes, proba = world.simulate_records(1500, seed=3)
    assert check_episodes(pf, episodes, "episodes.csv", decisions, set()) == []
    frame, outcomes = survival_inputs(decisions, episodes, pf.protocol)
    timeline = make_timeline(frame, outcomes, proba, HORIZON)
    follow = episodes["followup_days"].to_numpy()
    assert int(timeline.event.sum()) == int(episodes["event"].sum())
    assert int(timeline.dropout.sum()) == int(np.sum((episodes["event"].to_numpy() == 0) & (follow < HORIZON)))
    last_day = decisions.groupby("episode_id")["day"].max().to_numpy()
    assert np.all(follow[episodes["event"].to_numpy() == 0] >= last_day[episodes["event"].to_numpy() == 0])


@pytest.fixture(scope="module")
def two_cohorts():
    pf, decisions, episodes = _records(300, 17)
    p = pf.protocol
    p = p.model_copy(
        update={
            "evaluation": p.evaluation.model_copy(update={"estimators": ["wdr"]}),
            "constraints": p.constraints.model_copy(update={"pessimism": 0.0, "ensemble_size": 2}),
        }
    )
    world = LookAlikeWorld.fit(decisions, p, episodes)
    return p, [run_cohort(world, p, c, replicates=10, truth_episodes=2000) for c in range(2)], world


def test_a_cohort_records_survival_estimates_and_truths(two_cohorts):
    p, results, _ = two_cohorts
    names = {"usual_care", "learned", "partial_adoption_0.4"}
    for result in results:
        survival = result["survival"]
        assert survival["times"] == [365.0, HORIZON] and set(survival["estimates"]) == names
        for name in names:
            truth = result["truths"][name]
            assert len(truth["survival"]) == 2 and 0 <= truth["survival"][1] <= truth["survival"][0] <= 1
            # risk difference = (1 − S_strategy) − (1 − S_usual care), by hand from the stored truths
            usual = result["truths"]["usual_care"]["survival"]
            assert truth["risk_difference"] == pytest.approx([u - s for u, s in zip(usual, truth["survival"])])
        uc = survival["estimates"]["usual_care"]
        low, high = uc["survival_interval"]
        assert low[1] <= uc["survival"][1] <= high[1] and uc["survival_se"][1] > 0


def test_the_survival_part_adds_to_a_cohort_and_changes_nothing_else(two_cohorts):
    # The same cohort without the follow-up model: every value estimate, interval and truth is the same number (the
    # survival part only reads the draws and replicates the values use), and the survival keys are absent.
    p, results, world = two_cohorts
    alone = run_cohort(replace(world, follow_up=None), p, 0, replicates=10, truth_episodes=2000)
    assert "survival" not in alone
    full = {**results[0], "truths": {k: dict(v) for k, v in results[0]["truths"].items()}}
    full.pop("survival")
    for truth in full["truths"].values():
        del truth["survival"], truth["risk_difference"]
    assert dumps_json(alone) == dumps_json(full)


def test_the_summary_measures_survival_by_hand(two_cohorts):
    # Coverage and bias of usual care's survival at the horizon over the two cohorts, by hand (Morris, White &
    # Crowther 2019, Table 6: coverage = share of intervals holding the truth, MCSE √(p(1−p)/R)).
    p, results, _ = two_cohorts
    summary = summarise(results, p)["survival"]
    uc = summary["usual_care"]["all"]
    hits, errors = [], []
    for r in results:
        est = r["survival"]["estimates"]["usual_care"]
        truth = r["truths"]["usual_care"]["survival"][1]
        hits.append(est["survival_interval"][0][1] <= truth <= est["survival_interval"][1][1])
        errors.append(est["survival"][1] - truth)
    cover = sum(hits) / 2
    assert uc["coverage"] == pytest.approx(cover) and uc["bias"] == pytest.approx(sum(errors) / 2)
    assert uc["coverage_mcse"] == pytest.approx(math.sqrt(cover * (1 - cover) / 2))
    assert summary["headline"]["name"] == "partial_adoption_0.4"
    # "reliable": the cohorts whose usual-care effective sample stays above the floor (the survival diagnostics'
    # unreliable_from is None), counted by hand
    reliable = sum(r["survival"]["estimates"]["usual_care"]["reliable"] for r in results)
    assert summary["usual_care"]["cohorts_reliable"] == reliable == 2
    assert summary["usual_care"]["reliable"]["coverage"] == pytest.approx(cover)
    document = _document(p, results)
    page = selfcheck_page(document, p, [])
    assert "Survival at the horizon (730 days)" in page and "risk difference from usual care" in page
    # the report's section 6c renders the same summary (its template, with the report's filters)
    section = template_environment(p).get_template("sections/selfcheck.html").render(selfcheck=document, p=p)
    assert "Survival on the look-alike cohorts at 730 days" in section
    assert f"{100 * uc['coverage']:.1f}%" in section


def _document(p, results):
    """A selfcheck.json document around the two cohorts (settings and fit check made up; the summary computed)."""
    shares = dict.fromkeys(p.action_labels, 0.25)
    return {
        "caution": "Research use only.",
        "settings": {
            "cohorts": 2,
            "cohorts_completed": 2,
            "episodes_per_cohort": 300,
            "replicates": 10,
            "analysis_replicates": 200,
            "truth_episodes": 2000,
            "reference_episodes": 2000,
            "seed": 1,
            "seed_stream": "selfcheck (11, c)",
        },
        "summary": summarise(results, p),
        "fit_check": {
            "flagged": [],
            "smd_flag": 0.1,
            "largest_smd": 0.05,
            "action_shares": {"records": shares, "simulated": shares},
            "mean_return": {"records": 1.0, "records_se": 0.1, "simulated": 1.0, "simulated_se": 0.1},
            "decisions_per_episode": {"records": 8.0, "simulated": 8.0},
        },
    }
