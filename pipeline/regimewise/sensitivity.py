"""Sensitivity of a regime's value to unmeasured confounding.

Marginal sensitivity model (Tan 2006): a hidden factor may change the odds that usual care took the action it
took by at most a factor Γ ≥ 1. With estimated probability e of the action taken, the true inverse probability
lies in ``[1 + (1/e − 1)/Γ, 1 + Γ(1/e − 1)]``. For a regime's trajectory weight the per-decision bounds multiply
over the decisions allowed to be confounded; decisions outside that set keep their estimated weight.

The self-normalised (weighted) importance-sampling value Σ W_i G_i / Σ W_i is then bounded by a linear-fractional
program over the box W_i ∈ [A_i, B_i]. Its optimum puts the upper weight on the episodes with the largest
returns and the lower weight on the rest, for one threshold found by sorting (Zhao, Small & Bhattacharya 2019,
JRSS-B 81:735, Proposition 2 and its algorithm). Dorn & Guo (2022, JASA) give sharper bounds that also use the
outcome model; they are not implemented here.

E-values follow VanderWeele & Ding (2017, Ann Intern Med 167:268).

References
----------
Tan, Z. (2006). A distributional approach for causal inference using propensity scores. JASA 101:1619.
Zhao, Q., Small, D. S. & Bhattacharya, B. B. (2019). Sensitivity analysis for inverse probability weighting
estimators via the percentile bootstrap. JRSS-B 81:735-761.
Namkoong, H., Keramati, R., Yadlowsky, S. & Brunskill, E. (2020). Off-policy policy evaluation for sequential
decisions under unobserved confounding. NeurIPS.
VanderWeele, T. J. & Ding, P. (2017). Sensitivity analysis in observational research: introducing the E-value.
Ann Intern Med 167:268-274.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import UserInputError


# ---------------------------------------------------------------------------------------------- weight bounds
def inverse_probability_bounds(proba_taken, gamma: float) -> tuple[np.ndarray, np.ndarray]:
    """Bounds on the true inverse probability of the action taken under the marginal sensitivity model.

    Parameters
    ----------
    proba_taken : array_like
        Estimated probability e of the action taken, in (0, 1].
    gamma : float
        Odds-ratio bound Γ ≥ 1 (Γ = 1: no hidden confounding).

    Returns
    -------
    lower, upper : ndarray
        ``1 + (1/e − 1)/Γ`` and ``1 + Γ(1/e − 1)`` (Tan 2006).

    Examples
    --------
    >>> inverse_probability_bounds([0.5], 2.0)
    (array([1.5]), array([3.]))
    """
    e = np.asarray(proba_taken, dtype=float)
    _check_gamma(gamma)
    if np.any(~np.isfinite(e)) or np.any(e <= 0) or np.any(e > 1):
        raise UserInputError("probabilities of the actions taken must lie in (0, 1]; check the usual-care model")
    odds = 1.0 / e - 1.0
    return 1.0 + odds / gamma, 1.0 + gamma * odds


def trajectory_weight_bounds(proba_taken, follows, episode, n_episodes, gamma, confounded=None):
    """Bounds [A_i, B_i] on each episode's trajectory weight for a deterministic regime.

    Parameters
    ----------
    proba_taken : ndarray, shape (n,)
        Estimated usual-care probability of the action taken at each decision.
    follows : ndarray of bool, shape (n,)
        Whether the regime's action equals the action taken at each decision.
    episode : ndarray of int, shape (n,)
        Episode code 0..E-1 of each decision.
    n_episodes : int
    gamma : float
    confounded : ndarray of bool, shape (n,), optional
        Decisions at which hidden confounding is allowed (default: all). Elsewhere the estimated weight 1/e is kept.

    Returns
    -------
    lower, upper : ndarray, shape (E,)
        Zero for an episode that departs from the regime anywhere (its weight is zero whatever the confounding).
    """
    proba_taken = np.asarray(proba_taken, dtype=float)
    follows = np.asarray(follows, dtype=bool)
    episode = np.asarray(episode, dtype=np.int64)
    confounded = np.ones_like(follows) if confounded is None else np.asarray(confounded, dtype=bool)
    low, high = inverse_probability_bounds(proba_taken, gamma)
    point = 1.0 / proba_taken
    low = np.where(confounded, low, point)
    high = np.where(confounded, high, point)
    log_low = np.bincount(episode, weights=np.log(low), minlength=n_episodes)
    log_high = np.bincount(episode, weights=np.log(high), minlength=n_episodes)
    departs = np.bincount(episode, weights=~follows, minlength=n_episodes) > 0
    return np.where(departs, 0.0, np.exp(log_low)), np.where(departs, 0.0, np.exp(log_high))


# ---------------------------------------------------------------------------------------------- sharp bounds
@dataclass(frozen=True)
class ValueBounds:
    """Lower and upper bound of a self-normalised weighted mean at one Γ."""

    gamma: float
    lower: float
    upper: float

    def to_dict(self) -> dict:
        return {"gamma": self.gamma, "lower": _plain(self.lower), "upper": _plain(self.upper)}


def weighted_mean_upper_bound(values, lower, upper) -> float:
    """max Σ w_i y_i / Σ w_i over w_i ∈ [lower_i, upper_i] (Zhao, Small & Bhattacharya 2019).

    The maximiser gives the upper weight to the k largest values and the lower weight to the rest; all n + 1
    thresholds k are scanned with cumulative sums after one sort. Returns NaN if every upper weight is zero.

    Examples
    --------
    >>> weighted_mean_upper_bound([0.0, 1.0], [1.0, 1.0], [1.0, 3.0])
    0.75
    """
    y, a, b = (np.asarray(v, dtype=float) for v in (values, lower, upper))
    if not (y.shape == a.shape == b.shape) or y.ndim != 1:
        raise UserInputError("values and weight bounds must be one-dimensional arrays of the same length")
    if np.any(a < 0) or np.any(b < a):
        raise UserInputError("weight bounds must satisfy 0 <= lower <= upper")
    if not np.any(b > 0):
        return math.nan
    order = np.argsort(-y, kind="mergesort")
    y, a, b = y[order], a[order], b[order]
    # k = number of leading (largest-y) units at their upper weight.
    num = np.concatenate([[0.0], np.cumsum(b * y)]) + np.concatenate([np.cumsum((a * y)[::-1])[::-1], [0.0]])
    den = np.concatenate([[0.0], np.cumsum(b)]) + np.concatenate([np.cumsum(a[::-1])[::-1], [0.0]])
    with np.errstate(invalid="ignore", divide="ignore"):
        ratios = np.where(den > 0, num / den, -np.inf)
    return float(np.max(ratios))


def weighted_mean_bounds(values, lower, upper, gamma: float = math.nan) -> ValueBounds:
    """Sharp lower and upper bounds of the self-normalised weighted mean over the weight box."""
    values = np.asarray(values, dtype=float)
    return ValueBounds(
        gamma=gamma,
        lower=-weighted_mean_upper_bound(-values, lower, upper),
        upper=weighted_mean_upper_bound(values, lower, upper),
    )


def regime_value_bounds(returns, proba_taken, follows, episode, gamma, confounded=None) -> ValueBounds:
    """Bounds on a deterministic regime's weighted importance-sampling value under confounding strength Γ."""
    returns = np.asarray(returns, dtype=float)
    lower, upper = trajectory_weight_bounds(proba_taken, follows, episode, returns.size, gamma, confounded)
    return weighted_mean_bounds(returns, lower, upper, gamma)


