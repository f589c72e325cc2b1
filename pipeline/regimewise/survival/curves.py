"""Weighted Kaplan–Meier curves of cloned data, restricted mean survival time and contrasts between strategies.

The weighted product-limit estimator on counting-process rows (at risk on ``(start, stop]``) is

    Ŝ(t) = Π_{τ_j <= t} (1 - d_j / Y_j),   d_j = Σ_i w_i 1{stop_i = τ_j, event_i},
                                           Y_j = Σ_i w_i 1{start_i < τ_j <= stop_i},

over the distinct event times τ_j. The curve is fitted with lifelines' ``KaplanMeierFitter`` (``entry``,
``weights``); :func:`product_limit` is an independent numpy implementation used to check it. A clone's row that
starts on a decision day τ continues the row that stopped there; lifelines 0.30 removes the rows entering at τ
from the risk set at τ (except at the first time of its table, time zero here, where no event occurs because
follow-up is positive), so it uses the ``(start, stop]`` risk set above and counts no clone twice; the tests check
this on clone rows whose breaks fall on event days. lifelines' pointwise interval assumes integer weights, so no
interval is reported here (intervals come from the patient bootstrap).

References
----------
Kaplan, E. L. & Meier, P. (1958). Nonparametric estimation from incomplete observations. JASA 53:457.
Xie, J. & Liu, C. (2005). Adjusted Kaplan–Meier estimator and log-rank test with inverse probability of treatment
weighting for survival data. Statistics in Medicine 24:3089.
Royston, P. & Parmar, M. K. B. (2013). Restricted mean survival time: an alternative to the hazard ratio for the
design and analysis of randomized trials with a time-to-event outcome. BMC Med Res Methodol 13:152.
Hernán, M. A. & Robins, J. M. (2020). Causal Inference: What If, ch. 17 (risk difference and ratio at a time).
"""

import math
import warnings
from dataclasses import dataclass

import numpy as np
from lifelines import KaplanMeierFitter
from lifelines.utils import restricted_mean_survival_time

from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.survival._checks import positive_number, time_points
from regimewise.survival._results import plain, plain_list

NON_INTEGER_WEIGHTS = r"It (looks like|appears) your weights are not integers"  # lifelines' interval caveat

__all__ = ["Contrast", "SurvivalCurve", "contrast", "kaplan_meier", "product_limit", "survival_curve"]


def product_limit(start, stop, event, weight, orders=None):
    """Weighted product-limit estimate from counting-process rows, in numpy.

    Parameters
    ----------
    start, stop : array_like, shape (N,)
        Each row is at risk on ``(start, stop]``.
    event : array_like of bool, shape (N,)
        Event at ``stop``.
    weight : array_like, shape (N,)
        Non-negative weight in force on the row.
    orders : tuple of ndarray, optional
        ``(np.argsort(stop), np.argsort(start))`` when already known (e.g. :attr:`CloneTable.sort_orders`); they
        must be those very arrays, since the order of tied times decides the order of the sums.

    Returns
    -------
    times : ndarray
        Distinct event times (with positive weight), increasing.
    survival : ndarray
        Ŝ at each of ``times``.

    References
    ----------
    Kaplan & Meier (1958), JASA 53:457; Xie & Liu (2005), Stat Med 24:3089.

    Examples
    --------
    >>> product_limit([0, 0, 0], [1, 2, 3], [True, False, True], [1.0, 1.0, 2.0])
    (array([1., 3.]), array([0.75, 0.  ]))
    """
    start, stop, weight = (np.asarray(x, dtype=float) for x in (start, stop, weight))
    event = np.asarray(event, dtype=bool) & (weight > 0)
    order_stop, order_start = (np.argsort(stop), np.argsort(start)) if orders is None else orders
    if order_stop.shape != stop.shape or order_start.shape != start.shape:
        raise UserInputError("product_limit orders must be the argsorts of these stop and start: drop them")
    sorted_stop = stop[order_stop]
    event_stops = sorted_stop[event[order_stop]]  # increasing: distinct values where they change
    times = event_stops[np.append(True, event_stops[1:] != event_stops[:-1])] if event_stops.size else event_stops
    died = np.bincount(np.searchsorted(times, stop[event]), weights=weight[event], minlength=times.shape[0])
    tail_stop = np.append(np.cumsum(weight[order_stop][::-1])[::-1], 0.0)
    tail_start = np.append(np.cumsum(weight[order_start][::-1])[::-1], 0.0)
    at_risk = (
        tail_stop[np.searchsorted(sorted_stop, times, side="left")]
        - tail_start[np.searchsorted(start[order_start], times, side="left")]
    )  # weight with stop >= τ minus weight with start >= τ: rows with start < τ <= stop
    return times, np.cumprod(1.0 - died / at_risk)


