"""Optional weighted Cox model of each strategy against a reference strategy on the cloned data.

The clones of all strategies are stacked; one indicator per non-reference strategy enters a Cox model fitted by
lifelines' ``CoxPHFitter`` with ``entry_col`` (the counting-process rows, at risk on ``(start, stop]``) and
``weights_col``. The standard errors are cluster-robust (clones of one patient together), computed here from the
score residuals of the counting-process Cox model (Lin & Wei 1989; Binder 1992) with Breslow's handling of ties:
lifelines 0.30's ``robust=True`` sandwich ignores ``entry_col`` (it builds risk sets as if every row started at
time zero) and loops over rows in Python, so it is neither right nor practical for cloned data.

Caution: a hazard ratio averages the hazards over a follow-up whose surviving population changes with the
strategy; it is not a causal contrast over time (Hernán 2010). The risk difference at the horizon stays the
headline; this model is a secondary summary.

References
----------
Hernán, M. A. (2010). The hazards of hazard ratios. Epidemiology 21:13.
Lin, D. Y. & Wei, L. J. (1989). The robust inference for the Cox proportional hazards model. JASA 84:1074.
Binder, D. A. (1992). Fitting Cox's proportional hazards models from survey data. Biometrika 79:139.
Breslow, N. (1974). Covariance analysis of censored survival data. Biometrics 30:89.
"""

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from lifelines import CoxPHFitter
from scipy.stats import norm

from regimewise.errors import UserInputError
from regimewise.survival._results import plain
from regimewise.survival.curves import NON_INTEGER_WEIGHTS

__all__ = ["CoxContrast", "robust_cox_covariance", "weighted_cox"]

CAUTION = (
    "A hazard ratio averages over a follow-up whose survivors differ between strategies; it is not a causal "
    "contrast over time (Hernán 2010, Epidemiology 21:13). Read the risk difference at the horizon first."
)


@dataclass(frozen=True)
class CoxContrast:
    """Hazard ratios of strategies against a reference from a weighted Cox model on cloned data.

    Attributes
    ----------
    reference : str
    names : tuple of str
    log_hazard_ratio, hazard_ratio, robust_se, ci_low, ci_high : tuple of float
        Per strategy; ``robust_se`` is on the log scale, the interval on the hazard-ratio scale.
    confidence : float
    n_rows, n_clusters : int
    caution : str
    """

    reference: str
    names: tuple
    log_hazard_ratio: tuple
    hazard_ratio: tuple
    robust_se: tuple
    ci_low: tuple
    ci_high: tuple
    confidence: float
    n_rows: int
    n_clusters: int
    caution: str = CAUTION

    def to_dict(self):
        """Plain JSON values; one entry per strategy; keys sorted."""
        strategies = {
            name: {
                "log_hazard_ratio": plain(b),
                "hazard_ratio": plain(h),
                "robust_se": plain(s),
                "ci_low": plain(lo),
                "ci_high": plain(hi),
            }
            for name, b, h, s, lo, hi in zip(
                self.names, self.log_hazard_ratio, self.hazard_ratio, self.robust_se, self.ci_low, self.ci_high
            )
        }
        out = {
            "reference": self.reference,
            "strategies": dict(sorted(strategies.items())),
            "confidence": self.confidence,
            "n_rows": self.n_rows,
            "n_clusters": self.n_clusters,
            "caution": self.caution,
        }
        return dict(sorted(out.items()))


def _cumulative_at(event_times, increments, times):
    """Σ_{τ_j <= t} increments_j at each of ``times`` (increments may be 2-D, one row per event time)."""
    total = np.concatenate([np.zeros((1, *increments.shape[1:])), np.cumsum(increments, axis=0)])
    return total[np.searchsorted(event_times, times, side="right")]


def _risk_sums(start, stop, values, event_times):
    """Σ_i values_i 1{start_i < τ <= stop_i} at each event time τ (values 2-D, one row per data row)."""
    by_stop, by_start = np.argsort(stop), np.argsort(start)
    tail_stop = np.vstack([np.cumsum(values[by_stop][::-1], axis=0)[::-1], np.zeros((1, values.shape[1]))])
    tail_start = np.vstack([np.cumsum(values[by_start][::-1], axis=0)[::-1], np.zeros((1, values.shape[1]))])
    return (
        tail_stop[np.searchsorted(stop[by_stop], event_times, side="left")]
        - tail_start[np.searchsorted(start[by_start], event_times, side="left")]
    )


