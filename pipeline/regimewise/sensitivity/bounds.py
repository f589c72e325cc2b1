"""Marginal sensitivity model (Tan 2006): bounds on inverse-probability weights for a confounding strength Γ,
sharp bounds of self-normalised weighted means by sorting (Zhao, Small & Bhattacharya 2019, JRSS-B 81:735),
the Γ grid and the tipping point.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from regimewise.core.arrays import finite_or_none
from regimewise.errors import UserInputError


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


def trajectory_weight_bounds(proba_taken, follows, episode, n_episodes, gamma, confounded=None, adoption=1.0):
    """Bounds [A_i, B_i] on each episode's trajectory weight for a deterministic regime, or for its partial
    adoption.

    With adoption ε < 1 the regime is followed at each decision with probability ε and usual care otherwise; its
    weight at a decision is 1 − ε + ε·1[follows]/e, increasing in 1/e, so the bounds of 1/e give the bounds of
    each factor and, all factors being positive, of their product. ε = 1 is the deterministic regime.

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
    adoption : float
        ε in (0, 1]: the share of decisions at which the regime is followed (1: always).

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
    if adoption < 1.0:
        if not 0.0 < adoption:
            raise UserInputError(f"the adoption share must lie in (0, 1], got {adoption}")
        low, high = (1.0 - adoption + adoption * follows * bound for bound in (low, high))
        follows = np.ones_like(follows)  # a decision that departs keeps weight 1 − ε: nobody drops out
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
        return {"gamma": self.gamma, "lower": finite_or_none(self.lower), "upper": finite_or_none(self.upper)}


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
    # k = number of leading (largest-y) units at their upper weight, scanned by cumulative sums.
    return _sorted_upper_bound(y[order], a[order], b[order])


def weighted_mean_bounds(values, lower, upper, gamma: float = math.nan) -> ValueBounds:
    """Sharp lower and upper bounds of the self-normalised weighted mean over the weight box."""
    values = np.asarray(values, dtype=float)
    return ValueBounds(
        gamma=gamma,
        lower=-weighted_mean_upper_bound(-values, lower, upper),
        upper=weighted_mean_upper_bound(values, lower, upper),
    )


def regime_value_bounds(returns, proba_taken, follows, episode, gamma, confounded=None, adoption=1.0) -> ValueBounds:
    """Bounds on a deterministic regime's (or its partial adoption's) weighted importance-sampling value under
    confounding strength Γ."""
    returns = np.asarray(returns, dtype=float)
    lower, upper = trajectory_weight_bounds(proba_taken, follows, episode, returns.size, gamma, confounded, adoption)
    return weighted_mean_bounds(returns, lower, upper, gamma)


def gamma_grid(gamma_max: float, precision: float) -> np.ndarray:
    """Γ = 1, 1 + precision, ..., up to gamma_max (the grid on which bounds and the tipping point are found)."""
    _check_gamma(gamma_max)
    return np.round(1.0 + precision * np.arange(int(round((gamma_max - 1.0) / precision)) + 1), 10)


def analysis_gammas(spec) -> np.ndarray:
    """The Γ grid of the protocol's precision up to gamma_max, plus every Γ the report's table shows."""
    return np.unique(np.concatenate([gamma_grid(spec.gamma_max, spec.precision), np.asarray(spec.gammas, float)]))


def bounds_curve(returns, proba_taken, follows, episode, gammas, confounded=None, adoption=1.0) -> np.ndarray:
    """Sharp bounds of the regime's (or its partial adoption's) weighted importance-sampling value at every Γ:
    array (len(gammas), 2).

    The returns are sorted once; each Γ only changes the weight box (Zhao, Small & Bhattacharya 2019). The bounds
    of :func:`trajectory_weight_bounds` are computed without the work that does not depend on Γ: an episode that
    departs from a deterministic regime has weight 0 at every Γ, and a decision where the factor cannot move (no
    confounding allowed there, or, under partial adoption, a decision that departs and keeps 1 − ε) contributes
    the same factor at every Γ, so their logarithms are summed once.
    """
    returns = np.asarray(returns, dtype=float)
    order = np.argsort(-returns, kind="mergesort")
    proba_taken = np.asarray(proba_taken, dtype=float)
    follows = np.asarray(follows, dtype=bool)
    episode = np.asarray(episode, dtype=np.int64)
    confounded = np.ones_like(follows) if confounded is None else np.asarray(confounded, dtype=bool)
    if not 0.0 < adoption <= 1.0:
        raise UserInputError(f"the adoption share must lie in (0, 1], got {adoption}")
    inverse_probability_bounds(proba_taken, 1.0)  # the probabilities' check, at every decision
    departs = np.zeros(returns.size, dtype=bool)
    if adoption == 1.0:
        departs = np.bincount(episode, weights=~follows, minlength=returns.size) > 0
    moves = confounded & follows & ~departs[episode]  # the decisions whose factor depends on Γ
    fixed = ~moves & ~departs[episode]
    point = 1.0 - adoption + adoption * follows[fixed] / proba_taken[fixed]
    fixed_log = np.bincount(episode[fixed], weights=np.log(point), minlength=returns.size)
    moving_episode, moving_proba = episode[moves], proba_taken[moves]

    def product(bound):  # each episode's product of factors, one bound of 1/e at the moving decisions
        moving_log = np.bincount(
            moving_episode, weights=np.log(1.0 - adoption + adoption * bound), minlength=returns.size
        )
        return np.where(departs, 0.0, np.exp(fixed_log + moving_log))

    out = np.empty((len(gammas), 2))
    for i, gamma in enumerate(gammas):
        lower, upper = (product(bound) for bound in inverse_probability_bounds(moving_proba, gamma))
        out[i, 1] = _sorted_upper_bound(returns[order], lower[order], upper[order])
        out[i, 0] = -_sorted_upper_bound(-returns[order][::-1], lower[order][::-1], upper[order][::-1])
    return out


def _sorted_upper_bound(y, a, b) -> float:
    """Upper bound for values already sorted in decreasing order (see :func:`weighted_mean_upper_bound`)."""
    if not np.any(b > 0):
        return math.nan
    num = np.concatenate([[0.0], np.cumsum(b * y)]) + np.concatenate([np.cumsum((a * y)[::-1])[::-1], [0.0]])
    den = np.concatenate([[0.0], np.cumsum(b)]) + np.concatenate([np.cumsum(a[::-1])[::-1], [0.0]])
    with np.errstate(invalid="ignore", divide="ignore"):
        return float(np.max(np.where(den > 0, num / den, -np.inf)))


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


# ---------------------------------------------------------------------------------------------- helpers
def _check_gamma(gamma: float) -> None:
    if not (math.isfinite(gamma) and gamma >= 1.0):
        raise UserInputError(f"confounding strength Γ must be a finite number >= 1, got {gamma}")