def step_value(times, step_times, step_survival, left=False):
    """Ŝ(t) (or Ŝ(t-) with ``left``) of a product-limit step function at ``times``."""
    index = np.searchsorted(step_times, np.asarray(times, dtype=float), side="left" if left else "right")
    return np.concatenate([[1.0], step_survival])[index]


def kaplan_meier(table, label=None):
    """lifelines ``KaplanMeierFitter`` fitted to a clone table (rows with positive weight).

    Parameters
    ----------
    table : CloneTable
    label : str, optional

    Returns
    -------
    lifelines.KaplanMeierFitter or None
        None when no row has a positive weight.
    """
    columns = _positive_weight_columns(table.rows)
    if columns["weights"].size == 0:
        return None
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=NON_INTEGER_WEIGHTS)
        return KaplanMeierFitter().fit(**columns, label=label or table.name)


def _positive_weight_columns(rows):
    """The ``stop``, ``event``, ``start`` and ``weight`` columns of the rows with a positive weight, as arrays
    named for ``KaplanMeierFitter.fit``; only the four columns are filtered (no other column is copied), and
    not at all when every weight is positive, as clone tables' weights are."""
    columns = {
        "durations": rows["stop"].to_numpy(dtype=float),
        "event_observed": rows["event"].to_numpy(dtype=bool),
        "entry": rows["start"].to_numpy(dtype=float),
        "weights": rows["weight"].to_numpy(dtype=float),
    }
    positive = columns["weights"] > 0
    if positive.all():
        return columns
    return {name: values[positive] for name, values in columns.items()}


@dataclass(frozen=True, eq=False)
class SurvivalCurve:
    """A strategy's survival on a time grid.

    Attributes
    ----------
    name : str
    times : ndarray
        Grid in days.
    survival, risk : ndarray
        Ŝ(t) and 1 - Ŝ(t) on the grid (NaN when no clone is left).
    rmst : float
        Restricted mean survival time ∫_0^horizon Ŝ(t) dt, in days.
    horizon : float
    median : float
        Smallest time with Ŝ(t) <= 0.5; inf when not reached.
    n_clones : int
    """

    name: str
    times: np.ndarray
    survival: np.ndarray
    risk: np.ndarray
    rmst: float
    horizon: float
    median: float
    n_clones: int

    def at(self, times):
        """Survival at grid times (each must be on the grid)."""
        times = np.atleast_1d(np.asarray(times, dtype=float))
        index = np.minimum(np.searchsorted(self.times, times), self.times.size - 1)
        if not np.all(self.times[index] == times):
            raise UserInputError(f"time(s) {times.tolist()} are not all on the grid of curve {self.name!r}: add them")
        return self.survival[index]

    def to_dict(self):
        """Plain JSON values (None for NaN or an unreached median); keys sorted."""
        out = {
            "name": self.name,
            "times": plain_list(self.times),
            "survival": plain_list(self.survival),
            "risk": plain_list(self.risk),
            "rmst": plain(self.rmst),
            "horizon": plain(self.horizon),
            "median": plain(self.median),
            "n_clones": self.n_clones,
        }
        return dict(sorted(out.items()))


