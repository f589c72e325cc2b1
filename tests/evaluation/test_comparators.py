"""Comparator strategies named in the protocol (a guideline rule): actions, values, intervals and load-time checks.

Sources of truth: the demo simulator's Monte Carlo value of the same rule written out independently in numpy
(regimewise.demo.truth.true_value, common random numbers; 100,000 episodes), exact policy evaluation by backward
induction on the small Markov decision process of tests/support/small_mdp.py (Puterman 1994, ch. 4, from memory),
and the comparator's definition (first applying rule decides, otherwise the default action).
"""

from __future__ import annotations

import copy
import warnings

import numpy as np
import pandas as pd
import pytest
import yaml
from support import small_mdp as sm
from support.guideline import guideline_by_hand
from support.tiny import REPOSITORY

from regimewise.bootstrap.intervals import combine
from regimewise.bootstrap.replicates import fit_replicate, run_shard
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import true_value
from regimewise.errors import ProtocolError
from regimewise.evaluation.values import evaluate_all, regime_targets
from regimewise.protocol import load_protocol
from regimewise.protocol.model import Protocol

ALL = ["is", "wis", "pdis", "pdwis", "dr", "wdr", "fqe"]
DEMO = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def demo():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    spec = pf.protocol.evaluation.model_copy(update={"estimators": ALL, "replicates": 30, "shards": 1})
    protocol = pf.protocol.model_copy(update={"evaluation": spec, "strategies": None, "survival": None})
    decisions = clean_decisions(pf, simulate_cohort(1000, seed=3, confounding_strength=0.0).decisions)
    return protocol, decisions


def test_the_guideline_takes_the_actions_of_the_rule_written_out(demo):
    protocol, decisions = demo
    proba = np.full((len(decisions), 4), 0.25)
    targets = {t["name"]: t for t in regime_targets(decisions, proba, np.zeros(len(decisions), int), protocol)}
    chosen = targets["guideline"]["target"].argmax(axis=1)
    np.testing.assert_array_equal(chosen, guideline_by_hand(decisions))
    assert set(np.unique(chosen)) == {0, 1, 2}  # every rule and the default decide somewhere
    # placed after the fixed strategies, as one more deterministic regime
    assert list(targets)[-1] == "guideline" and "always_add_agent" in targets


@pytest.fixture(scope="module")
def evaluated(demo):
    """The demo cohort's point estimates and one shard of 30 bootstrap replicates."""
    protocol, decisions = demo
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        proba, recommended, q, folds = fit_replicate(decisions, protocol)
        point = evaluate_all(decisions, proba, recommended, protocol, learned_folds=folds, learned_q=q)
        return point, run_shard(decisions, protocol, 0)


def test_the_guideline_is_valued_by_every_estimator_and_its_true_value_lies_in_the_intervals(demo, evaluated):
    protocol, _ = demo
    point, shard = evaluated
    intervals = combine(point, [shard], protocol)
    guideline = next(r for r in point["regimes"] if r["name"] == "guideline")
    assert guideline["comparator"] is True and "step up when systolic blood pressure > 140 mmHg" in guideline["words"]
    assert set(guideline["estimates"]) == set(ALL)
    for est, e in guideline["estimates"].items():
        assert np.isfinite(e["value"]) and e["verdict"] in ("supported", "model projection"), est
        assert e["n_following"] is not None  # deterministic: episodes following it throughout are counted
    # the simulator's truth for the same rule (confounding strength 0, as the cohort)
    truth = true_value(guideline_by_hand, n=100_000, seed=1, confounding_strength=0.0)
    # One fixed cohort (seed 3) and 30 replicates: coverage over many cohorts is not what this checks. The
    # weighting-only estimators rest on an effective sample of about 4 episodes (every estimate is flagged a
    # model projection) and are not expected to cover; the outcome-model estimators are.
    for est in ("dr", "wdr", "fqe"):
        limits = intervals["values"]["guideline"][est]
        assert limits["low"] <= truth.value <= limits["high"], (est, limits, truth)
    pairs = {(c["regime"], c["versus"]) for c in intervals["contrasts"]}
    assert ("guideline", "usual_care") in pairs and ("learned", "guideline") in pairs


def test_contrasts_are_taken_against_the_protocols_reference(demo, evaluated):
    # source: the definition of a contrast, regime minus reference, within each replicate
    protocol, _ = demo
    point, shard = evaluated
    spec = protocol.evaluation.model_copy(update={"reference": "guideline"})
    intervals = combine(point, [shard], protocol.model_copy(update={"evaluation": spec}))
    assert intervals["reference"] == "guideline"
    values = {r["name"]: r["estimates"] for r in point["regimes"]}
    against = [c for c in intervals["contrasts"] if "guideline" in (c["regime"], c["versus"])]
    assert {c["regime"] for c in against} == set(values) - {"guideline"}  # every other regime, usual care too
    for c in against:
        assert c["versus"] == "guideline"
        mine, theirs = values[c["regime"]][c["estimator"]]["value"], values["guideline"][c["estimator"]]["value"]
        if c["difference"] is not None:
            assert c["difference"] == pytest.approx(mine - theirs, abs=1e-12)
    # by default usual care is the reference: it is never first
    default = combine(point, [shard], protocol)
    assert default["reference"] == "usual_care"
    assert all(c["regime"] != "usual_care" for c in default["contrasts"])


