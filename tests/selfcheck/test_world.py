"""The look-alike world of the self-check, checked against the demo simulator (an external truth here: its cohorts
are drawn from a known model that the world does not see), exact common random numbers, and hand computation."""

import json
import math
import statistics

import numpy as np
import pytest
from support.tiny import REPOSITORY, tiny_decisions, tiny_protocol_dict

from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import true_returns
from regimewise.errors import UserInputError
from regimewise.io import dumps_json
from regimewise.protocol import load_protocol
from regimewise.protocol.loading import ProtocolFile
from regimewise.protocol.model import Protocol
from regimewise.regime.learning import learn_regime
from regimewise.selfcheck.cohort import cohort_seeds, run_cohort
from regimewise.selfcheck.fitcheck import episode_returns, learned_rules, reproduction
from regimewise.selfcheck.regret import reference_regimes
from regimewise.selfcheck.world import LookAlikeWorld


@pytest.fixture(scope="module")
def demo_world():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    records = clean_decisions(pf, simulate_cohort(2000, seed=31, confounding_strength=0.0).decisions)
    return pf.protocol, records, LookAlikeWorld.fit(records, pf.protocol)


def test_world_reproduces_the_demo_cohort(demo_world):
    # The demo simulator drew these records; the world is fitted on them alone. Tolerances are ours (no source):
    # every action share within 1.5 points, every state's mean at every decision point within 0.1 of a pooled SD
    # (the common rule of thumb for a standardised difference, after Austin 2009), and the mean return within 3 SEs.
    protocol, records, world = demo_world
    simulated, proba = world.simulate(2000, seed=3)
    fit = reproduction(records, simulated, protocol)
    for action in protocol.action_labels:
        assert abs(fit["action_shares"]["records"][action] - fit["action_shares"]["simulated"][action]) < 0.015
    assert fit["flagged"] == [] and fit["largest_smd"] < 0.1
    r = fit["mean_return"]
    assert abs(r["records"] - r["simulated"]) < 3 * np.hypot(r["records_se"], r["simulated_se"])
    assert world.carried_states == ("female", "diabetes")  # never change within an episode in the records
    np.testing.assert_allclose(proba.sum(axis=1), 1.0)
    assert (
        simulated["day"].is_monotonic_increasing or (simulated.groupby("episode_id")["day"].diff().dropna() > 0).all()
    )


def test_usual_care_truth_matches_the_simulated_cohorts(demo_world):
    # Issue 19: without hidden confounding, the world's truth for usual care equals the mean return of its simulated
    # cohorts within 3 Monte Carlo SEs (20 cohorts of 500 episodes against 40,000 truth episodes).
    protocol, _, world = demo_world
    means = np.array(
        [episode_returns(world.simulate(500, seed=100 + c)[0], protocol.discount).mean() for c in range(20)]
    )
    truth = world.returns("usual_care", 40_000, seed=7)
    mcse = np.sqrt(means.var(ddof=1) / means.size + truth.var(ddof=1) / truth.size)
    assert abs(means.mean() - truth.mean()) < 3 * mcse


def test_world_truth_is_close_to_the_simulator_truth(demo_world):
    # The simulator's own usual-care value (regimewise.demo.truth, 40,000 episodes) against the world's: the world
    # keeps the 2,000 records' first states, so it carries their sampling error (about 0.24 here); 3 of those SEs.
    protocol, records, world = demo_world
    simulator = true_returns("usual_care", n=40_000, seed=5, confounding_strength=0.0).mean()
    observed = episode_returns(records, protocol.discount)
    assert abs(world.returns("usual_care", 40_000, seed=8).mean() - simulator) < 3 * observed.std() / np.sqrt(2000)


def test_simulated_returns_are_the_returns_under_usual_care(demo_world):
    # Common random numbers: the cohort simulate() draws and returns("usual_care") with the same seed are the same
    # episodes, so each episode's return agrees to rounding; a regime changes only the actions' consequences.
    protocol, _, world = demo_world
    simulated, _ = world.simulate(300, seed=11)
    np.testing.assert_allclose(world.returns("usual_care", 300, seed=11), episode_returns(simulated, 1.0), rtol=1e-12)
    hold = world.returns(lambda frame: np.zeros(len(frame), dtype=np.int64), 300, seed=11)
    assert hold.shape == (300,) and not np.allclose(hold, episode_returns(simulated, 1.0))
    np.testing.assert_array_equal(hold, world.returns(lambda frame: np.zeros(len(frame), dtype=np.int64), 300, 11))


def _tiny(n_episodes, seed=0):
    protocol = Protocol.model_validate(tiny_protocol_dict())
    frame = tiny_decisions(n_episodes, seed)
    pf = ProtocolFile(protocol=protocol, path=REPOSITORY / "config" / "protocol.yaml", sha256="0" * 64)
    return protocol, clean_decisions(pf, frame)


def test_a_changing_binary_state_is_modelled():
    protocol, records = _tiny(300)
    world = LookAlikeWorld.fit(records, protocol)
    assert world.class_states == ("flag",) and world.carried_states == ()
    simulated, _ = world.simulate(2000, seed=1)
    assert set(np.unique(simulated["flag"])) == {0.0, 1.0}
    assert abs(simulated["flag"].mean() - records["flag"].mean()) < 0.05  # iid flag with P = 0.5 in the records