def survival_curve(table, times, horizon):
    """Weighted Kaplan–Meier curve of a clone table on a time grid, with RMST at the horizon.

    Parameters
    ----------
    table : CloneTable
    times : array_like
        Grid in days, within [0, horizon] (the horizon is added if absent).
    horizon : float

    Returns
    -------
    SurvivalCurve

    References
    ----------
    Xie & Liu (2005), Stat Med 24:3089; Royston & Parmar (2013), BMC Med Res Methodol 13:152.
    """
    horizon = positive_number(horizon, "horizon")
    grid = np.union1d(time_points(times, horizon), [horizon])
    fitter = kaplan_meier(table)
    if fitter is None:
        warnings.warn(
            f"strategy {table.name!r}: no clone follows it at time zero; its curve is undefined",
            StatisticalWarning,
            stacklevel=2,
        )
        nan = np.full(grid.shape, np.nan)
        return SurvivalCurve(table.name, grid, nan, nan, math.nan, horizon, math.nan, table.n_clones)
    survival = fitter.survival_function_at_times(grid).to_numpy(dtype=float)
    rmst = float(restricted_mean_survival_time(fitter, t=horizon))
    return SurvivalCurve(
        name=table.name,
        times=grid,
        survival=survival,
        risk=1.0 - survival,
        rmst=rmst,
        horizon=horizon,
        median=float(fitter.median_survival_time_),
        n_clones=table.n_clones,
    )


@dataclass(frozen=True, eq=False)
class Contrast:
    """A strategy against a reference strategy at named times.

    Attributes
    ----------
    name, reference : str
    times : ndarray
    risk_difference : ndarray
        risk(strategy) - risk(reference).
    risk_ratio : ndarray
        risk(strategy) / risk(reference) (NaN where the reference risk is 0).
    survival_difference : ndarray
    rmst_difference : float
        RMST(strategy) - RMST(reference) at the horizon, in days.
    """

    name: str
    reference: str
    times: np.ndarray
    risk_difference: np.ndarray
    risk_ratio: np.ndarray
    survival_difference: np.ndarray
    rmst_difference: float

    def to_dict(self):
        """Plain JSON values (None for NaN); keys sorted."""
        out = {
            "name": self.name,
            "reference": self.reference,
            "times": plain_list(self.times),
            "risk_difference": plain_list(self.risk_difference),
            "risk_ratio": plain_list(self.risk_ratio),
            "survival_difference": plain_list(self.survival_difference),
            "rmst_difference": plain(self.rmst_difference),
        }
        return dict(sorted(out.items()))


def contrast(curve, reference, times):
    """Risk difference, risk ratio, survival difference and RMST difference of ``curve`` against ``reference``.

    Parameters
    ----------
    curve, reference : SurvivalCurve
        On grids containing ``times``, with the same horizon.
    times : array_like
        Named times in days (e.g. the horizon).

    Returns
    -------
    Contrast

    References
    ----------
    Hernán & Robins (2020), What If, ch. 17; Royston & Parmar (2013), BMC Med Res Methodol 13:152.
    """
    if curve.horizon != reference.horizon:
        raise UserInputError(f"curves {curve.name!r} and {reference.name!r} have different horizons: refit them")
    times = time_points(times, curve.horizon, "contrast times")
    risk, risk_ref = 1.0 - curve.at(times), 1.0 - reference.at(times)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(risk_ref > 0, risk / np.where(risk_ref > 0, risk_ref, 1.0), np.nan)
    return Contrast(
        name=curve.name,
        reference=reference.name,
        times=times,
        risk_difference=risk - risk_ref,
        risk_ratio=ratio,
        survival_difference=(1.0 - risk) - (1.0 - risk_ref),
        rmst_difference=curve.rmst - reference.rmst,
    )
