"""Fitted-Q evaluation: the value of a given (possibly stochastic) regime by backward regression of
r + γ Σ_a π(a | s') Q(s', a) (Le, Voloshin & Yue 2019, ICML). Shares the backward induction of
:mod:`regimewise.regime.qmodels` with the fitted-Q iteration that learns a regime.
"""

from __future__ import annotations

import numpy as np

from regimewise.core.arrays import check_codes, check_proba
from regimewise.core.terms import SEPARATE
from regimewise.errors import UserInputError
from regimewise.regime.qmodels import BackwardQModel, policy_average


class FittedQEvaluation(BackwardQModel):
    """Value a given regime off-policy by fitted-Q evaluation (Le, Voloshin & Yue 2019).

    The backward induction of :class:`FittedQIteration`, with the next-state value
    V_{t+1}(s') = Σ_a π(a|s') Q_{t+1}(s', a) of the evaluated regime π instead of a maximum.

    Parameters
    ----------
    n_actions : int
    horizon : int
    gamma : float, default 1.0
    alpha : float, default 0.0
        Ridge penalty on the non-intercept coefficients.
    action_labels : sequence of str, optional
        The protocol's label of each action code, used to name actions in warnings and errors.
    slopes : ActionSlopes, optional
        Each action fitted on its own (default) or slopes shared across actions
        (:class:`regimewise.core.terms.ActionSlopes`).

    Attributes
    ----------
    coef_ : ndarray, shape (H, K, p + 1)
    fitted_actions_ : ndarray of bool, shape (H, K)
    n_features_in_ : int

    References
    ----------
    Le, H., Voloshin, C. & Yue, Y. (2019). Batch policy learning under constraints. ICML.

    Examples
    --------
    >>> X = np.ones((4, 1))
    >>> fqe = FittedQEvaluation(n_actions=2, horizon=1).fit(
    ...     X, step=[0, 0, 0, 0], action=[0, 0, 1, 1], reward=[1.0, 3.0, 0.0, 2.0], episode=[0, 1, 2, 3],
    ...     target_proba=np.tile([0.5, 0.5], (4, 1)))
    >>> round(fqe.value_estimate(X[:1], np.array([[0.0, 1.0]])), 6)
    1.0
    """

    _proba_name = "target_proba"

    def __init__(self, n_actions, horizon, gamma=1.0, alpha=0.0, action_labels=None, slopes=SEPARATE):
        self.n_actions = n_actions
        self.horizon = horizon
        self.gamma = gamma
        self.alpha = alpha
        self.action_labels = action_labels
        self.slopes = slopes

    def _next_value(self, q_next, proba_next):
        return policy_average(q_next, proba_next, self.action_labels)

    def fit(self, X, step, action, reward, episode, target_proba):
        """Fit the Q-models of the evaluated regime backwards from the last step; return ``self``.

        Parameters
        ----------
        X : ndarray, shape (n, p)
        step, action, reward, episode : ndarray, shape (n,)
        target_proba : ndarray, shape (n, K)
            Probability the evaluated regime gives each action at each observed decision.
        """
        self._fit(X, step, action, reward, episode, target_proba)
        return self

    def state_values(self, X, step, target_proba):
        """V̂_t(s) = Σ_a π(a|s) Q̂_t(s, a) at each decision."""
        q = self.q_values(X, step)
        return policy_average(
            q, check_proba(target_proba, q.shape[0], self.n_actions, "target_proba"), self.action_labels
        )

    def taken_and_target_values(self, X, step, action, target_proba):
        """Q̂ of the taken action and V̂ of the evaluated regime at each decision (doubly robust inputs)."""
        q = self.q_values(X, step)
        action = check_codes(action, "action", self.n_actions)
        if action.shape[0] != q.shape[0]:
            raise UserInputError(
                f"action has {action.shape[0]} values for {q.shape[0]} decisions; pass one per decision."
            )
        v = policy_average(q, check_proba(target_proba, q.shape[0], self.n_actions, "target_proba"), self.action_labels)
        return q[np.arange(q.shape[0]), action], v

    def value_estimate(self, X0, target_proba0):
        """Estimated value of the regime: mean over first decisions of Σ_a π(a|s_0) Q̂_0(s_0, a)."""
        return float(np.mean(self.state_values(X0, np.zeros(np.shape(X0)[0], dtype=int), target_proba0)))
