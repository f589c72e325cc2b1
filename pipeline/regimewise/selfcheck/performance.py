"""Performance measures of a simulation study over R simulated cohorts, each with its Monte Carlo standard error
(MCSE), as defined by Morris, White & Crowther (2019), "Using simulation studies to evaluate statistical methods",
Stat Med 38:2074–2102, Table 6.

The formulas below are written from memory of Table 6; the tests check each one against a hand computation.
The truth may differ by cohort (a data-adaptive target, such as the value of the regime learned from that
cohort); a cohort whose estimate is missing (None or NaN) is left out of every measure and counted.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from regimewise.errors import UserInputError

ArrayLike = Sequence[float | None] | np.ndarray
Measures = dict[str, float | int | None]

# Every key performance() returns; a measure whose inputs were not given, or that cannot be computed, is None.
MEASURES = (
    "n_used",
    "n_missing",
    "bias",
    "bias_mcse",
    "empirical_se",
    "empirical_se_mcse",
    "mse",
    "mse_mcse",
    "rmse",
    "model_se",
    "model_se_mcse",
    "relative_error_model_se",
    "relative_error_model_se_mcse",
    "coverage",
    "coverage_mcse",
    "power",
    "power_mcse",
    "mean_width",
)


def coverage_mcse(p: float, r: int) -> float:
    """MCSE of a proportion over ``r`` cohorts (coverage or power): sqrt(p(1 − p)/r), Morris et al. 2019 Table 6.

    Examples
    --------
    Coverage near 95% over 50 cohorts is known to about ±3 points; over 500 (the size Morris et al. 2019,
    section 5.2, discuss) to about ±1 point:

    >>> round(coverage_mcse(0.95, 50), 4)
    0.0308
    >>> round(coverage_mcse(0.95, 500), 4)
    0.0097
    """
    if not 0.0 <= p <= 1.0:
        raise UserInputError(f"a proportion must lie between 0 and 1, got {p}")
    if r < 1:
        raise UserInputError(f"the number of cohorts must be at least 1, got {r}")
    return math.sqrt(p * (1.0 - p) / r)


def performance(
    estimates: ArrayLike,
    truths: float | ArrayLike,
    standard_errors: ArrayLike | None = None,
    lower: ArrayLike | None = None,
    upper: ArrayLike | None = None,
) -> Measures:
    """Bias, empirical and model SE, MSE, coverage and power of an estimator over R cohorts, with their MCSEs.

    Parameters
    ----------
    estimates : array-like of length R
        The estimate θ̂_i in each simulated cohort; None or NaN where it was not available.
    truths : float or array-like of length R
        The true value θ, one for all cohorts or θ_i per cohort (data-adaptive target).
    standard_errors : array-like of length R, optional
        The model-based standard error of each estimate (gives ``model_se`` and ``relative_error_model_se``).
    lower, upper : array-like of length R, optional
        Confidence limits of each estimate, both or neither (give ``coverage``, ``power`` and ``mean_width``).

    Returns
    -------
    dict
        The keys of :data:`MEASURES`: ``n_used`` cohorts with an estimate and ``n_missing`` without; each measure
        and its ``_mcse``, a float, or None when its inputs were not given or it cannot be computed (a ratio
        over a zero SE). ``rmse`` has no MCSE of its own: ``mse_mcse`` is the MCSE of its square.

    Raises
    ------
    UserInputError
        Arrays of different lengths, fewer than 2 cohorts with an estimate, an infinite estimate, a non-finite
        truth, standard error or limit in a cohort with an estimate, a negative standard error, or lower > upper.
    """
    columns = _columns(estimates, truths, standard_errors, lower, upper)
    used = ~np.isnan(columns["estimates"])
    n_used = int(used.sum())
    if n_used < 2:
        raise UserInputError(
            f"performance measures need at least 2 cohorts with an estimate, got {n_used} of {used.size}; "
            "simulate more cohorts"
        )
    kept = {name: values[used] for name, values in columns.items()}
    _check_used(kept, np.flatnonzero(used))
    measures: Measures = dict.fromkeys(MEASURES)
    measures.update(n_used=n_used, n_missing=int(used.size - n_used))
    measures.update(_accuracy(kept["estimates"], kept["truths"]))
    if "standard_errors" in kept:
        measures.update(_model_se(kept["standard_errors"], measures["empirical_se"]))
    if "lower" in kept:
        measures.update(_intervals(kept["lower"], kept["upper"], kept["truths"]))
    return measures


# ---------------------------------------------------------------------------------------------- the measures
def _accuracy(estimates: np.ndarray, truths: np.ndarray) -> Measures:
    """Bias, empirical SE and MSE with their MCSEs (Morris et al. 2019 Table 6)."""
    r = estimates.size
    errors = estimates - truths
    # Table 6: EmpSE = sqrt(Σ(θ̂_i − mean θ̂)² / (R − 1)); MCSE = EmpSE / sqrt(2(R − 1)).
    empirical_se = math.sqrt(float(np.sum((estimates - estimates.mean()) ** 2)) / (r - 1))
    # Table 6: MCSE of bias = sqrt(Σ(θ̂_i − mean θ̂)² / (R(R − 1))), the spread of the estimates. With a truth per
    # cohort the spread of what is averaged, θ̂_i − θ_i, takes its place; with one truth the two are the same.
    bias_mcse = math.sqrt(float(np.sum((errors - errors.mean()) ** 2)) / (r * (r - 1)))
    # Table 6: MSE = mean((θ̂_i − θ)²); MCSE = sqrt(Σ[(θ̂_i − θ)² − MSE]² / (R(R − 1))).
    squared = errors**2
    mse = float(squared.mean())
    return {
        "bias": float(errors.mean()),
        "bias_mcse": bias_mcse,
        "empirical_se": empirical_se,
        "empirical_se_mcse": empirical_se / math.sqrt(2.0 * (r - 1)),
        "mse": mse,
        "mse_mcse": math.sqrt(float(np.sum((squared - mse) ** 2)) / (r * (r - 1))),
        "rmse": math.sqrt(mse),
    }


def _model_se(standard_errors: np.ndarray, empirical_se: float) -> Measures:
    """Average model SE and the relative error in it, with their MCSEs (Morris et al. 2019 Table 6)."""
    r = standard_errors.size
    variances = standard_errors**2
    # Table 6: ModSE = sqrt(mean(SE_i²)); Var(SE²) over R − 1; MCSE ≈ sqrt(Var(SE²) / (4 R ModSE²)).
    model_se = math.sqrt(float(variances.mean()))
    spread = float(np.var(variances, ddof=1))
    measures: Measures = {"model_se": model_se}
    if model_se > 0:
        measures["model_se_mcse"] = math.sqrt(spread / (4.0 * r * model_se**2))
    if empirical_se > 0:
        ratio = model_se / empirical_se
        # Table 6: 100(ModSE/EmpSE − 1); MCSE = 100 (ModSE/EmpSE) sqrt(Var(SE²)/(4 R ModSE⁴) + 1/(2(R − 1))).
        measures["relative_error_model_se"] = 100.0 * (ratio - 1.0)
        if model_se > 0:
            measures["relative_error_model_se_mcse"] = (
                100.0 * ratio * math.sqrt(spread / (4.0 * r * model_se**4) + 1.0 / (2.0 * (r - 1)))
            )
    return measures


def _intervals(lower: np.ndarray, upper: np.ndarray, truths: np.ndarray) -> Measures:
    """Coverage, power (intervals excluding 0) and mean width, with MCSEs (Morris et al. 2019 Table 6)."""
    r = lower.size
    # Table 6: coverage = share of cohorts with lower_i ≤ θ_i ≤ upper_i; power = share rejecting θ = 0.
    coverage = float(np.mean((lower <= truths) & (truths <= upper)))
    power = float(np.mean((lower > 0) | (upper < 0)))
    return {
        "coverage": coverage,
        "coverage_mcse": coverage_mcse(coverage, r),
        "power": power,
        "power_mcse": coverage_mcse(power, r),
        "mean_width": float(np.mean(upper - lower)),
    }


# ---------------------------------------------------------------------------------------------- the inputs
def _vector(values: object, name: str) -> np.ndarray:
    """``values`` as a 1-D float array, None read as NaN; a one-line error when it is not numbers."""
    try:
        array = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise UserInputError(f"{name} must be numbers (None or NaN where missing)") from None
    if array.ndim != 1:
        raise UserInputError(f"{name} must be one-dimensional (one entry per cohort), got shape {array.shape}")
    return array


def _columns(
    estimates: ArrayLike,
    truths: float | ArrayLike,
    standard_errors: ArrayLike | None,
    lower: ArrayLike | None,
    upper: ArrayLike | None,
) -> dict[str, np.ndarray]:
    """The inputs as float arrays of one length R (a single truth repeated); refuses unequal lengths."""
    if (lower is None) != (upper is None):
        raise UserInputError("give both lower and upper confidence limits, or neither")
    columns = {"estimates": _vector(estimates, "estimates")}
    r = columns["estimates"].size
    if np.ndim(truths) == 0:
        truth = _vector([truths], "truths")[0]
        if not math.isfinite(truth):
            raise UserInputError(f"the truth must be a finite number, got {truth}")
        columns["truths"] = np.full(r, truth)
    else:
        columns["truths"] = _vector(truths, "truths")
    given = {"standard_errors": standard_errors, "lower": lower, "upper": upper}
    columns.update({name: _vector(values, name) for name, values in given.items() if values is not None})
    for name, values in columns.items():
        if values.size != r:
            raise UserInputError(
                f"{name} has {values.size} entries but estimates has {r}; give one entry per simulated cohort"
            )
    return columns


def _check_used(kept: dict[str, np.ndarray], cohorts: np.ndarray) -> None:
    """Refuse what no measure can use in a cohort with an estimate; cohorts are numbered from 0 in messages."""
    for name, values in kept.items():
        bad = ~np.isfinite(values)
        if bad.any():
            what = "infinite" if name == "estimates" else "missing or not finite"
            raise UserInputError(
                f"{name} is {what} in cohort {int(cohorts[bad][0])} (counting from 0), which has an estimate; "
                "give a finite value, or NaN as the estimate of a cohort to leave out"
            )
    if "standard_errors" in kept and (kept["standard_errors"] < 0).any():
        first = int(cohorts[kept["standard_errors"] < 0][0])
        raise UserInputError(f"standard_errors is negative in cohort {first} (counting from 0); an SE is ≥ 0")
    if "lower" in kept and (kept["lower"] > kept["upper"]).any():
        first = int(cohorts[kept["lower"] > kept["upper"]][0])
        raise UserInputError(f"lower > upper in cohort {first} (counting from 0); swap or fix the confidence limits")