# ---------------------------------------------------------------------------------------------- tipping point
def tipping_point(lower_limit, gamma_max: float = 20.0, precision: float = 0.01) -> float | None:
    """Smallest Γ at which ``lower_limit(Γ)`` (non-increasing in Γ) reaches zero, by bisection.

    Returns 1.0 if the limit is already ≤ 0 at Γ = 1 (no benefit to erase) and None if it stays above zero up to
    ``gamma_max``. The answer is within ``precision`` of the crossing.
    """
    if lower_limit(1.0) <= 0:
        return 1.0
    if lower_limit(gamma_max) > 0:
        return None
    low, high = 1.0, gamma_max
    while high - low > precision:
        middle = 0.5 * (low + high)
        if lower_limit(middle) > 0:
            low = middle
        else:
            high = middle
    return high


# ---------------------------------------------------------------------------------------------- E-values
def e_value(rr: float) -> float:
    """E-value of a risk ratio (VanderWeele & Ding 2017): RR + sqrt(RR(RR − 1)), using 1/RR when RR < 1.

    Examples
    --------
    >>> round(e_value(3.9), 2)
    7.26
    """
    if not (rr > 0 and math.isfinite(rr)):
        raise UserInputError(f"a risk ratio must be positive and finite, got {rr}")
    rr = 1.0 / rr if rr < 1 else rr
    return rr + math.sqrt(rr * (rr - 1.0))


def e_value_interval(lower: float, upper: float) -> float:
    """E-value of the confidence limit nearest 1; 1 when the interval includes 1 (VanderWeele & Ding 2017)."""
    if lower <= 1.0 <= upper:
        return 1.0
    return e_value(lower if lower > 1.0 else upper)


def odds_ratio_to_risk_ratio(odds_ratio: float) -> float:
    """Square-root conversion of an odds ratio for a common outcome (VanderWeele & Ding 2017)."""
    return math.sqrt(odds_ratio)


def hazard_ratio_to_risk_ratio(hazard_ratio: float) -> float:
    """(1 − 0.5^sqrt(HR)) / (1 − 0.5^sqrt(1/HR)) for a common outcome (VanderWeele 2017; formula from memory)."""
    return (1.0 - 0.5 ** math.sqrt(hazard_ratio)) / (1.0 - 0.5 ** math.sqrt(1.0 / hazard_ratio))


# ---------------------------------------------------------------------------------------------- helpers
def _check_gamma(gamma: float) -> None:
    if not (math.isfinite(gamma) and gamma >= 1.0):
        raise UserInputError(f"confounding strength Γ must be a finite number >= 1, got {gamma}")


def _plain(x: float):
    return None if math.isnan(x) else float(x)
