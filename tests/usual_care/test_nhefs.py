"""NHEFS worked example: IP weighting for the effect of quitting smoking on weight gain.

Source of every reference value: Hernán & Robins, Causal Inference: What If (2020), chapter 12, Programs 12.2-12.4,
with the values to three or four decimals recorded in the design notes' METHODS.md ("Usual-care models, overlap and
balance"); the book's text prints 3.4 (95% CI 2.4 to 4.5).
"""

import causaldata  # in the test extra: a missing install must fail, not skip
import numpy as np
import pytest
from support.nhefs import propensity_design

from regimewise.core.weighting import (
    inverse_probability_weights,
    ipw_mean_difference,
    marginal_probability_of_taken,
    stabilised_weights,
    weight_summary,
)
from regimewise.protocol import BehaviourModelSpec
from regimewise.usual_care.crossfit import apply_probability_floor
from regimewise.usual_care.logit import MultinomialLogitBehaviour
from regimewise.usual_care.metrics import probability_of_taken


@pytest.fixture(scope="module")
def nhefs():
    data = causaldata.nhefs.load_pandas().data
    return data[data["wt82_71"].notna()].reset_index(drop=True)


@pytest.fixture(scope="module")
def propensity(nhefs):
    """Our usual-care model (K = 2) fitted to qsmk; returns (action, probability of the action taken)."""
    design = propensity_design(nhefs)
    action = nhefs["qsmk"].to_numpy().astype(int)
    model = MultinomialLogitBehaviour().fit(design, action, n_actions=2)
    assert model.converged_
    return action, probability_of_taken(model.predict_proba(design), action)


def test_cohort_is_the_1566_uncensored(nhefs):
    # What If ch. 12: 1566 individuals with a weight measurement in 1982.
    assert len(nhefs) == 1566


def test_stabilised_weights_match_what_if_program_12_3(propensity):
    action, proba_taken = propensity
    summary = weight_summary(stabilised_weights(proba_taken, marginal_probability_of_taken(action, 2)))
    # What If ch. 12, Program 12.3 (values via METHODS.md): mean 0.999, range 0.331 to 4.298.
    assert summary["mean"] == pytest.approx(0.999, abs=5e-4)
    assert summary["min"] == pytest.approx(0.331, abs=5e-4)
    assert summary["max"] == pytest.approx(4.298, abs=5e-4)


def test_unstabilised_weights_match_what_if_section_12_2(propensity):
    _, proba_taken = propensity
    summary = weight_summary(inverse_probability_weights(proba_taken))
    # What If section 12.2 text: IP weights mean 2.00, range 1.05 to 16.7 (values from memory: loose tolerance).
    assert summary["mean"] == pytest.approx(2.00, abs=0.01)
    assert summary["min"] == pytest.approx(1.05, abs=0.01)
    assert summary["max"] == pytest.approx(16.7, abs=0.05)


def test_ip_weighted_effect_matches_what_if_program_12_3(nhefs, propensity):
    action, proba_taken = propensity
    weights = stabilised_weights(proba_taken, marginal_probability_of_taken(action, 2))
    outcome = nhefs["wt82_71"].to_numpy()
    result = ipw_mean_difference(outcome, action, weights, cluster=nhefs["seqn"].to_numpy())
    # What If ch. 12, Program 12.3, geeglm with id = seqn (values via METHODS.md): 3.4405, 95% CI 2.411 to 4.470.
    assert result.estimate == pytest.approx(3.4405, abs=1e-3)
    assert result.conf_int[0] == pytest.approx(2.411, abs=1e-3)
    assert result.conf_int[1] == pytest.approx(4.470, abs=1e-3)
    # One row per person: clustering on seqn must equal the row-level sandwich (Liang & Zeger 1986, clusters of 1).
    unclustered = ipw_mean_difference(outcome, action, weights)
    assert unclustered.se == pytest.approx(result.se, rel=1e-12)
    assert result.n_clusters == 1566


def test_default_probability_floor_leaves_the_what_if_weights_unchanged(nhefs):
    design = propensity_design(nhefs)
    action = nhefs["qsmk"].to_numpy().astype(int)
    proba = MultinomialLogitBehaviour().fit(design, action, n_actions=2).predict_proba(design)
    floored = apply_probability_floor(proba, BehaviourModelSpec().probability_floor)
    weights = stabilised_weights(probability_of_taken(floored, action), marginal_probability_of_taken(action, 2))
    # What If ch. 12, Program 12.3 (values via METHODS.md): every propensity lies far above the default floor,
    # so the stabilised weights keep mean 0.999 and range 0.331 to 4.298.
    np.testing.assert_array_equal(floored, proba)
    summary = weight_summary(weights)
    assert (summary["mean"], summary["min"], summary["max"]) == pytest.approx((0.999, 0.331, 4.298), abs=5e-4)
