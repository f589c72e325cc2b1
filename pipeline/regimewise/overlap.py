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

from .behaviour import _as_actions, _as_proba, multiclass_auc, probability_of_taken
from .errors import UserInputError
from .features import action_codes
from .weighting import inverse_probability_weights, weight_summary

__all__ = [
    "OverlapVerdict",
    "behaviour_diagnostics_by_step",
    "brier_score",
    "overlap_by_step",
    "overlap_verdict",
    "probability_summary",
    "reliability_curve",
    "truncate_weights",
    "usual_care_diagnostics",
]

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


def brier_score(action, proba, n_actions):
    r"""Multi-category Brier score :math:`\frac1n \sum_i \sum_k (p_{ik} - 1\{a_i = k\})^2` (Brier 1950).

    0 is perfect; always predicting ``1/K`` for ``K`` equally frequent actions scores ``1 - 1/K``.

    Examples
    --------
    >>> brier_score([0, 1], [[1.0, 0.0], [0.5, 0.5]], 2)
    0.25
    """
    proba = _as_proba(proba)
    codes = _as_actions(action, n_actions, n_rows=proba.shape[0])
    outcome = np.zeros_like(proba)
    outcome[np.arange(codes.size), codes] = 1.0
    return float(np.mean(np.sum((proba - outcome) ** 2, axis=1)))


def reliability_curve(outcome, predicted, n_bins=10):
    """Observed frequency against mean predicted probability in equal-width bins of [0, 1].

    Bins are ``(edge_{j-1}, edge_j]`` except the first, which includes 0 (the binning of scikit-learn's
    ``calibration_curve(strategy="uniform")``); empty bins are left out.

    Returns
    -------
    dict
        ``mean_predicted``, ``observed`` and ``count`` (lists, one entry per non-empty bin).

    Examples
    --------
    >>> reliability_curve([0, 1, 1, 1], [0.1, 0.3, 0.9, 1.0], n_bins=2)["observed"]
    [0.5, 1.0]
    """
    y = np.asarray(outcome, dtype=float)
    p = np.asarray(predicted, dtype=float)
    bins = np.searchsorted(np.linspace(0.0, 1.0, n_bins + 1)[1:-1], p)
    count = np.bincount(bins, minlength=n_bins)
    keep = count > 0
    sum_p = np.bincount(bins, weights=p, minlength=n_bins)[keep]
    sum_y = np.bincount(bins, weights=y, minlength=n_bins)[keep]
    return {
        "mean_predicted": (sum_p / count[keep]).tolist(),
        "observed": (sum_y / count[keep]).tolist(),
        "count": count[keep].astype(int).tolist(),
    }


def truncate_weights(weights, percentiles):
    """Weights truncated at the given (low, high) percentiles of their own distribution (Cole & Hernán 2008).

    Returns
    -------
    truncated : ndarray
    bounds : tuple of float
        The weights at the low and high percentiles (type-7 quantiles, Hyndman & Fan 1996).

    Examples
    --------
    >>> truncate_weights(np.arange(1.0, 102.0), (1, 99))[1]
    (2.0, 100.0)
    """
    w = np.asarray(weights, dtype=float)
    low, high = percentiles
    if not 0 <= low < high <= 100:
        raise UserInputError(f"truncation percentiles must satisfy 0 <= low < high <= 100; got {percentiles}")
    lower, upper = np.percentile(w, [low, high])
    return np.clip(w, lower, upper), (float(lower), float(upper))


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


