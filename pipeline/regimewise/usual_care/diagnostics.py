"""Diagnostics of the usual-care model at every decision point: calibration, overlap, weights.

Each decision point gets the multi-class AUC and Brier score, reliability curves, the distribution of the
probability of the action taken and of the action the learned regime recommends, the share of decisions below
the support threshold, weight summaries before and after truncation at the protocol's percentiles, the Kish
effective sample size, and a plain-language overlap verdict with the rule that produced it.

References
----------
Brier (1950), Verification of forecasts expressed in terms of probability, Monthly Weather Review 78:1.
Niculescu-Mizil & Caruana (2005), Predicting good probabilities with supervised learning, ICML (reliability).
Cole & Hernán (2008), Constructing inverse probability weights for marginal structural models, Am J Epidemiol
168:656 (truncation at percentiles). Crump, Hotz, Imbens & Mitnik (2009), Dealing with limited overlap in
estimation of average treatment effects, Biometrika 96:187 (the 0.1-0.9 trimming rule).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from regimewise.core.features import action_codes
from regimewise.core.weighting import (
    inverse_probability_weights,
    truncate_weights,
    weight_summary,
)
from regimewise.usual_care.metrics import (
    auc_of_class_scores,
    brier_score,
    merged_class_scores,
    probability_of_taken,
    reliability_curve,
    sorted_class_scores,
)

# Overlap verdict thresholds. CRUMP_CUT after Crump et al. (2009), who keep propensities within [0.1, 0.9]
# (common practice); the shares are our own choice (no source).
CRUMP_CUT = 0.1


THIN_SHARE = 0.10


VIOLATED_SHARE = 0.01


VERDICT_RULE = (
    "violated: more than 1% of decisions have a recommended action whose estimated usual-care probability is "
    "below the support threshold (no source); thin: otherwise, more than 10% of decisions have the recommended "
    "or the taken action below probability 0.1 (the 0.1 cut follows the 0.1-0.9 trimming rule of Crump et al. "
    "2009, common practice; the 10% share has no source); adequate: otherwise."
)


def probability_summary(values, bins=20):
    """Quantiles and a histogram on [0, 1] of a set of probabilities (for overlap plots)."""
    v = np.asarray(values, dtype=float)
    q = np.quantile(v, [0.0, 0.01, 0.05, 0.25, 0.5, 0.75, 1.0])
    counts, _ = np.histogram(v, bins=bins, range=(0.0, 1.0))
    return {
        "quantiles": dict(zip(("min", "p01", "p05", "p25", "median", "p75", "max"), map(float, q))),
        "histogram": counts.astype(int).tolist(),
    }


@dataclass(frozen=True)
class OverlapVerdict:
    """Plain-language overlap verdict at one decision point, with the shares it rests on and its rule."""

    verdict: str
    share_recommended_below_support: float
    share_recommended_below_cut: float
    share_taken_below_cut: float
    rule: str = VERDICT_RULE

    def to_dict(self) -> dict:
        return asdict(self)


def overlap_verdict(p_taken, p_recommended, support_threshold):
    """Classify overlap as adequate, thin or violated by the rule in :data:`VERDICT_RULE`.

    Examples
    --------
    >>> overlap_verdict([0.5, 0.6], [0.5, 0.7], 0.05).verdict
    'adequate'
    >>> overlap_verdict([0.5, 0.6], [0.01, 0.7], 0.05).verdict
    'violated'
    """
    taken = np.asarray(p_taken, dtype=float)
    recommended = np.asarray(p_recommended, dtype=float)
    below_support = float(np.mean(recommended < support_threshold))
    rec_cut = float(np.mean(recommended < CRUMP_CUT))
    taken_cut = float(np.mean(taken < CRUMP_CUT))
    if below_support > VIOLATED_SHARE:
        verdict = "violated"
    elif max(rec_cut, taken_cut) > THIN_SHARE:
        verdict = "thin"
    else:
        verdict = "adequate"
    return OverlapVerdict(verdict, below_support, rec_cut, taken_cut)


def _weights_block(taken, percentiles):
    weights = inverse_probability_weights(taken)
    truncated, bounds = truncate_weights(weights, percentiles)
    return {
        "before_truncation": weight_summary(weights),
        "after_truncation": weight_summary(truncated),
        "truncation_bounds": list(bounds),
        "truncation_percentiles": list(percentiles),
    }


def _calibration_block(codes, proba, n_actions, labels, scores):
    """``scores``: the block's :func:`sorted_class_scores` (the AUC's sorted pieces; they say which actions occur)."""
    present = sum(pos.size > 0 for pos, _ in scores)
    return {
        "decisions": int(codes.size),
        "auc": auc_of_class_scores(scores) if present > 1 else None,
        "brier": brier_score(codes, proba, n_actions),
        "reliability": {label: reliability_curve(codes == k, proba[:, k]) for k, label in enumerate(labels)},
    }


def behaviour_diagnostics_by_step(steps, codes, proba, labels, support_threshold, percentiles):
    """Calibration and weight diagnostics overall and at every decision point.

    Parameters
    ----------
    steps, codes : array_like of int, shape (n,)
        Decision index and action code taken.
    proba : ndarray, shape (n, K)
        Usual-care probabilities (cross-fitted for the records).
    labels : sequence of str
        Action labels in code order.
    support_threshold : float
    percentiles : (float, float)
        Truncation percentiles for the weights.

    Returns
    -------
    dict
        ``overall`` and ``by_step`` (keys are step numbers as strings), each with ``decisions``, ``auc``,
        ``brier``, ``reliability`` (per action), ``taken_probability`` (quantiles and histogram),
        ``share_taken_below_support`` and ``weights`` (before and after truncation, with ESS).
    """
    steps = np.asarray(steps)
    codes = np.asarray(codes)
    taken = probability_of_taken(proba, codes)
    n_actions = len(labels)

    def block(rows, scores):
        return {
            **_calibration_block(codes[rows], proba[rows], n_actions, labels, scores),
            "taken_probability": probability_summary(taken[rows]),
            "share_taken_below_support": float(np.mean(taken[rows] < support_threshold)),
            "weights": _weights_block(taken[rows], percentiles),
        }

    step_rows = {t: np.flatnonzero(steps == t) for t in np.unique(steps)}
    # each step's scores sorted once; the whole cohort's AUC merges them (merged_class_scores), not sorting again
    step_scores = {t: sorted_class_scores(codes[rows], proba[rows], n_actions) for t, rows in step_rows.items()}
    by_step = {str(int(t)): block(rows, step_scores[t]) for t, rows in step_rows.items()}
    overall = merged_class_scores(list(step_scores.values()), n_actions)
    return {"overall": block(np.arange(steps.size), overall), "by_step": by_step}


def overlap_by_step(steps, codes, recommended, proba, support_threshold):
    """Distribution of the probability of the taken and of the recommended action, and the verdict, per step."""
    steps = np.asarray(steps)
    taken = probability_of_taken(proba, codes)
    rec = probability_of_taken(proba, recommended)
    out = {}
    for t in np.unique(steps):
        rows = steps == t
        out[str(int(t))] = {
            "decisions": int(rows.sum()),
            "taken_probability": probability_summary(taken[rows]),
            "recommended_probability": probability_summary(rec[rows]),
            **overlap_verdict(taken[rows], rec[rows], support_threshold).to_dict(),
        }
    return out


# ---------------------------------------------------------------------------------------------- behaviour.json
def model_block(protocol, usual_care) -> dict:
    """behaviour.json's ``model``: the model's kind, covariates, scaler, fit and floor-mixture facts."""
    fitted = usual_care.model
    block = {
        "kind": protocol.behaviour_model.kind,
        "covariates": usual_care.design.names,
        "spline_states": list(protocol.behaviour_model.spline_states),
        "scaler": usual_care.scaler.to_dict(),
        "floor_mixture": None,
    }
    if hasattr(fitted, "params_"):
        block.update(
            converged=bool(fitted.converged_),
            log_likelihood=float(fitted.llf_),
            params=np.asarray(fitted.params_).tolist(),
        )
        if hasattr(fitted, "share_"):
            block["floor_mixture"] = {
                "share": float(fitted.share_),
                "floor": float(fitted.floor_),
                "plain_logit_log_likelihood": float(fitted.logit_llf_),
                "likelihood_ratio": float(fitted.lr_statistic_),
                "p_value": float(fitted.p_value_),
                "test": "likelihood ratio of share 0 on the boundary: 1/2 chi2(0) + 1/2 chi2(1) (Self & Liang 1987)",
            }
    else:
        block.update(converged=None, boosting_rounds=int(fitted.max_iter))
    return block


def usual_care_diagnostics(protocol, frame, usual_care) -> dict:
    """Everything behaviour.json reports: the model, cross-fitting, the floor, and per-step diagnostics.

    Diagnostics use the records' cross-fitted (out-of-fold) probabilities, so calibration and discrimination
    are not flattered by predicting the data a model was fitted on.
    """
    return diagnostics_document(
        protocol, frame, usual_care.record_proba, usual_care.floor, usual_care.folds, model_block(protocol, usual_care)
    )


def diagnostics_document(protocol, frame, proba, floor, folds, model) -> dict:
    """behaviour.json from the records (``frame``), their probabilities under the usual-care model (``proba``,
    (n, K), raised to ``floor``), the cross-fitting's fold of each decision and the model's :func:`model_block`.

    The workflow fits the model in one job and writes this document in another, from the probabilities it wrote
    and the model's block (:func:`regimewise.workflow.stages.behaviour_diagnostics_stage`)."""
    spec = protocol.behaviour_model
    labels = protocol.action_labels
    codes = action_codes(frame, labels)
    at_floor = proba == floor if floor > 0 else np.zeros(proba.shape, dtype=bool)
    diagnostics = behaviour_diagnostics_by_step(
        frame["step"].to_numpy(),
        codes,
        proba,
        labels,
        protocol.constraints.support_threshold,
        spec.truncation_percentiles,
    )
    overall = diagnostics["overall"]
    patients = frame.groupby(folds)["patient_id"].nunique()
    return {
        "model": model,
        "decisions": int(len(frame)),
        "auc": overall["auc"],
        "auc_method": "one-vs-rest macro average, "
        + ("out-of-fold probabilities" if spec.folds >= 2 else "in-sample probabilities"),
        "brier": overall["brier"],
        "cross_fitting": {
            "folds": spec.folds,
            "split": "by patient",
            "patients_per_fold": [int(v) for v in patients.to_numpy()],
        },
        "probability_floor": {
            "floor": floor,
            "entries_raised": int(at_floor.sum()),
            "decisions_with_taken_action_raised": int(at_floor[np.arange(codes.size), codes].sum()),
        },
        "inverse_probability_weights": overall["weights"]["before_truncation"],
        "inverse_probability_weights_truncated": overall["weights"]["after_truncation"],
        "overall": overall,
        "by_step": diagnostics["by_step"],
    }
