"""Per-decision-point diagnostics checked against scikit-learn, numpy and exact hand values."""

import json

import numpy as np
import pytest
import statsmodels.api as sm
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss, roc_auc_score

from regimewise.core.weighting import kish_ess, truncate_weights
from regimewise.report.figures import overlap_figure, reliability_figure
from regimewise.usual_care.diagnostics import (
    CRUMP_CUT,
    behaviour_diagnostics_by_step,
    overlap_by_step,
    overlap_verdict,
)
from regimewise.usual_care.logit import MultinomialLogitBehaviour
from regimewise.usual_care.metrics import brier_score, reliability_curve

LABELS = tuple(f"pid{k}" for k in range(7))


@pytest.fixture(scope="module")
def anes():
    """statsmodels' shipped anes96 data: party identification (7 categories) and a fitted multinomial logit."""
    data = sm.datasets.anes96.load_pandas().data
    X = data[["logpopul", "selfLR", "age", "educ", "income"]].astype(float)
    pid = data["PID"].to_numpy().astype(int)
    proba = MultinomialLogitBehaviour().fit(X, pid, n_actions=7).predict_proba(X)
    steps = np.arange(pid.size) % 3  # three pseudo decision points
    return pid, proba, steps


def test_brier_equals_sklearn_multiclass(anes):
    pid, proba, _ = anes
    # Reference: scikit-learn's brier_score_loss for several classes (mean over rows of the summed squares).
    expected = brier_score_loss(pid, proba, labels=list(range(7)))
    assert brier_score(pid, proba, 7) == pytest.approx(expected, rel=1e-12)


def test_brier_binary_is_twice_the_one_column_form():
    y = np.array([0, 1, 1, 0, 1])
    p1 = np.array([0.2, 0.7, 0.9, 0.4, 0.5])
    # Reference: scikit-learn's binary brier_score_loss is mean (p1 - y)^2; the two-column sum is twice that.
    expected = 2 * brier_score_loss(y, p1)
    assert brier_score(y, np.column_stack([1 - p1, p1]), 2) == pytest.approx(expected, rel=1e-12)


def test_reliability_curve_equals_sklearn_calibration_curve(anes):
    pid, proba, _ = anes
    for k in (0, 3, 6):
        curve = reliability_curve(pid == k, proba[:, k], n_bins=10)
        # Reference: scikit-learn calibration_curve(strategy="uniform"), empty bins dropped.
        observed, predicted = calibration_curve(pid == k, proba[:, k], n_bins=10, strategy="uniform")
        np.testing.assert_allclose(curve["observed"], observed, rtol=1e-12)
        np.testing.assert_allclose(curve["mean_predicted"], predicted, rtol=1e-12)
        assert sum(curve["count"]) == pid.size


def test_truncation_at_percentiles_hand_values():
    weights = np.arange(1.0, 102.0)  # 1..101: the 1st and 99th type-7 percentiles are 2 and 100 exactly
    truncated, bounds = truncate_weights(weights, (1, 99))
    assert bounds == (2.0, 100.0)
    # Exact: Cole & Hernán (2008) truncation replaces weights beyond the percentiles by the percentile values.
    np.testing.assert_array_equal(truncated, np.r_[2.0, np.arange(2.0, 101.0), 100.0])
    np.testing.assert_array_equal(truncate_weights(weights, (0, 100))[0], weights)


def test_verdicts_follow_the_stated_rule():
    # Exact cases constructed by hand for each branch of the rule in overlap.VERDICT_RULE.
    fine = np.full(100, 0.5)
    assert overlap_verdict(fine, fine, 0.05).verdict == "adequate"
    thin = fine.copy()
    thin[:11] = 0.08  # 11% below 0.1, none below the support threshold
    assert overlap_verdict(thin, fine, 0.05).verdict == "thin"
    assert overlap_verdict(fine, thin, 0.05).verdict == "thin"
    violated = fine.copy()
    violated[:2] = 0.01  # 2% of recommended actions below the support threshold
    result = overlap_verdict(fine, violated, 0.05)
    assert result.verdict == "violated"
    assert result.share_recommended_below_support == pytest.approx(0.02)
    assert "Crump" in result.rule and "no source" in result.rule
    assert CRUMP_CUT == 0.1  # Crump et al. (2009), Biometrika 96:187: keep propensities within [0.1, 0.9]


def test_diagnostics_by_step_match_references(anes):
    pid, proba, steps = anes
    out = behaviour_diagnostics_by_step(steps, pid, proba, LABELS, 0.05, (1, 99))
    json.dumps(out)
    for step in range(3):
        rows = steps == step
        d = out["by_step"][str(step)]
        taken = proba[rows, pid[rows]]
        # Reference: scikit-learn roc_auc_score (one-vs-rest macro) and Kish's ESS of 1/p computed here.
        assert d["auc"] == pytest.approx(roc_auc_score(pid[rows], proba[rows], multi_class="ovr"), abs=1e-12)
        assert d["weights"]["before_truncation"]["ess"] == pytest.approx(kish_ess(1 / taken), rel=1e-12)
        low, high = np.percentile(1 / taken, [1, 99])
        assert d["weights"]["after_truncation"]["max"] == pytest.approx(high, rel=1e-12)
        assert d["weights"]["after_truncation"]["min"] == pytest.approx(low, rel=1e-12)
        assert d["share_taken_below_support"] == pytest.approx(np.mean(taken < 0.05))
        assert sum(d["taken_probability"]["histogram"]) == rows.sum()
    assert out["overall"]["decisions"] == pid.size


def test_overlap_by_step_and_figures_are_deterministic(anes):
    pid, proba, steps = anes
    recommended = proba.argmax(axis=1)
    overlap = overlap_by_step(steps, pid, recommended, proba, 0.05)
    rows = steps == 1
    # Exact: the probability of the recommended (most likely) action is each row's maximum.
    assert overlap["1"]["recommended_probability"]["quantiles"]["median"] == pytest.approx(
        np.median(proba[rows].max(axis=1))
    )
    diagnostics = behaviour_diagnostics_by_step(steps, pid, proba, LABELS, 0.05, (1, 99))
    first = reliability_figure(diagnostics["by_step"], LABELS) + overlap_figure(overlap)
    second = reliability_figure(diagnostics["by_step"], LABELS) + overlap_figure(overlap)
    assert first.startswith("<svg") and first == second  # byte-reproducible figures
