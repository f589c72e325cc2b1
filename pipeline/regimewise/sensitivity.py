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
import warnings
from dataclasses import dataclass

import numpy as np

from .errors import UserInputError
from .quantiles import bootstrap_quantile
from .weighting import kish_ess


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


def regime_value_bounds(returns, proba_taken, follows, episode, gamma, confounded=None) -> ValueBounds:
    """Bounds on a deterministic regime's weighted importance-sampling value under confounding strength Γ."""
    returns = np.asarray(returns, dtype=float)
    lower, upper = trajectory_weight_bounds(proba_taken, follows, episode, returns.size, gamma, confounded)
    return weighted_mean_bounds(returns, lower, upper, gamma)


def gamma_grid(gamma_max: float, precision: float) -> np.ndarray:
    """Γ = 1, 1 + precision, ..., up to gamma_max (the grid on which bounds and the tipping point are found)."""
    _check_gamma(gamma_max)
    return np.round(1.0 + precision * np.arange(int(round((gamma_max - 1.0) / precision)) + 1), 10)


def analysis_gammas(spec) -> np.ndarray:
    """The Γ grid of the protocol's precision up to gamma_max, plus every Γ the report's table shows."""
    return np.unique(np.concatenate([gamma_grid(spec.gamma_max, spec.precision), np.asarray(spec.gammas, float)]))


def bounds_curve(returns, proba_taken, follows, episode, gammas, confounded=None) -> np.ndarray:
    """Sharp bounds of the regime's weighted importance-sampling value at every Γ: array (len(gammas), 2).

    The returns are sorted once; each Γ only changes the weight box (Zhao, Small & Bhattacharya 2019).
    """
    returns = np.asarray(returns, dtype=float)
    order = np.argsort(-returns, kind="mergesort")
    out = np.empty((len(gammas), 2))
    for i, gamma in enumerate(gammas):
        lower, upper = trajectory_weight_bounds(proba_taken, follows, episode, returns.size, gamma, confounded)
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


def mean_difference_to_risk_ratio(difference: float, sd: float) -> float:
    """Approximate risk ratio of a difference in means: exp(0.91 · d) with d = difference / sd.

    The conversion VanderWeele & Ding (2017) suggest for continuous outcomes, after Chinn (2000, Stat Med
    19:3127); the 0.91 factor is recalled from memory.
    """
    if not (sd > 0 and math.isfinite(sd)):
        raise UserInputError("the outcome's standard deviation must be positive to convert a mean difference")
    return math.exp(0.91 * difference / sd)


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


# ---------------------------------------------------------------------------------------------- on the records
def confounded_mask(step: np.ndarray, spec) -> np.ndarray:
    """Decisions at which the protocol lets a hidden confounder act (all, the first, or listed steps)."""
    if spec.confounded_decisions == "all":
        return np.ones(step.shape, dtype=bool)
    if spec.confounded_decisions == "first":
        return step == 0
    return np.isin(step, spec.confounded_decisions)


def regime_curve(decisions, behaviour_proba, recommended, protocol, gammas=None) -> dict:
    """Bounds of the learned regime's weighted-IS value over the Γ grid, and usual care's observed mean return.

    Usual care's value is the observed mean return, which hidden confounding of the choices cannot change;
    so the contrast's bounds are the regime's bounds minus that mean. ``gammas`` defaults to the protocol's
    analysis grid (:func:`analysis_gammas`).
    """
    from .features import action_codes, episode_codes

    spec = protocol.sensitivity
    codes = action_codes(decisions, protocol.action_labels)
    episode = episode_codes(decisions)
    step = decisions["step"].to_numpy(dtype=np.int64)
    reward = decisions["reward"].to_numpy(dtype=float) * protocol.discount**step
    returns = np.bincount(episode, weights=reward, minlength=int(episode.max()) + 1)
    curve = bounds_curve(
        returns, behaviour_proba[np.arange(len(codes)), codes], np.asarray(recommended) == codes, episode,
        analysis_gammas(spec) if gammas is None else np.asarray(gammas, dtype=float), confounded_mask(step, spec),
    )  # fmt: skip
    follows_all = np.bincount(episode, weights=np.asarray(recommended) != codes, minlength=returns.size) == 0
    weights = np.where(follows_all, np.exp(np.bincount(
        episode, weights=-np.log(behaviour_proba[np.arange(len(codes)), codes]), minlength=returns.size)), 0.0)
    ess = kish_ess(weights) if weights.any() else 0.0
    return {"learned": curve, "usual_care": float(returns.mean()), "returns_sd": float(returns.std(ddof=1)),
            "ess": ess, "n_episodes": int(returns.size)}  # fmt: skip


