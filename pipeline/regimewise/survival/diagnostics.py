"""Diagnostics of a strategy's clones over follow-up: how many still follow it and how much the weights carry.

At each grid time t the *risk set* holds the clone rows at risk at t: ``start < t <= stop`` (at t = 0, the rows
starting at time zero). Over it:

* ``n_following``: clones still following the strategy and in follow-up (unweighted count);
* ``sum_weights`` against ``expected_sum = n · Ŝ(t-)``: with correct weights the weighted risk set reproduces the
  n clones who would still be event-free under the strategy (the check of Cole & Hernán 2008 that weights average
  about 1, carried over time); a ratio far from 1 points to a misspecified usual-care or dropout model, or to
  dropout left unweighted;
* Kish's effective sample size ``(Σw)² / Σw²`` and the largest weight.

A strategy is *unreliable from time t on* at the first grid time whose effective sample size falls below
``min_ess``; every later time is flagged too, because fewer clones follow as time passes.

References
----------
Kish, L. (1965). Survey Sampling. Wiley (effective sample size).
Cole, S. R. & Hernán, M. A. (2008). Constructing inverse probability weights for marginal structural models.
Am J Epidemiol 168:656.
"""

from dataclasses import dataclass

import numpy as np

from regimewise.errors import UserInputError
from regimewise.survival._checks import positive_number, time_points
from regimewise.survival._results import plain, plain_list
from regimewise.survival.curves import product_limit, step_value

__all__ = ["FollowDiagnostics", "follow_diagnostics"]


@dataclass(frozen=True, eq=False)
class FollowDiagnostics:
    """Per-time diagnostics of one strategy's clones (see the module docstring).

    Attributes
    ----------
    name : str
    times : ndarray
    n_following : ndarray of int
    sum_weights, expected_sum, weight_ratio, ess, max_weight : ndarray
        ``weight_ratio = sum_weights / expected_sum``; ``max_weight`` is NaN for an empty risk set.
    min_ess : float
    unreliable_from : float
        First grid time with ESS below ``min_ess`` (NaN if none).
    reliable : ndarray of bool
    """

    name: str
    times: np.ndarray
    n_following: np.ndarray
    sum_weights: np.ndarray
    expected_sum: np.ndarray
    weight_ratio: np.ndarray
    ess: np.ndarray
    max_weight: np.ndarray
    min_ess: float
    unreliable_from: float
    reliable: np.ndarray

    def to_dict(self):
        """Plain JSON values (None for NaN); keys sorted."""
        out = {
            "name": self.name,
            "times": plain_list(self.times),
            "n_following": plain_list(self.n_following),
            "sum_weights": plain_list(self.sum_weights),
            "expected_sum": plain_list(self.expected_sum),
            "weight_ratio": plain_list(self.weight_ratio),
            "ess": plain_list(self.ess),
            "max_weight": plain_list(self.max_weight),
            "min_ess": plain(self.min_ess),
            "unreliable_from": plain(self.unreliable_from),
            "reliable": plain_list(self.reliable),
        }
        return dict(sorted(out.items()))


def _risk_set_summaries(start, stop, weight, times):
    """Count, Σw, Σw² and max w of the rows at risk at each time."""
    out = np.zeros((times.shape[0], 4))
    for j, t in enumerate(times):
        at_risk = (start < t) & (t <= stop) if t > 0 else (start <= 0) & (stop > 0)
        w = weight[at_risk]
        out[j] = (w.shape[0], w.sum(), np.square(w).sum(), w.max() if w.size else np.nan)
    return out


def follow_diagnostics(table, times, min_ess, horizon=None):
    """Clones still following, weight sums, effective sample size and largest weight at each time.

    Parameters
    ----------
    table : CloneTable
    times : array_like
        Grid in days (>= 0, and <= ``horizon`` when given).
    min_ess : float
        Smallest acceptable Kish effective sample size (a project setting).
    horizon : float, optional
        Checks the grid against it.

    Returns
    -------
    FollowDiagnostics

    References
    ----------
    Kish (1965), Survey Sampling; Cole & Hernán (2008), Am J Epidemiol 168:656.
    """
    min_ess = positive_number(min_ess, "min_ess")
    limit = np.inf if horizon is None else positive_number(horizon, "horizon")
    times = time_points(times, limit)
    rows = table.rows
    start, stop = rows["start"].to_numpy(float), rows["stop"].to_numpy(float)
    weight = rows["weight"].to_numpy(float)
    if np.any(weight < 0):
        raise UserInputError(f"clone table {table.name!r} has negative weights: rebuild it with clone_censor_weight")
    count, total, squares, largest = _risk_set_summaries(start, stop, weight, times).T
    step_times, step_survival = product_limit(start, stop, rows["event"].to_numpy(bool), weight, table.sort_orders)
    expected = table.n_clones * step_value(times, step_times, step_survival, left=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        ess = np.where(squares > 0, total**2 / np.where(squares > 0, squares, 1.0), 0.0)
        ratio = np.where(expected > 0, total / np.where(expected > 0, expected, 1.0), np.nan)
    low = np.flatnonzero(ess < min_ess)
    reliable = np.ones(times.shape[0], dtype=bool)
    if low.size:
        reliable[low[0] :] = False
    return FollowDiagnostics(
        name=table.name,
        times=times,
        n_following=count.astype(np.int64),
        sum_weights=total,
        expected_sum=expected,
        weight_ratio=ratio,
        ess=ess,
        max_weight=largest,
        min_ess=min_ess,
        unreliable_from=float(times[low[0]]) if low.size else float("nan"),
        reliable=reliable,
    )