def robust_cox_covariance(beta, x, start, stop, event, weight, cluster):
    """Cluster-robust (sandwich) covariance of a weighted counting-process Cox fit, Breslow ties.

    Parameters
    ----------
    beta : ndarray, shape (p,)
        Fitted log hazard ratios.
    x : ndarray, shape (N, p)
    start, stop, event, weight : ndarray, shape (N,)
        Rows at risk on ``(start, stop]``.
    cluster : array_like, shape (N,)
        Independent units (patients).

    Returns
    -------
    ndarray, shape (p, p)
        ``I⁻¹ (Σ_c U_c U_cᵀ) I⁻¹`` with ``U_c`` the summed weighted score residuals of cluster ``c``.

    References
    ----------
    Lin & Wei (1989), JASA 84:1074; Binder (1992), Biometrika 79:139.
    """
    risk = weight * np.exp(x @ beta)
    times = np.unique(stop[event])
    sums = _risk_sums(start, stop, np.column_stack([risk, risk[:, None] * x]), times)
    s0, xbar = sums[:, 0], sums[:, 1:] / sums[:, :1]
    deaths = np.bincount(np.searchsorted(times, stop[event]), weights=weight[event], minlength=times.shape[0])
    d_lambda = deaths / s0
    lam = _cumulative_at(times, d_lambda, stop) - _cumulative_at(times, d_lambda, start)
    g = _cumulative_at(times, xbar * d_lambda[:, None], stop) - _cumulative_at(times, xbar * d_lambda[:, None], start)
    at_event = xbar[np.minimum(np.searchsorted(times, stop), times.shape[0] - 1)]
    residual = np.where(event[:, None], x - at_event, 0.0) - np.exp(x @ beta)[:, None] * (x * lam[:, None] - g)
    scores = pd.DataFrame(weight[:, None] * residual).groupby(np.asarray(cluster), sort=False).sum().to_numpy()
    s2 = _risk_sums(start, stop, (risk[:, None, None] * x[:, :, None] * x[:, None, :]).reshape(x.shape[0], -1), times)
    s2 = s2.reshape(times.shape[0], x.shape[1], x.shape[1]) / s0[:, None, None]
    information = np.einsum("j,jab->ab", deaths, s2 - xbar[:, :, None] * xbar[:, None, :])
    inverse = np.linalg.inv(information)
    return inverse @ (scores.T @ scores) @ inverse


def _stack(tables, reference):
    """Rows of every table with positive weight, one indicator column per non-reference strategy."""
    names = [name for name in tables if name != reference]
    if reference not in tables or not names:
        raise UserInputError(f"weighted_cox needs the reference {reference!r} and at least one other strategy")
    frames = []
    for name, table in tables.items():
        rows = table.rows.loc[table.rows["weight"] > 0, ["patient_id", "start", "stop", "event", "weight"]]
        frames.append(rows.assign(**{f"x{k}": float(name == other) for k, other in enumerate(names)}))
    return names, pd.concat(frames, ignore_index=True)


def weighted_cox(tables, reference, confidence=0.95):
    """Weighted Cox model of each strategy against ``reference`` on stacked clone tables.

    Parameters
    ----------
    tables : dict of str to CloneTable
        Clone tables of the same cohort, keyed by strategy name.
    reference : str
        Key of the reference strategy (usually usual care).
    confidence : float
        Level of the Wald interval from the cluster-robust standard error.

    Returns
    -------
    CoxContrast

    References
    ----------
    Hernán (2010), Epidemiology 21:13; Lin & Wei (1989), JASA 84:1074; Binder (1992), Biometrika 79:139.
    """
    if not 0 < confidence < 1:
        raise UserInputError(f"confidence must lie in (0, 1); got {confidence!r}")
    names, data = _stack(dict(tables), reference)
    columns = [f"x{k}" for k in range(len(names))]
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=NON_INTEGER_WEIGHTS)
        fitter = CoxPHFitter().fit(
            data.drop(columns="patient_id"),
            duration_col="stop",
            event_col="event",
            entry_col="start",
            weights_col="weight",
        )
    beta = fitter.params_.loc[columns].to_numpy(dtype=float)
    covariance = robust_cox_covariance(
        beta,
        data[columns].to_numpy(float),
        data["start"].to_numpy(float),
        data["stop"].to_numpy(float),
        data["event"].to_numpy(bool),
        data["weight"].to_numpy(float),
        data["patient_id"].to_numpy(),
    )
    se = np.sqrt(np.diag(covariance))
    z = norm.ppf(0.5 + confidence / 2)
    return CoxContrast(
        reference=reference,
        names=tuple(names),
        log_hazard_ratio=tuple(beta.tolist()),
        hazard_ratio=tuple(np.exp(beta).tolist()),
        robust_se=tuple(se.tolist()),
        ci_low=tuple(np.exp(beta - z * se).tolist()),
        ci_high=tuple(np.exp(beta + z * se).tolist()),
        confidence=float(confidence),
        n_rows=len(data),
        n_clusters=int(data["patient_id"].nunique()),
    )
