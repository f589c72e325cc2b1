"""Estimability verdicts: can the records identify a regime's value, and by which estimator?

A verdict is computed once per regime × estimator, stored beside the estimate in values.json, and read by the
bootstrap (no interval for a value that is not identified), the figures (no point) and summary.json (never a
headline). Three verdicts:

* ``supported``: the regime's importance weights keep a Kish effective sample of at least the protocol's minimum
  reliable ESS (:func:`regimewise.evaluation.values.minimum_reliable_ess`). A model-only estimator (fqe) is
  supported for usual care alone, the regime the records follow: for any other regime its value rests entirely
  on the outcome model, which no weighting of the episodes checks, so it is at best a ``model projection``. On
  the demo simulator without hidden confounding, fitted-Q evaluation of the pre-specified strategy was biased by
  +0.17 reward units (SE 0.02) with the protocol's cubic basis and by −0.15 with pairwise interactions added,
  while its bootstrap interval (which leaves out misspecification) narrows with the cohort: its 95% intervals
  covered the true difference in 80% of 100 cohorts (bench/RESULTS.md, bench_strategy_coverage.py).
* ``model projection``: the effective sample is below that minimum, but the regime's actions mostly lie within
  usual care's support; a value still exists, but it rests largely on the outcome model (fitted-Q evaluation,
  the model part of dr and wdr) rather than on episodes that resemble the regime. A weights-only estimator (is,
  wis, pdis, pdwis) has no model to rest on: its low-ESS value is reported as ``model projection`` only if the
  rest holds, with the words saying that it rests on few episodes.
* ``not identified``: the regime puts more than ``evaluation.unidentified_share`` of its probability, over the
  decisions, on actions usual care takes with probability below ``constraints.support_threshold``, or no
  episode follows it far enough (ESS below 1). Such a value is kept in values.json for audit but gets no
  interval, no point in a plot and no place in the headline.

The support rule follows the positivity requirement of identification (Hernán & Robins 2020, Causal Inference:
What If, §3.3; the protocol's support threshold is its practical version, common practice, no single source).
"""

from __future__ import annotations

import numpy as np

from regimewise.estimators import ESTIMATORS
from regimewise.evaluation.strategies import row_sums

SUPPORTED = "supported"
MODEL_PROJECTION = "model projection"
NOT_IDENTIFIED = "not identified"
VERDICTS = (SUPPORTED, MODEL_PROJECTION, NOT_IDENTIFIED)


def unsupported_share(target_proba, behaviour_proba, support_threshold: float) -> float:
    """Mean over decisions of the regime's probability on actions usual care takes with probability < threshold.

    For a deterministic regime this is the share of decisions whose prescribed action is below the threshold.
    """
    return float(np.mean(unsupported_by_row(target_proba, behaviour_proba, support_threshold)))


def unsupported_by_row(target_proba, behaviour_proba, support_threshold: float) -> np.ndarray:
    """Per decision, the regime's probability on actions usual care takes with probability < threshold (the
    terms of :func:`unsupported_share`; a row's term depends on that row alone).

    ``target_proba`` may be a deterministic regime's action codes (m,): the row sum of its one-hot row is then
    1.0 where its action is below the threshold and 0.0 elsewhere (zeros and one 1.0 add up to exactly that), read
    without building the row."""
    if np.ndim(target_proba) == 1:
        codes = np.asarray(target_proba)
        below = np.asarray(behaviour_proba, dtype=float) < support_threshold
        return below[np.arange(codes.shape[0]), codes].astype(float)
    target = np.asarray(target_proba, dtype=float)
    below = np.asarray(behaviour_proba, dtype=float) < support_threshold
    return row_sums(np.where(below, target, 0.0))


def verdict(
    estimator: str,
    ess: float | None,
    floor: float,
    share_unsupported: float,
    max_share: float,
    records_regime: bool = False,
) -> dict:
    """The verdict of one estimate and its plain reason.

    Parameters
    ----------
    estimator : str
        Registry name (:data:`regimewise.estimators.ESTIMATORS`).
    ess : float or None
        Kish effective sample size of the regime's full-trajectory weights (None: undefined).
    floor : float
        The protocol's minimum reliable ESS.
    share_unsupported : float
        :func:`unsupported_share` of the regime.
    max_share : float
        ``evaluation.unidentified_share``.
    records_regime : bool, default False
        True for usual care, the regime the records follow; a model-only estimator is supported only there.
    """
    ess_value = 0.0 if ess is None or not np.isfinite(ess) else float(ess)
    if share_unsupported > max_share:
        return {
            "verdict": NOT_IDENTIFIED,
            "reason": f"usual care almost never took this strategy's action ({100 * share_unsupported:.0f}% of its "
            "decisions prescribe an action usual care takes less than the support threshold), so these records "
            "cannot say what that strategy would do",
        }
    if ess_value < 1.0:
        return {
            "verdict": NOT_IDENTIFIED,
            "reason": "no episode in the records follows this strategy far enough (effective sample below 1), so "
            "these records cannot say what that strategy would do",
        }
    model_only = ESTIMATORS[estimator].family == "model" and not records_regime
    if ess_value >= floor and not model_only:
        return {"verdict": SUPPORTED, "reason": None}
    if model_only:
        reason = (
            f"{ESTIMATORS[estimator].label} rests entirely on the outcome model, which no weighting of the "
            "episodes checks, and its interval leaves out the model's own error; the doubly robust estimates "
            "correct the same model with the weighted episodes"
        )
    elif ESTIMATORS[estimator].needs_q_model:
        reason = (
            f"an effective sample of {ess_value:.1f} episodes, below the {floor:.0f} needed, so the value rests "
            "mostly on the outcome model's projection"
        )
    else:
        reason = (
            f"an effective sample of {ess_value:.1f} episodes, below the {floor:.0f} needed: a weighted average "
            "of very few episodes, with no outcome model to lean on"
        )
    return {"verdict": MODEL_PROJECTION, "reason": reason}


def outcome_model_share(ess: float | None, floor: float, model_only: bool = False) -> float:
    """How much of the estimate rests on the outcome model rather than on weighted episodes: 1 − min(1, ESS/floor).

    A plain index, 0 when the effective sample reaches the minimum and 1 when it is 0 (no published source: a
    reading aid, not an estimate); 1 for a model-only estimator (``model_only``) of a regime other than usual care.
    """
    if model_only:
        return 1.0
    ess_value = 0.0 if ess is None or not np.isfinite(ess) else float(ess)
    return float(1.0 - min(1.0, ess_value / floor)) if floor > 0 else 0.0


def worst(*verdicts: str) -> str:
    """The least favourable of several verdicts (a contrast is only as identified as its weaker regime)."""
    return max(verdicts, key=VERDICTS.index)