def summarise_sensitivity(point: dict, replicates: list[dict], protocol, headline: dict | None) -> dict:
    """Point bounds, percentile-bootstrap intervals of the bounds, tipping point and E-values.

    The interval at Γ is [α/2 quantile of the replicates' lower bounds, 1 − α/2 quantile of their upper bounds]
    (Zhao, Small & Bhattacharya 2019, percentile bootstrap). The tipping point Γ* is the smallest Γ whose interval
    for the contrast includes zero.
    """
    spec, level = protocol.sensitivity, protocol.evaluation.interval_level
    gammas = analysis_gammas(spec)
    contrast = point["learned"] - point["usual_care"]
    low_q, high_q = (1 - level) / 2, 1 - (1 - level) / 2
    if replicates:
        reps = np.stack([np.asarray(r["learned"], dtype=float) - r["usual_care"] for r in replicates])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            limits = np.column_stack([bootstrap_quantile(reps[:, :, 0], low_q, axis=0),
                                      bootstrap_quantile(reps[:, :, 1], high_q, axis=0)])  # fmt: skip
    else:
        limits = np.full_like(contrast, np.nan)
    benefit = contrast[0, 0]
    sign = 1.0 if not np.isfinite(benefit) or benefit >= 0 else -1.0
    edge = limits[:, 0] if sign > 0 else -limits[:, 1]

    def edge_at(gamma):
        return edge[min(int(np.searchsorted(gammas, gamma - 1e-12)), len(gammas) - 1)]

    star = None if not np.all(np.isfinite(edge)) else tipping_point(edge_at, spec.gamma_max, spec.precision)
    shown = [int(np.searchsorted(gammas, g)) for g in spec.gammas]
    floor = max(protocol.evaluation.minimum_ess, protocol.evaluation.minimum_ess_fraction * point["n_episodes"])
    return {
        "estimator": "wis (trajectory-weighted importance sampling)",
        "ess": point["ess"],
        "low_ess": bool(point["ess"] < floor),
        "confounded_decisions": spec.confounded_decisions,
        "level": level,
        "replicates_used": len(replicates),
        "usual_care_mean_return": point["usual_care"],
        "table": [
            {
                "gamma": float(gammas[i]),
                "learned_lower": _plain(point["learned"][i, 0]), "learned_upper": _plain(point["learned"][i, 1]),
                "contrast_lower": _plain(contrast[i, 0]), "contrast_upper": _plain(contrast[i, 1]),
                "interval_low": _plain(limits[i, 0]), "interval_high": _plain(limits[i, 1]),
            }  # fmt: skip
            for i in shown
        ],
        "curve": {"gamma": gammas.tolist(), "interval_low": limits[:, 0].tolist(), "interval_high": limits[:, 1].tolist(),
                  "contrast_lower": contrast[:, 0].tolist(), "contrast_upper": contrast[:, 1].tolist()},  # fmt: skip
        "tipping_point": star,
        "gamma_max": spec.gamma_max,
        "precision": spec.precision,
        "e_values": headline_e_values(headline, point["returns_sd"]),
        "sentence": tipping_sentence(star, spec.gamma_max, benefit) if replicates else (
            "Without bootstrap replicates the bounds have no interval, so no tipping point is computed."
        ),
    }


def headline_e_values(headline: dict | None, returns_sd: float) -> dict | None:
    """E-values of the headline contrast and of its interval limit nearest zero (mean difference -> RR)."""
    if headline is None or headline.get("difference") is None or headline.get("low") is None:
        return None
    convert = lambda d: mean_difference_to_risk_ratio(d, returns_sd)  # noqa: E731
    low, high = headline["low"], headline["high"]
    return {
        "estimator": headline["estimator"],
        "difference": headline["difference"],
        "risk_ratio": convert(headline["difference"]),
        "e_value": e_value(convert(headline["difference"])),
        "e_value_interval": e_value_interval(convert(low), convert(high)),
        "conversion": "risk ratio ≈ exp(0.91 × difference / SD of returns) (VanderWeele & Ding 2017, after Chinn "
        "2000; factor from memory)",
    }


def tipping_sentence(star, gamma_max, benefit) -> str:
    """One plain sentence saying what the tipping point means."""
    if not np.isfinite(benefit):
        return "No episode follows the learned regime throughout, so its weighted value and its bounds are undefined."
    if star == 1.0:
        return ("Even without hidden confounding (Γ = 1) the interval for the learned-minus-usual-care difference "
                "includes zero, so there is no benefit for a hidden confounder to erase.")  # fmt: skip
    if star is None:
        return (f"Up to Γ = {gamma_max:g} the interval for the difference excludes zero: a hidden factor would have to "
                f"change the odds of clinicians' choices by more than {gamma_max:g}-fold to erase it.")  # fmt: skip
    return (f"A hidden factor that changed the odds of the action clinicians took by a factor of {star:.2f} "
            "(in either direction, at every confounded decision) would be enough to make the interval for the "
            "learned-minus-usual-care difference include zero.")  # fmt: skip
