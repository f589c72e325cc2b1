"""Inverse-probability-of-censoring weights for loss to follow-up (dropout).

A pooled logistic regression over the kept decision intervals of :class:`~regimewise.survival.Timeline`
models ``h_t = P(dropout in interval t | still followed at decision t, state s_t, step t)``. The outcome is 1 on
the last interval of a dropout episode (no event, follow-up ending before the horizon) and 0 elsewhere; episodes
with an event or reaching the horizon are never dropouts. Time enters as one indicator per step (a saturated
baseline, as in a discrete-time Kaplan–Meier of censoring); a step with no dropout in the fitted data has
``ĥ = 0``, which is the limit of the unpenalised maximum-likelihood fit, so its rows are left out of the fit.

The weight in force during interval t is ``1 / Π_{u<=t} (1 - ĥ_u)``: dropout in interval t is taken to precede
any event in it, the usual convention of discrete-time inverse-probability-of-censoring weighting (Robins &
Finkelstein 2000; Hernán, Brumback & Robins 2000). Pre-decision intervals carry weight 1, and an episode lost
before its first decision cannot inform the model (it is counted in ``n_dropouts_before_first_decision_``).

Switching the model off assumes dropout is independent of the outcome given nothing (non-informative censoring).

References
----------
Robins, J. M. & Finkelstein, D. M. (2000). Correcting for noncompliance and dependent censoring in an AIDS clinical
trial with inverse probability of censoring weighted (IPCW) log-rank tests. Biometrics 56:779.
Hernán, M. A., Brumback, B. & Robins, J. M. (2000). Marginal structural models to estimate the causal effect of
zidovudine on the survival of HIV-positive men. Epidemiology 11:561.
D'Agostino, R. B., Lee, M.-L., Belanger, A. J., Cupples, L. A., Anderson, K. & Kannel, W. B. (1990). Relation of
pooled logistic regression to time dependent Cox regression analysis. Statistics in Medicine 9:1501.
"""

import warnings

import numpy as np
import pandas as pd
import statsmodels.api as sm
from statsmodels.tools.sm_exceptions import ConvergenceWarning, PerfectSeparationWarning

from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.survival._checks import as_float_array

__all__ = ["DropoutModel"]


def _states(timeline, states):
    """States at the kept decisions as a float matrix (m, p); p may be 0."""
    if states is None:
        return np.zeros((timeline.row.shape[0], 0))
    array = as_float_array(states, "dropout states")
    if array.ndim == 1:
        array = array[:, None]
    if array.ndim != 2 or array.shape[0] != timeline.n_decisions:
        raise UserInputError(
            f"dropout states have shape {array.shape} but {timeline.n_decisions} rows are needed: one per decision"
        )
    array = array[timeline.row]
    if not np.all(np.isfinite(array)):
        raise UserInputError("dropout states have missing or infinite values: impute them before the survival stage")
    return array


def _outcome(timeline):
    """1 on the last kept interval of each dropout episode."""
    last = timeline.stop == timeline.end[timeline.episode]
    return (last & timeline.dropout[timeline.episode]).astype(float)


