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
    return weight_bounds_over_gammas(proba_taken, follows, episode, n_episodes, confounded, adoption)(gamma)


def weight_bounds_over_gammas(proba_taken, follows, episode, n_episodes, confounded=None, adoption=1.0):
    """The bounds of :func:`trajectory_weight_bounds` as a function of Γ, with the work that does not depend on Γ
    done once.

    An episode that departs from a deterministic regime has weight 0 at every Γ. A decision whose factor cannot
    move (no confounding allowed there: factor 1 − ε + ε·1[follows]/e; or, under partial adoption, one that departs:
    factor 1 − ε) contributes the same logarithm at every Γ, so those are summed once per episode; the returned
    function recomputes only the factors of the other decisions.
    """
    proba_taken, follows, episode, confounded = _decision_arrays(proba_taken, follows, episode, confounded, adoption)
    departs = _departures(follows, episode, n_episodes, adoption)
    box = _box_over_gammas(proba_taken, follows, episode, n_episodes, ~departs[episode], confounded, adoption)

    def at(gamma):
        return tuple(np.where(departs, 0.0, bound) for bound in box(gamma))

    return at


def _decision_arrays(proba_taken, follows, episode, confounded, adoption):
    """The decisions' arrays as the bounds use them, checked (the probabilities at every decision)."""
    proba_taken = np.asarray(proba_taken, dtype=float)
    follows = np.asarray(follows, dtype=bool)
    episode = np.asarray(episode, dtype=np.int64)
    confounded = np.ones_like(follows) if confounded is None else np.asarray(confounded, dtype=bool)
    if not 0.0 < adoption <= 1.0:
        raise UserInputError(f"the adoption share must lie in (0, 1], got {adoption}")
    inverse_probability_bounds(proba_taken, 1.0)  # the probabilities' check, at every decision
    return proba_taken, follows, episode, confounded


def _departures(follows, episode, n_episodes, adoption) -> np.ndarray:
    """Episodes that depart from a deterministic regime somewhere (none under partial adoption, where a decision
    that departs keeps 1 − ε: nobody drops out)."""
    if adoption == 1.0:
        return np.bincount(episode, weights=~follows, minlength=n_episodes) > 0
    return np.zeros(n_episodes, dtype=bool)


def _box_over_gammas(proba_taken, follows, slot, n_slots, kept, confounded, adoption):
    """Γ ↦ the products of the factors of the decisions ``kept``, one bound of 1/e at the moving decisions,
    summed into ``slot`` (the episodes in any numbering 0..n_slots-1; each slot's logarithms add up in the
    decisions' order whatever the numbering). The probabilities are checked already."""
    moves = kept & confounded & follows  # the decisions whose factor depends on Γ
    fixed = kept & ~moves
    fixed_factor = 1.0 - adoption + adoption * follows[fixed] / proba_taken[fixed]
    fixed_log = np.bincount(slot[fixed], weights=np.log(fixed_factor), minlength=n_slots)
    moving_slot = slot[moves]
    odds = 1.0 / proba_taken[moves] - 1.0  # as inverse_probability_bounds has it
    factor = np.empty(odds.shape[0])  # worked in place: x + c and x·c are c + x and c·x to the bit

    def product():  # each slot's product of factors, one bound of 1/e in ``factor``
        if adoption != 1.0:  # 1 − ε + ε·bound; at ε = 1 that is the bound exactly (0 + 1·b is b)
            np.multiply(factor, adoption, out=factor)
            np.add(factor, 1.0 - adoption, out=factor)
        np.log(factor, out=factor)
        return np.exp(fixed_log + np.bincount(moving_slot, weights=factor, minlength=n_slots))

    def at(gamma):
        _check_gamma(gamma)
        np.divide(odds, gamma, out=factor)
        np.add(factor, 1.0, out=factor)  # 1 + odds/Γ
        lower = product()
        np.multiply(odds, gamma, out=factor)
        np.add(factor, 1.0, out=factor)  # 1 + Γ·odds
        return lower, product()

    return at


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

    The returns are sorted once; each Γ only changes the weight box (Zhao, Small & Bhattacharya 2019), whose
    Γ-free part :func:`weight_bounds_over_gammas` computes once. The box is built for the episodes that keep a
    weight only, numbered in the sorted order: an episode that departs from the regime has weights [0, 0], which
    add exact zeros to every cumulative sum, so leaving it out changes no bound except perhaps the sign of a
    zero; a bound of zero is therefore found again with every episode.
    """
    returns = np.asarray(returns, dtype=float)
    proba_taken, follows, episode, confounded = _decision_arrays(proba_taken, follows, episode, confounded, adoption)
    order = np.argsort(-returns, kind="mergesort")
    departs = _departures(follows, episode, returns.size, adoption)[order]  # in the sorted order
    ranked = order[~departs]  # the episodes that keep a weight, by decreasing return
    rank = np.full(returns.size, -1, dtype=np.int64)
    rank[ranked] = np.arange(ranked.size)
    box = _box_over_gammas(proba_taken, follows, rank[episode], ranked.size, rank[episode] >= 0, confounded, adoption)
    y = returns[ranked]
    y_reversed = -y[::-1]
    out = np.empty((len(gammas), 2))
    for i, gamma in enumerate(gammas):
        lower, upper = box(gamma)
        out[i, 1] = _sorted_upper_bound(y, lower, upper)
        out[i, 0] = -_sorted_upper_bound(y_reversed, lower[::-1], upper[::-1])
        if departs.any() and np.any(out[i] == 0.0):
            out[i] = _every_episode_bounds(returns[order], lower, upper, departs)
    return out


def _every_episode_bounds(y, lower, upper, departs) -> tuple[float, float]:
    """Lower and upper bound over every episode (sorted), with [0, 0] for those that depart."""
    a, b = np.zeros(y.size), np.zeros(y.size)
    a[~departs], b[~departs] = lower, upper
    return -_sorted_upper_bound(-y[::-1], a[::-1], b[::-1]), _sorted_upper_bound(y, a, b)


def _sorted_upper_bound(y, a, b) -> float:
    """Upper bound for values already sorted in decreasing order (see :func:`weighted_mean_upper_bound`)."""
    if not np.any(b > 0):
        return math.nan
    num = _threshold_sums(b * y, a * y)
    den = _threshold_sums(b, a)
    with np.errstate(invalid="ignore", divide="ignore"):
        np.divide(num, den, out=num)
    return float(np.max(np.where(den > 0, num, -np.inf)))


def _threshold_sums(upper, lower) -> np.ndarray:
    """For k = 0..n: the sum of ``upper``'s first k terms plus the sum of ``lower``'s other terms, each a running
    sum (from the front and from the back) added in the arrays' order."""
    n = upper.size
    out, rest = np.empty(n + 1), np.empty(n + 1)
    out[0], rest[n] = 0.0, 0.0
    np.cumsum(upper, out=out[1:])
    np.cumsum(lower[::-1], out=rest[:n][::-1])
    out += rest
    return out


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
