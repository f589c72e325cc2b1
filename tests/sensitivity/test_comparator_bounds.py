"""Confounding bounds of the protocol's comparators (issue 15: comparators are bounded like the other regimes).

A comparator is a deterministic regime, so at Γ = 1 the marginal sensitivity model's box collapses to the
estimated weights and both bounds equal the comparator's weighted importance-sampling value (the identity of
METHODS.md; Zhao, Small & Bhattacharya 2019), here computed by the evaluation room's estimator from the
comparator's actions written out by hand: an independent code path. The bounds widen with Γ, every bootstrap
replicate records each comparator's curve, and the summary reaches the report.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest
from support.guideline import guideline_by_hand

from regimewise.bootstrap.replicates import run_replicate
from regimewise.core.features import action_codes, episode_codes
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.evaluation.ope import evaluate_off_policy
from regimewise.protocol import load_protocol
from regimewise.sensitivity.analysis import bounded_comparators, comparator_curves, comparator_sensitivity
from regimewise.sensitivity.bounds import analysis_gammas
from regimewise.usual_care.fitting import fit_usual_care

REPOSITORY = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def demo():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    protocol = pf.protocol.model_copy(update={"strategies": None, "survival": None})
    decisions = clean_decisions(pf, simulate_cohort(600, seed=5, confounding_strength=0.0).decisions)
    proba = fit_usual_care(decisions, protocol).record_proba
    return protocol, decisions, proba


def test_the_demo_bounds_its_guideline(demo):
    protocol, _, _ = demo
    assert bounded_comparators(protocol) == ("guideline",)


def test_gamma_one_bounds_equal_the_comparators_weighted_value(demo):
    protocol, decisions, proba = demo
    curve = comparator_curves(decisions, proba, protocol)["guideline"]
    target = np.eye(len(protocol.actions))[guideline_by_hand(decisions)]
    step = decisions["step"].to_numpy()
    wis = evaluate_off_policy(
        step,
        action_codes(decisions, protocol.action_labels),
        decisions["reward"].to_numpy(dtype=float),
        episode_codes(decisions),
        proba,
        target,
        horizon=protocol.horizon,
        gamma=protocol.discount,
    )["WIS"]
    gammas = analysis_gammas(protocol.sensitivity)
    assert gammas[0] == 1.0
    np.testing.assert_allclose(curve["bounded"][0], [wis.value, wis.value], atol=1e-9)
    # the box only grows with Γ: the lower bound falls and the upper bound rises (where defined)
    lower, upper = curve["bounded"][:, 0], curve["bounded"][:, 1]
    finite = np.isfinite(lower) & np.isfinite(upper)
    assert np.all(np.diff(lower[finite]) <= 1e-12) and np.all(np.diff(upper[finite]) >= -1e-12)


def test_replicates_carry_each_comparators_curve_and_the_summary_uses_them(demo):
    protocol, decisions, proba = demo
    groups = list(decisions.groupby("patient_id", sort=False).indices.values())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        replicates = [run_replicate(decisions, groups, protocol, r, len(groups)) for r in range(3)]
    entries = [r["sensitivity"] for r in replicates if "sensitivity" in r]
    assert entries and all(set(e["comparators"]) == {"guideline"} for e in entries)
    points = comparator_curves(decisions, proba, protocol)
    summary = comparator_sensitivity(points, entries, protocol, {"contrasts": []})
    (guideline,) = summary
    assert guideline["strategy"] == "guideline" and guideline["label"] == "Guideline rule"
    assert guideline["replicates_used"] == len(entries)
    assert [row["gamma"] for row in guideline["table"]] == list(protocol.sensitivity.gammas)
    assert "Guideline rule" in guideline["sentence"]
