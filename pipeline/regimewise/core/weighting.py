"""Inverse-probability weights, their diagnostics, and the IP-weighted difference in means.

References
----------
Robins, Hernán & Brumback (2000), Marginal structural models and causal inference in epidemiology,
Epidemiology 11:550. Cole & Hernán (2008), Constructing inverse probability weights for marginal structural
models, Am J Epidemiol 168:656. Hernán & Robins (2020), Causal Inference: What If, ch. 12.
Kish (1965), Survey Sampling, Wiley.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.core.arrays import as_actions
from regimewise.errors import UserInputError


def _as_vector(values, what):
    """Return ``values`` as a non-empty finite 1-D float array."""
    array = np.asarray(values, dtype=float)
    if array.ndim != 1 or array.size == 0:
        raise UserInputError(f"{what} must be a non-empty 1-D array; got shape {array.shape}")
    if not np.all(np.isfinite(array)):
        raise UserInputError(f"{what} has {int(np.sum(~np.isfinite(array)))} missing or infinite value(s)")
    return array


def _as_probability(values, what):
    """Probabilities of the action taken: each must lie in (0, 1] (positivity)."""
    array = _as_vector(values, what)
    if np.any(array <= 0) or np.any(array > 1):
        n_zero = int(np.sum(array <= 0))
        raise UserInputError(
            f"{what} must lie in (0, 1]; {n_zero} decision(s) have probability <= 0 and "
            f"{int(np.sum(array > 1))} have probability > 1: an action taken with zero estimated probability "
            "breaks positivity; check the usual-care model or restrict the cohort"
        )
    return array


def _as_weights(weights):
    array = _as_vector(weights, "weights")
    if np.any(array < 0) or array.sum() <= 0:
        raise UserInputError("weights must be non-negative with a positive sum")
    return array


def inverse_probability_weights(proba_taken):
    """Unstabilised inverse-probability weights ``1 / P(A = a_i | x_i)``.

    Parameters
    ----------
    proba_taken : array_like, shape (n,)
        Estimated probability of the action actually taken (e.g. ``probability_of_taken``).

    Returns
    -------
    ndarray, shape (n,)

    References
    ----------
    Horvitz & Thompson (1952), JASA 47:663; Hernán & Robins (2020), What If, section 12.2.

    Examples
    --------
    >>> inverse_probability_weights([0.5, 0.25])
    array([2., 4.])
    """
    return 1.0 / _as_probability(proba_taken, "proba_taken")


def stabilised_weights(proba_taken, marginal_taken):
    """Stabilised weights ``P(A = a_i) / P(A = a_i | x_i)``; their mean should be close to 1.

    Parameters
    ----------
    proba_taken : array_like, shape (n,)
        Estimated conditional probability of the action taken.
    marginal_taken : float or array_like, shape (n,)
        Marginal probability of the action taken (the numerator model, e.g. from
        :func:`marginal_probability_of_taken`).

    Returns
    -------
    ndarray, shape (n,)

    References
    ----------
    Robins, Hernán & Brumback (2000), Epidemiology 11:550; Cole & Hernán (2008), Am J Epidemiol 168:656
    (a mean far from 1 signals a misspecified model or non-positivity).

    Examples
    --------
    >>> stabilised_weights([0.5, 0.8], [0.4, 0.4])
    array([0.8, 0.5])
    """
    denominator = _as_probability(proba_taken, "proba_taken")
    numerator = np.broadcast_to(np.asarray(marginal_taken, dtype=float), denominator.shape)
    return _as_probability(numerator, "marginal_taken") / denominator


def marginal_probability_of_taken(action, n_actions):
    """Sample frequency of each decision's own action: the numerator of stabilised weights.

    Equals the fitted probability of an intercept-only logistic (or multinomial-logit) model.

    Examples
    --------
    >>> marginal_probability_of_taken([0, 1, 1, 1], 2)
    array([0.25, 0.75, 0.75, 0.75])
    """
    codes = as_actions(action, n_actions)
    if codes.size == 0:
        raise UserInputError("action is empty; the marginal probability needs at least one decision")
    frequency = np.bincount(codes, minlength=n_actions) / codes.size
    return frequency[codes]


def kish_ess(weights):
    """Kish's effective sample size ``(sum w)^2 / sum w^2``.

    Equals n for equal weights and 1 when a single weight is non-zero.

    References
    ----------
    Kish (1965), Survey Sampling, Wiley, section 11.7.

    Examples
    --------
    >>> kish_ess([1.0, 1.0, 1.0, 1.0])
    4.0
    """
    # A vector read once into contiguous memory and summed once: a finite positive sum with no negative weight
    # means every weight is finite and non-negative, so the checks of _as_weights run only when it is not (and
    # raise, saying what is wrong). Sums read the same in any stride, so a strided column of a weight grid gives
    # the same number as its copy.
    w = np.ascontiguousarray(weights, dtype=float)
    total = w.sum() if w.ndim == 1 and w.size else np.nan
    if not (np.isfinite(total) and total > 0 and w.min() >= 0):
        w = _as_weights(w)
        total = w.sum()
    return float(total**2 / np.sum(w**2))


def weight_summary(weights):
    """Distribution of the weights, as JSON-ready floats.

    Returns
    -------
    dict
        ``n``; ``mean``; ``sd`` (sample standard deviation, ddof = 1; 0 for a single weight); ``min``; ``p01``,
        ``median``, ``p99`` (linearly interpolated quantiles, Hyndman & Fan 1996 type 7); ``max``; ``ess``
        (:func:`kish_ess`).

    Examples
    --------
    >>> weight_summary([1.0, 1.0])["ess"]
    2.0
    """
    w = _as_weights(weights)
    p01, median, p99 = np.quantile(w, [0.01, 0.5, 0.99])
    return {
        "n": int(w.size),
        "mean": float(w.mean()),
        "sd": float(w.std(ddof=1)) if w.size > 1 else 0.0,
        "min": float(w.min()),
        "p01": float(p01),
        "median": float(median),
        "p99": float(p99),
        "max": float(w.max()),
        "ess": kish_ess(w),
    }


@dataclass(frozen=True)
class WeightedMeanDifference:
    """IP-weighted difference in mean outcome (treated minus untreated) with a robust 95% interval."""

    estimate: float
    se: float
    conf_int: tuple[float, float]
    n_obs: int
    n_clusters: int


def ipw_mean_difference(outcome, treated, weights, cluster=None):
    """IP-weighted difference in means with a robust (sandwich) standard error.

    Fits the weighted linear model ``E[Y | A] = b0 + b1 A`` by generalised estimating equations with an
    independence working correlation (statsmodels ``GEE`` with ``Independence`` and ``weights``) and reports
    ``b1`` with its robust standard error and a Wald 95% interval, as Hernán & Robins do with R ``geeglm``
    (What If, ch. 12, Program 12.3). The robust variance has no small-sample correction; without ``cluster``
    every row is its own cluster, which equals weighted least squares with the HC0 sandwich.

    Parameters
    ----------
    outcome : array_like, shape (n,)
    treated : array_like of {0, 1}, shape (n,)
    weights : array_like, shape (n,)
        Non-negative weights (e.g. :func:`stabilised_weights`).
    cluster : array_like, shape (n,), optional
        Cluster labels (e.g. patient) for the sandwich; rows of one cluster are treated as correlated.

    Returns
    -------
    WeightedMeanDifference

    References
    ----------
    Liang & Zeger (1986), Biometrika 73:13; Hernán & Robins (2020), Causal Inference: What If, ch. 12.

    Examples
    --------
    >>> result = ipw_mean_difference([1.0, 2.0, 3.0, 5.0], [0, 0, 1, 1], [1.0, 1.0, 1.0, 1.0])
    >>> result.estimate
    2.5
    """
    y = _as_vector(outcome, "outcome")
    a = _as_vector(treated, "treated")
    w = _as_weights(weights)
    if not (y.size == a.size == w.size):
        raise UserInputError(f"outcome, treated and weights differ in length ({y.size}, {a.size}, {w.size})")
    if not np.all(np.isin(a, (0.0, 1.0))) or np.unique(a).size < 2:
        raise UserInputError("treated must be coded 0/1 and contain both groups")
    groups = np.arange(y.size) if cluster is None else _cluster_codes(cluster, y.size)
    import statsmodels.api as sm  # here, not at the top: most jobs that read this module never fit a GEE

    model = sm.GEE(y, sm.add_constant(a), groups=groups, cov_struct=sm.cov_struct.Independence(), weights=w)
    result = model.fit()
    low, high = np.asarray(result.conf_int(alpha=0.05))[1]
    return WeightedMeanDifference(
        estimate=float(result.params[1]),
        se=float(result.bse[1]),
        conf_int=(float(low), float(high)),
        n_obs=int(y.size),
        n_clusters=int(np.unique(groups).size),
    )


def _cluster_codes(cluster, n_rows):
    labels = np.asarray(cluster)
    if labels.ndim != 1 or labels.size != n_rows:
        raise UserInputError(f"cluster must be 1-D with one label per row ({n_rows}); got shape {labels.shape}")
    codes, _ = pd.factorize(labels)
    if np.any(codes < 0):
        raise UserInputError("cluster has missing labels; give every row a cluster (e.g. its patient id)")
    return codes


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