def test_a_reference_that_is_not_a_regime_is_refused(tmp_path):
    content = copy.deepcopy(DEMO)
    content["data"].update(root=".", decisions="decisions.csv", episodes="episodes.csv")
    content["evaluation"]["reference"] = "guidline"
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(content), encoding="utf-8")
    with pytest.raises(ProtocolError, match="evaluation.reference: 'guidline' is not a regime of this protocol"):
        load_protocol(path)


# ---------------------------------------------------------------------------------------------- small MDP
def _mdp_protocol(comparator: dict) -> Protocol:
    return Protocol.model_validate(
        {
            "study": {"title": "Small MDP", "question": "Exact values?", "version": "1", "run_name": "mdp"},
            "data": {"decisions": "decisions.csv"},
            "states": [{"name": "s", "label": "State", "kind": "integer", "plausible_range": [0, 2]}],
            "actions": [{"label": f"a{k}", "description": f"action {k}"} for k in range(3)],
            "reward": {"description": "table reward plus noise"},
            "horizon": sm.HORIZON,
            "seed": 1,
            "comparators": [comparator],
        }
    )


def test_a_rule_based_comparator_recovers_the_exact_value_of_the_small_mdp():
    # s = 2 -> a0; else s >= 1 -> a2; otherwise (s = 0) a1: the deterministic policy (1, 2, 0) at every step
    rules = [
        {"when": [{"state": "s", "comparison": "in", "values": [2]}], "action": "a0"},
        {"when": [{"state": "s", "comparison": "at_least", "value": 1}], "action": "a2"},
    ]
    protocol = _mdp_protocol({"name": "rule", "label": "Rule", "rules": rules, "otherwise": "a1"})
    mdp = sm.make_mdp()
    policy = sm.deterministic_proba(np.tile([1, 2, 0], (sm.HORIZON, 1)))
    _, v = sm.evaluate_policy(mdp.transition, mdp.reward_mean, policy)
    exact = float(mdp.initial @ v[0])
    sample = sm.sample_episodes(mdp, 20_000, seed=11)
    frame = pd.DataFrame({"s": sample["state"]})
    targets = regime_targets(frame, sample["behaviour_proba"], np.zeros(len(frame), int), protocol)
    target = next(t["target"] for t in targets if t["name"] == "rule")
    np.testing.assert_array_equal(target, sm.rows_proba(policy, sample))  # the comparator is that policy
    estimates, fqe_value = sm.off_policy_estimates(sample, policy)
    # within 4 standard errors; the self-normalised PDWIS and WDR report none, so their unnormalised twin's
    # (PDIS, DR) stands in (common practice, no source)
    twin = {"PDWIS": "PDIS", "WDR": "DR"}
    for name, est in estimates.items():
        assert est.value == pytest.approx(exact, abs=4 * estimates[twin.get(name, name)].se), name
    assert fqe_value == pytest.approx(exact, abs=0.05)


# ---------------------------------------------------------------------------------------------- load-time checks
def _with(change) -> dict:
    d = copy.deepcopy(DEMO)
    change(d["comparators"][0])
    return d


_SBP_BELOW_100 = {"state": "sbp", "comparison": "below", "value": 100}
_LEVEL_ABOVE_2 = {"state": "therapy_level", "comparison": "above", "value": 2}
BAD = {
    "unknown action": (
        _with(lambda c: c["rules"][0].update(action="step_upp")),
        "comparators[0].rules[0].action: 'step_upp' is not a declared action",
    ),
    "unknown default action": (
        _with(lambda c: c.update(otherwise="hod")),
        "comparators[0].otherwise: 'hod' is not a declared action",
    ),
    "unknown state": (
        _with(lambda c: c["rules"][1]["when"][0].update(state="sbpp")),
        "comparators[0].rules[1].when[0].state: 'sbpp' is not a declared state",
    ),
    "escalation with low eGFR": (
        _with(lambda c: c["rules"][0]["when"].pop(2)),
        "comparators[0].rules[0]: prescribes step_up where clinical rule 'no_escalation_low_egfr' forbids it",
    ),
    "step down by default at level 0": (
        _with(lambda c: c.update(otherwise="step_down")),
        "comparators[0].otherwise: prescribes step_down where clinical rule 'no_step_down_at_lowest_level'",
    ),
    "rule covered by an earlier rule": (  # sbp < 100 at level 3 or 4: the step_down rule already decides there
        _with(lambda c: c["rules"].append({"action": "hold", "when": [_SBP_BELOW_100, _LEVEL_ABOVE_2]})),
        "comparators[0].rules[2]: never applies",
    ),
    "built-in name": (_with(lambda c: c.update(name="always_hold")), "comparators[0].name: 'always_hold'"),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_a_comparator_that_does_not_fit_the_protocol_is_refused_in_one_line(tmp_path, case):
    content, expected = BAD[case]
    content["data"].update(root=".", decisions="decisions.csv", episodes="episodes.csv")
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(content), encoding="utf-8")
    with pytest.raises(ProtocolError) as info:
        load_protocol(path)
    assert "\n" not in str(info.value) and expected in str(info.value), str(info.value)
