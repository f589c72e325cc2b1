"""reward.better: lower learns the regime of the negated reward and reports in the reward's own units.

Source of truth: the identity argmax_a Q_r(s, a) = argmax_a −Q_{−r}(s, a) — least squares is linear in its target,
so the Q-models of the negated reward are the negated Q-models — and the definition of the value as the expected
sum of rewards (the value of −r is minus the value of r for every regime and estimator).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from support.tiny import REPOSITORY

from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.evaluation.values import evaluate_all
from regimewise.protocol import load_protocol
from regimewise.regime.learning import learn_regime
from regimewise.report.summary import headline_sentence


@pytest.fixture(scope="module")
def mirrored():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    higher = pf.protocol.model_copy(
        update={
            "strategies": None,
            "constraints": pf.protocol.constraints.model_copy(update={"pessimism": 0.0}),
            # dr first: the headline estimator, defined even when no episode follows the regime throughout
            "evaluation": pf.protocol.evaluation.model_copy(update={"estimators": ["dr", "pdwis", "fqe"]}),
        }
    )
    lower = higher.model_copy(update={"reward": higher.reward.model_copy(update={"better": "lower"})})
    decisions = clean_decisions(pf, simulate_cohort(300, seed=8, confounding_strength=0.0).decisions)
    negated = decisions.assign(reward=-decisions["reward"])
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name, protocol, frame in (("higher", higher, decisions), ("lower", lower, negated)):
            learned = learn_regime(frame, protocol)
            proba = learned.usual_care.predict_proba(frame)
            recommended = learned.recommend(frame, proba)
            values = evaluate_all(frame, proba, recommended, protocol)
            out[name] = (protocol, learned.q_values(frame), recommended, values)
    return out


def test_lower_is_better_learns_the_mirror_regime_of_the_negated_reward(mirrored):
    _, q_high, rec_high, _ = mirrored["higher"]
    _, q_low, rec_low, _ = mirrored["lower"]
    np.testing.assert_array_equal(rec_low, rec_high)
    np.testing.assert_allclose(q_low, q_high, rtol=1e-9, atol=1e-9)  # Q of −(−r) = Q of r


def test_values_and_contrasts_stay_in_the_rewards_own_units(mirrored):
    values_high, values_low = mirrored["higher"][3], mirrored["lower"][3]
    for r_high, r_low in zip(values_high["regimes"], values_low["regimes"]):
        for est, e in r_high["estimates"].items():
            if e["value"] is not None:
                assert r_low["estimates"][est]["value"] == pytest.approx(-e["value"], abs=1e-8), (r_high["name"], est)
    for c_high, c_low in zip(values_high["contrasts"], values_low["contrasts"]):
        if c_high["difference"] is None:  # undefined (no episode follows the regime) either way
            assert c_low["difference"] is None
        else:
            assert c_low["difference"] == pytest.approx(-c_high["difference"], abs=1e-8)


def test_the_sentence_says_lower_is_better_and_which_way_the_difference_goes(mirrored):
    protocol, _, _, values = mirrored["lower"]
    sentence = headline_sentence(protocol, values)
    difference = next(c for c in values["contrasts"] if c["regime"] == "learned" and c["estimator"] == "dr")
    expected = "a benefit" if difference["difference"] < 0 else "a harm"
    assert f"(lower is better: {expected})" in sentence
    assert "lower is better" not in headline_sentence(mirrored["higher"][0], mirrored["higher"][3])