def test_too_small_a_cohort_is_refused_in_one_line():
    protocol, records = _tiny(5)
    with pytest.raises(UserInputError, match=r"needs at least \d+ decisions at decision point 0") as err:
        LookAlikeWorld.fit(records, protocol)
    assert "\n" not in str(err.value)


def test_fit_check_differences_by_hand():
    # Austin 2009, Stat Med 28:3083, eq. 1: (mean_sim − mean_rec) / sqrt((s_rec² + s_sim²) / 2), sample variances
    # for a continuous state, p(1 − p) for a binary one; the fit check reads them through describe.balance.smd.
    protocol, records = _tiny(60)
    simulated, _ = LookAlikeWorld.fit(records, protocol).simulate(60, seed=2)
    fit = reproduction(records, simulated, protocol)
    rec = records.loc[records["step"] == 1, "bp"].tolist()
    sim = simulated.loc[simulated["step"] == 1, "bp"].tolist()
    expected = (statistics.mean(sim) - statistics.mean(rec)) / math.sqrt(
        (statistics.variance(rec) + statistics.variance(sim)) / 2
    )
    row = next(r for r in fit["states"] if (r["state"], r["step"]) == ("bp", 1))
    assert row["smd"] == pytest.approx(expected)
    p_rec = records.loc[records["step"] == 0, "flag"].mean()
    p_sim = simulated.loc[simulated["step"] == 0, "flag"].mean()
    flag = next(r for r in fit["states"] if (r["state"], r["step"]) == ("flag", 0))
    assert flag["smd"] == pytest.approx((p_sim - p_rec) / math.sqrt((p_rec * (1 - p_rec) + p_sim * (1 - p_sim)) / 2))
    assert {(f["state"], f["step"]) for f in fit["flagged"]} == {
        (r["state"], r["step"]) for r in fit["states"] if r["smd"] is not None and abs(r["smd"]) >= 0.1
    }


def test_a_cohort_job_reruns_alone_to_the_same_bytes():
    # Issue 19: seeds come from the protocol's root seed and the cohort's index, so cohort 1 alone and after
    # cohort 0 give the same bytes.
    protocol, records = _tiny(120)
    protocol = protocol.model_copy(
        update={"evaluation": protocol.evaluation.model_copy(update={"estimators": ["wdr"]})}
    )
    world = LookAlikeWorld.fit(records, protocol)
    alone = dumps_json(run_cohort(world, protocol, 1, replicates=20, truth_episodes=1000))
    run_cohort(world, protocol, 0, replicates=20, truth_episodes=1000)
    again = dumps_json(run_cohort(world, protocol, 1, replicates=20, truth_episodes=1000))
    assert alone == again
    result = json.loads(alone)
    assert result["seed"] == cohort_seeds(protocol, 1)[0] != cohort_seeds(protocol, 0)[0]
    assert set(result["truths"]) == {"usual_care", "learned"} and result["replicates_used"] == 20
    low, high = result["estimates"]["learned"]["wdr"]["value_interval"]
    assert math.isfinite(low) and math.isfinite(high) and low < high


def test_the_reference_rule_beats_usual_care_and_small_cohorts_rules(demo_world):
    # The regret's reference (the protocol's learner on many simulated episodes) should be better than usual care in
    # the world fitted to the demo simulator's records (whose learned regime has a real benefit), and at least as
    # good as rules learned from 400-episode cohorts of the same world, within 3 paired Monte Carlo SEs (our
    # tolerance, no source). Paired: every policy is rolled out on the same draws (common random numbers).
    protocol, _, world = demo_world
    reference, half = reference_regimes(world, protocol, 20_000)
    usual = world.returns("usual_care", 20_000, seed=11)
    best = world.returns(reference, 20_000, seed=11)
    gain = best - usual
    assert gain.mean() > 3 * gain.std(ddof=1) / math.sqrt(gain.size)
    for seed in (1, 2, 3):
        small = learn_regime(world.simulate(400, seed=seed)[0], protocol)
        shortfall = best - world.returns(small, 20_000, seed=11)
        assert shortfall.mean() > -3 * shortfall.std(ddof=1) / math.sqrt(shortfall.size)
    settled = best - world.returns(half, 20_000, seed=11)
    assert abs(settled.mean()) < 0.25 * gain.mean()  # the half-size reference is close (our tolerance)


def test_the_learned_rules_of_the_records_and_a_simulated_cohort(demo_world):
    # Hand computation: the share of decisions where the rule learned on all of a cohort's decisions recommends the
    # action usual care took, and the recommended actions' shares; flagged at a difference of 10 points (ours).
    protocol, records, world = demo_world
    simulated, _ = world.simulate(2000, seed=3)
    rules = learned_rules(records, simulated, protocol)
    for which, frame in (("records", records), ("simulated", simulated)):
        recommended = learn_regime(frame, protocol).recommend(frame)
        taken = np.array([protocol.action_labels.index(a) for a in frame["action"]])
        assert rules[which]["agreement"] == pytest.approx(np.mean(recommended == taken))
        shares = rules[which]["recommended_shares"]
        assert sum(shares.values()) == pytest.approx(1.0)
        assert shares[protocol.action_labels[0]] == pytest.approx(np.mean(recommended == 0))
    gap = rules["simulated"]["agreement"] - rules["records"]["agreement"]
    assert rules["agreement_difference"] == pytest.approx(gap) and rules["flagged"] == (abs(gap) >= 0.1)
    no_regime = protocol.model_copy(update={"analysis": protocol.analysis.model_copy(update={"learn_regime": False})})
    assert learned_rules(records, simulated, no_regime) is None