def _calibration_block(codes, proba, n_actions, labels):
    present = np.unique(codes).size
    return {
        "decisions": int(codes.size),
        "auc": float(multiclass_auc(codes, proba, n_actions)) if present > 1 else None,
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

    def block(rows):
        return {
            **_calibration_block(codes[rows], proba[rows], len(labels), labels),
            "taken_probability": probability_summary(taken[rows]),
            "share_taken_below_support": float(np.mean(taken[rows] < support_threshold)),
            "weights": _weights_block(taken[rows], percentiles),
        }

    by_step = {str(int(t)): block(np.flatnonzero(steps == t)) for t in np.unique(steps)}
    return {"overall": block(np.arange(steps.size)), "by_step": by_step}


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


# ---------------------------------------------------------------------------------------------- figures
def _panel_grid(n_panels):
    from .report import _style  # late import: report imports this module

    import matplotlib.pyplot as plt

    _style()
    cols = min(4, n_panels)
    rows = int(np.ceil(n_panels / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(2.2 * cols + 0.8, 2.0 * rows + 0.4), sharex=True, sharey=True,
                             squeeze=False)  # fmt: skip
    for ax in axes.flat[n_panels:]:
        ax.set_visible(False)
    return fig, axes.flat


def reliability_figure(by_step, labels) -> str:
    """Reliability curves (observed frequency against mean predicted probability), one panel per step."""
    from .report import _svg

    steps = sorted(by_step, key=int)
    fig, axes = _panel_grid(len(steps))
    for ax, step in zip(axes, steps):
        ax.plot([0, 1], [0, 1], color="0.7", linewidth=0.8)
        for k, label in enumerate(labels):
            curve = by_step[step]["reliability"][label]
            ax.plot(curve["mean_predicted"], curve["observed"], "-o", markersize=2.5, color=f"C{k}", label=label)
        ax.set_title(f"decision point {step}")
    fig.supxlabel("mean predicted probability")
    fig.supylabel("observed share")
    fig.axes[0].legend(frameon=False, fontsize=7)
    return _svg(fig)


def overlap_figure(overlap) -> str:
    """Histograms of the probability of the action taken and of the action recommended, one panel per step."""
    from .report import _svg

    steps = sorted(overlap, key=int)
    fig, axes = _panel_grid(len(steps))
    for ax, step in zip(axes, steps):
        for key, colour, label in (("taken_probability", "C0", "taken"), ("recommended_probability", "C3",
                                                                          "recommended")):  # fmt: skip
            counts = np.asarray(overlap[step][key]["histogram"], dtype=float)
            edges = np.linspace(0.0, 1.0, counts.size + 1)
            ax.stairs(counts / max(counts.sum(), 1.0), edges, color=colour, label=label)
        ax.axvline(CRUMP_CUT, color="0.6", linestyle=":", linewidth=0.8)
        ax.set_title(f"decision point {step}: {overlap[step]['verdict']}")
    fig.supxlabel("usual care's estimated probability of the action")
    fig.supylabel("share of decisions")
    fig.axes[0].legend(frameon=False, fontsize=7)
    return _svg(fig)


# ---------------------------------------------------------------------------------------------- behaviour.json
def _model_block(protocol, usual_care):
    fitted = usual_care.model
    block = {"kind": protocol.behaviour_model.kind, "covariates": usual_care.design.names,
             "spline_states": list(protocol.behaviour_model.spline_states), "scaler": usual_care.scaler.to_dict()}  # fmt: skip
    if hasattr(fitted, "params_"):
        block.update(converged=bool(fitted.converged_), log_likelihood=float(fitted.llf_),
                     params=np.asarray(fitted.params_).tolist())  # fmt: skip
    else:
        block.update(converged=None, boosting_rounds=int(fitted.max_iter))
    return block


def usual_care_diagnostics(protocol, frame, usual_care) -> dict:
    """Everything behaviour.json reports: the model, cross-fitting, the floor, and per-step diagnostics.

    Diagnostics use the records' cross-fitted (out-of-fold) probabilities, so calibration and discrimination
    are not flattered by predicting the data a model was fitted on.
    """
    spec = protocol.behaviour_model
    labels = protocol.action_labels
    codes = action_codes(frame, labels)
    proba = usual_care.record_proba
    floor = usual_care.floor
    at_floor = proba == floor if floor > 0 else np.zeros(proba.shape, dtype=bool)
    diagnostics = behaviour_diagnostics_by_step(frame["step"].to_numpy(), codes, proba, labels,
                                                protocol.constraints.support_threshold, spec.truncation_percentiles)  # fmt: skip
    overall = diagnostics["overall"]
    patients = frame.groupby(usual_care.folds)["patient_id"].nunique()
    return {
        "model": _model_block(protocol, usual_care),
        "decisions": int(len(frame)),
        "auc": overall["auc"],
        "auc_method": "one-vs-rest macro average, out-of-fold probabilities",
        "brier": overall["brier"],
        "cross_fitting": {"folds": spec.folds, "split": "by patient",
                          "patients_per_fold": [int(v) for v in patients.to_numpy()]},  # fmt: skip
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