class DropoutModel:
    """Pooled logistic model of loss to follow-up, giving inverse-probability-of-censoring weights.

    Parameters
    ----------
    max_iter : int
        Iterations of the statsmodels GLM fit (iteratively reweighted least squares).

    Attributes
    ----------
    params_ : ndarray
        Coefficients: intercept, standardised states, then indicators of ``steps_with_dropout_[1:]``.
    steps_with_dropout_ : ndarray of int
        Steps with at least one dropout in the fitted data (other steps get ĥ = 0).
    mean_, scale_ : ndarray
        Standardisation of the states (scale 0 marks a constant column, left out).
    n_dropouts_ : int
        Dropouts seen at a kept decision.
    n_dropouts_before_first_decision_ : int
        Dropouts before their first decision (not modelled).

    References
    ----------
    Robins & Finkelstein (2000), Biometrics 56:779; Hernán, Brumback & Robins (2000), Epidemiology 11:561.

    Examples
    --------
    >>> import pandas as pd
    >>> d = pd.DataFrame({"episode_id": list("aabb"), "step": [0, 1, 0, 1], "day": [0, 10, 0, 10],
    ...                   "action": [0, 0, 0, 0]})
    >>> e = pd.DataFrame({"episode_id": ["a", "b"], "followup_days": [15, 30], "event": [0, 0]})
    >>> from regimewise.survival import make_timeline
    >>> tl = make_timeline(d, e, [[1.0, 0.0]] * 4, horizon=30)
    >>> DropoutModel().fit(tl).weights(tl).tolist()
    [1.0, 2.0, 1.0, 2.0]
    """

    def __init__(self, max_iter=100):
        self.max_iter = max_iter

    def _design(self, timeline, states, rows):
        """Intercept, standardised non-constant states and step indicators for ``rows``."""
        x = _states(timeline, states)[rows]
        keep = self.scale_ > 0
        x = (x[:, keep] - self.mean_[keep]) / self.scale_[keep]
        step = timeline.step[rows]
        dummies = (step[:, None] == self.steps_with_dropout_[None, 1:]).astype(float)
        return np.column_stack([np.ones(step.shape[0]), x, dummies])

    def fit(self, timeline, states=None):
        """Fit the model on every kept decision interval; returns self."""
        x = _states(timeline, states)
        y = _outcome(timeline)
        self.n_dropouts_ = int(y.sum())
        self.n_dropouts_before_first_decision_ = int(np.sum(timeline.dropout & (timeline.first_day >= timeline.end)))
        self.steps_with_dropout_ = np.unique(timeline.step[y == 1])
        rows = np.isin(timeline.step, self.steps_with_dropout_)
        self.mean_ = x[rows].mean(axis=0) if rows.any() else np.zeros(x.shape[1])
        self.scale_ = x[rows].std(axis=0) if rows.any() else np.zeros(x.shape[1])
        self.params_ = np.zeros(0)
        if self.n_dropouts_ == 0:
            return self
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", ConvergenceWarning)
            warnings.simplefilter("always", PerfectSeparationWarning)
            result = sm.GLM(y[rows], self._design(timeline, states, rows), family=sm.families.Binomial()).fit(
                maxiter=self.max_iter
            )
        if any(issubclass(w.category, (ConvergenceWarning, PerfectSeparationWarning)) for w in caught):
            warnings.warn(
                "the dropout model did not converge cleanly (perfect separation or too few iterations): its weights "
                "may be extreme; use fewer state columns for dropout or raise max_iter",
                StatisticalWarning,
                stacklevel=2,
            )
        self.params_ = np.asarray(result.params, dtype=float)
        return self

    def predict_proba(self, timeline, states=None):
        """Probability ĥ_t of dropping out in each kept decision interval (``timeline.row`` order)."""
        if not hasattr(self, "params_"):
            raise UserInputError("DropoutModel is not fitted: call fit(timeline, states) first")
        hazard = np.zeros(timeline.row.shape[0])
        rows = np.isin(timeline.step, self.steps_with_dropout_)
        if self.params_.size and rows.any():
            eta = self._design(timeline, states, rows) @ self.params_
            hazard[rows] = 1.0 / (1.0 + np.exp(-eta))
        return hazard

    def weights(self, timeline, states=None):
        """Inverse-probability-of-censoring weight in force in each kept interval: 1 / Π_{u<=t} (1 - ĥ_u)."""
        stay = 1.0 - self.predict_proba(timeline, states)
        if np.any(stay <= 0):
            raise UserInputError(
                "the dropout model predicts certain dropout for some decisions: drop the state column that "
                "separates dropouts perfectly, or switch the dropout model off with the assumption stated"
            )
        return 1.0 / pd.Series(stay).groupby(timeline.episode, sort=False).cumprod().to_numpy()
