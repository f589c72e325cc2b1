"""Finite-horizon fitted-Q iteration (learning a regime) and fitted-Q evaluation (valuing a given regime).

Both run the same backward induction over decision steps. At the last step the reward is regressed on state
and action; at each earlier step the regression target is the reward plus the discounted value of the next
state, where that value is either the best permitted action's Q (learning) or the evaluated regime's average
of Q over actions (evaluation). Rows whose episode ends at a step get no next-stage value.

Data layout (shared with :mod:`regimewise.ope`): long-format numpy arrays, one row per decision, rows
sorted by episode then step; ``X`` (n, p) numeric state features, ``step`` (n,) codes 0..H-1 consecutive
within an episode (an episode may end before the horizon H), ``action`` (n,) codes 0..K-1, ``reward`` (n,)
observed after the action, ``episode`` (n,) codes 0..E-1 in contiguous blocks, and a probability matrix
(n, K) per decision (usual care's, or the evaluated regime's).

Research use only: a learned regime is not medical advice; treatment decisions stay with licensed
clinicians, under local law and with ethics approval.

References
----------
Ernst, D., Geurts, P. & Wehenkel, L. (2005). Tree-based batch mode reinforcement learning. JMLR 6, 503-556.
Murphy, S. A. (2005). A generalization error for Q-learning. JMLR 6, 1073-1097.
Chakraborty, B. & Moodie, E. E. M. (2013). Statistical Methods for Dynamic Treatment Regimes. Springer.
Fujimoto, S., Meger, D. & Precup, D. (2019). Off-policy deep reinforcement learning without exploration.
ICML (batch-constrained action filtering).
Le, H., Voloshin, C. & Yue, Y. (2019). Batch policy learning under constraints. ICML (fitted-Q evaluation).
"""

import warnings

import numpy as np
from sklearn.exceptions import NotFittedError

from .errors import StatisticalWarning, UserInputError

_LAYOUT_HINT = "rows must be sorted by episode then step, episodes coded 0..E-1 in contiguous blocks"
_PROBA_TOLERANCE = 1e-6

# ---------------------------------------------------------------------------------------------------------
# the decision-table layout, shared with ope.py


def next_row_index(episode):
    """Index of the next row of the same episode for every row, or -1 on an episode's last row.

    Parameters
    ----------
    episode : ndarray of int, shape (n,)
        Episode codes, rows sorted by episode then step.

    Returns
    -------
    ndarray of int, shape (n,)

    Examples
    --------
    >>> next_row_index(np.array([0, 0, 1, 2, 2, 2])).tolist()
    [1, -1, -1, 4, 5, -1]
    """
    episode = np.asarray(episode)
    following = np.full(episode.shape[0], -1)
    same = episode[1:] == episode[:-1]
    following[:-1][same] = np.flatnonzero(same) + 1
    return following


def check_codes(values, name, upper=None):
    """Return ``values`` as a 1-D int array after checking they are whole numbers in [0, upper)."""
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise UserInputError(f"{name} must be one-dimensional, got shape {arr.shape}; pass one value per decision.")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        if not np.issubdtype(arr.dtype, np.number) or not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
            raise UserInputError(f"{name} must hold whole-number codes; recode it as integers 0, 1, 2, ...")
    arr = arr.astype(np.int64)
    bad = np.flatnonzero((arr < 0) | ((arr >= upper) if upper is not None else False))
    if bad.size:
        limit = f"0..{upper - 1}" if upper is not None else ">= 0"
        raise UserInputError(f"{name} at row {bad[0]} is {arr[bad[0]]}, outside {limit}; recode it or raise the limit.")
    return arr


def check_finite(values, name, ndim):
    """Return ``values`` as a float array of dimension ``ndim`` after checking there is no NaN or infinity."""
    arr = np.asarray(values, dtype=float)
    if arr.ndim != ndim:
        raise UserInputError(f"{name} must be {ndim}-dimensional, got shape {arr.shape}.")
    bad = np.argwhere(~np.isfinite(arr))
    if bad.size:
        raise UserInputError(f"{name} has a missing or infinite value at {tuple(bad[0])}; impute or drop that row.")
    return arr


def check_proba(proba, n_rows, n_actions, name):
    """Return a probability matrix (n_rows, n_actions) after checking its shape, range and row sums."""
    arr = check_finite(proba, name, 2)
    if arr.shape != (n_rows, n_actions):
        raise UserInputError(
            f"{name} has shape {arr.shape} but {n_rows} decisions and {n_actions} actions need "
            f"({n_rows}, {n_actions}); pass one column per action code."
        )
    bad = np.flatnonzero((arr < 0).any(axis=1) | (arr > 1).any(axis=1))
    bad = bad if bad.size else np.flatnonzero(np.abs(arr.sum(axis=1) - 1) > _PROBA_TOLERANCE)
    if bad.size:
        raise UserInputError(
            f"{name} row {bad[0]} is not a probability distribution ({arr[bad[0]].tolist()}); "
            "each row must lie in [0, 1] and sum to 1."
        )
    return arr


def check_layout(step, action, episode, horizon, n_actions):
    """Validate the step, action and episode codes of a decision table and return them as int arrays."""
    step = check_codes(step, "step", horizon)
    action = check_codes(action, "action", n_actions)
    episode = check_codes(episode, "episode")
    if not step.size:
        raise UserInputError("the decision table is empty; pass at least one decision.")
    if not step.shape == action.shape == episode.shape:
        raise UserInputError(
            f"step, action and episode have lengths {step.size}, {action.size}, {episode.size}; "
            "pass one value per decision in each."
        )
    jumps = np.diff(episode, prepend=0)
    bad = np.flatnonzero((jumps < 0) | (jumps > 1) | (np.arange(jumps.size) == 0) & (jumps != 0))
    if bad.size:
        raise UserInputError(f"episode codes break at row {bad[0]}: {_LAYOUT_HINT}.")
    expected = np.where(jumps == 1, 0, np.concatenate([[0], step[:-1] + 1]))
    bad = np.flatnonzero(step != expected)
    if bad.size:
        raise UserInputError(
            f"step at row {bad[0]} is {step[bad[0]]} but {expected[bad[0]]} was expected: steps run 0, 1, 2, ... "
            f"within an episode and {_LAYOUT_HINT}."
        )
    return step, action, episode


# ---------------------------------------------------------------------------------------------------------
# the shared backward induction


def _design(X):
    """Design matrix [1, X] of the linear Q-model."""
    return np.hstack([np.ones((X.shape[0], 1)), X])


def _least_squares(design, y, alpha):
    """Minimum-norm least squares, with a ridge penalty ``alpha`` on every coefficient but the intercept."""
    if alpha > 0:
        penalty = np.sqrt(alpha) * np.eye(design.shape[1])[1:]
        design = np.vstack([design, penalty])
        y = np.concatenate([y, np.zeros(penalty.shape[0])])
    return np.linalg.lstsq(design, y, rcond=None)[0]


def _backward_induction(X, step, action, reward, next_row, *, horizon, n_actions, gamma, alpha, next_value):
    """Coefficients (H, K, p + 1) of the per-step, per-action linear Q-models; NaN where an action has no rows.

    ``next_value(q_next, rows)`` returns the value of the next state for the next-step rows ``rows``, given
    their Q-values ``q_next`` (NaN for actions without a fitted model).
    """
    design = _design(X)
    coef = np.full((horizon, n_actions, design.shape[1]), np.nan)
    target = reward.copy()
    for t in range(horizon - 1, -1, -1):
        rows = np.flatnonzero(step == t)
        later = next_row[rows]
        cont, later = rows[later >= 0], later[later >= 0]
        if cont.size:
            q_next = design[later] @ coef[t + 1].T
            target[cont] = reward[cont] + gamma * next_value(q_next, later)
        for a in range(n_actions):
            cell = rows[action[rows] == a]
            if cell.size:
                coef[t, a] = _least_squares(design[cell], target[cell], alpha)
    return coef


def _policy_average(q, proba):
    """Σ_a π(a|s) Q(s, a) per row; actions the policy never takes are skipped even where Q is undefined."""
    undefined = (proba > 0) & np.isnan(q)
    if undefined.any():
        row, a = np.argwhere(undefined)[0]
        raise UserInputError(
            f"the evaluated regime gives action {a} probability {proba[row, a]:.3g} at a decision where that "
            "action never occurs in the data at that step, so its value cannot be fitted; restrict the regime "
            "to actions seen at every step."
        )
    return np.where(proba > 0, proba * np.nan_to_num(q), 0.0).sum(axis=1)


def _constrained_choice(q, behaviour_proba, support_threshold):
    """Best permitted action per row, the unconstrained best action, and where no action was permitted.

    An action is permitted if its Q is defined and usual care gives it probability >= the support threshold
    (batch-constrained filtering, Fujimoto, Meger & Precup 2019). Without a permitted action, the choice is
    usual care's most likely action among those with a defined Q.
    """
    fitted = ~np.isnan(q)
    permitted = fitted & (behaviour_proba >= support_threshold)
    none_permitted = ~permitted.any(axis=1)
    best = np.where(permitted, q, -np.inf).argmax(axis=1)
    fallback = np.where(fitted, behaviour_proba, -np.inf).argmax(axis=1)
    unconstrained = np.where(fitted, q, -np.inf).argmax(axis=1)
    return np.where(none_permitted, fallback, best), unconstrained, none_permitted


# ---------------------------------------------------------------------------------------------------------
# estimators


class _BackwardQModel:
    """Parameter checks, fitting and prediction shared by fitted-Q iteration and fitted-Q evaluation."""

    _proba_name = "proba"

    def _check_params(self):
        if not (isinstance(self.n_actions, (int, np.integer)) and self.n_actions >= 1):
            raise UserInputError(f"n_actions must be a positive integer, got {self.n_actions!r}.")
        if not (isinstance(self.horizon, (int, np.integer)) and self.horizon >= 1):
            raise UserInputError(f"horizon must be a positive integer, got {self.horizon!r}.")
        if not 0.0 <= self.gamma <= 1.0:
            raise UserInputError(f"gamma must lie in [0, 1], got {self.gamma!r}.")
        if not (np.isfinite(self.alpha) and self.alpha >= 0):
            raise UserInputError(f"alpha (ridge penalty) must be >= 0, got {self.alpha!r}.")

    def _next_value(self, q_next, proba_next):
        raise NotImplementedError

    def _fit(self, X, step, action, reward, episode, proba):
        self._check_params()
        step, action, episode = check_layout(step, action, episode, self.horizon, self.n_actions)
        X = check_finite(X, "X", 2)
        reward = check_finite(reward, "reward", 1)
        if not X.shape[0] == reward.shape[0] == step.shape[0]:
            raise UserInputError(
                f"X has {X.shape[0]} rows and reward {reward.shape[0]} but there are {step.shape[0]} decisions; "
                "pass one row per decision."
            )
        proba = check_proba(proba, step.shape[0], self.n_actions, self._proba_name)
        coef = _backward_induction(
            X, step, action, reward, next_row_index(episode),
            horizon=self.horizon, n_actions=self.n_actions, gamma=self.gamma, alpha=self.alpha,
            next_value=lambda q_next, rows: self._next_value(q_next, proba[rows]),
        )
        self.coef_ = coef
        self.fitted_actions_ = ~np.isnan(coef[..., 0])
        self.n_features_in_ = X.shape[1]
        self._warn_unfitted(step)
        return step, X, proba

    def _warn_unfitted(self, step):
        seen = np.bincount(step, minlength=self.horizon) > 0
        missing = np.argwhere(seen[:, None] & ~self.fitted_actions_)
        if missing.size:
            cells = ", ".join(f"step {t} action {a}" for t, a in missing)
            warnings.warn(
                f"no decisions with {cells}: their Q is undefined there and they are never recommended.",
                StatisticalWarning,
                stacklevel=4,
            )

    def _check_is_fitted(self):
        if not hasattr(self, "coef_"):
            raise NotFittedError(f"this {type(self).__name__} is not fitted yet; call fit(...) first.")

    def q_values(self, X, step):
        """Fitted Q-values of every action at each decision.

        Parameters
        ----------
        X : ndarray, shape (n, p)
        step : ndarray of int, shape (n,)

        Returns
        -------
        ndarray, shape (n, K)
            NaN for an action that never occurs at that step in the training data.
        """
        self._check_is_fitted()
        X = check_finite(X, "X", 2)
        step = check_codes(step, "step", self.horizon)
        if X.shape != (step.shape[0], self.n_features_in_):
            raise UserInputError(
                f"X has shape {X.shape} but {step.shape[0]} decisions with the {self.n_features_in_} features "
                f"used in fit need ({step.shape[0]}, {self.n_features_in_})."
            )
        return np.einsum("nkp,np->nk", self.coef_[step], _design(X))


class FittedQIteration(_BackwardQModel):
    """Learn a regime by finite-horizon fitted-Q iteration with a support constraint.

    The Q-model at each step is linear in [1, X] with one coefficient vector per action (action-by-state
    interactions), fitted by minimum-norm least squares, optionally with a ridge penalty. The regime takes the
    permitted action with the highest Q, where an action is permitted if usual care gives it probability at
    least ``support_threshold``; with no permitted action it takes usual care's most likely action.
    ``support_threshold=0`` is plain Q-learning; a threshold above 1 reproduces usual care's most likely
    action. The same rule gives the next-state value during the backward induction.

    Research use only: recommendations are not medical advice; decisions stay with licensed clinicians.

    Parameters
    ----------
    n_actions : int
        Number of action codes K.
    horizon : int
        Number of decision steps H.
    gamma : float, default 1.0
        Discount factor in [0, 1].
    support_threshold : float, default 0.05
        Minimum usual-care probability for an action to be recommended (τ).
    alpha : float, default 0.0
        Ridge penalty on the non-intercept coefficients.

    Attributes
    ----------
    coef_ : ndarray, shape (H, K, p + 1)
        Intercept and slopes of each step's and action's Q-model; NaN where the action has no rows.
    fitted_actions_ : ndarray of bool, shape (H, K)
        Whether each step's and action's Q is defined.
    n_features_in_ : int
    n_changed_by_support_ : int
        Observed decisions where the unconstrained best action differs from the regime's choice.
    n_without_permitted_action_ : int
        Observed decisions where no action was permitted and usual care's most likely action was taken.

    References
    ----------
    Ernst, Geurts & Wehenkel (2005), JMLR 6:503; Murphy (2005), JMLR 6:1073; Chakraborty & Moodie (2013),
    Statistical Methods for Dynamic Treatment Regimes, ch. 3; Fujimoto, Meger & Precup (2019), ICML.

    Examples
    --------
    >>> X = np.array([[0.0], [1.0], [0.0], [1.0]])
    >>> model = FittedQIteration(n_actions=2, horizon=1, support_threshold=0.0).fit(
    ...     X, step=[0, 0, 0, 0], action=[0, 0, 1, 1], reward=[1.0, 0.0, 0.0, 2.0], episode=[0, 1, 2, 3],
    ...     behaviour_proba=np.full((4, 2), 0.5))
    >>> model.recommend(X, [0, 0, 0, 0], np.full((4, 2), 0.5)).tolist()
    [0, 1, 0, 1]
    """

    _proba_name = "behaviour_proba"

    def __init__(self, n_actions, horizon, gamma=1.0, support_threshold=0.05, alpha=0.0):
        self.n_actions = n_actions
        self.horizon = horizon
        self.gamma = gamma
        self.support_threshold = support_threshold
        self.alpha = alpha

    def _check_params(self):
        super()._check_params()
        if not self.support_threshold >= 0:
            raise UserInputError(f"support_threshold must be >= 0, got {self.support_threshold!r}.")

    def _next_value(self, q_next, proba_next):
        choice = _constrained_choice(q_next, proba_next, self.support_threshold)[0]
        return q_next[np.arange(choice.size), choice]

    def fit(self, X, step, action, reward, episode, behaviour_proba):
        """Fit the Q-models backwards from the last step; return ``self``.

        Parameters
        ----------
        X : ndarray, shape (n, p)
            State features at each decision.
        step, action, reward, episode : ndarray, shape (n,)
            Decision table in the layout described in the module docstring.
        behaviour_proba : ndarray, shape (n, K)
            Estimated usual-care probability of every action at each decision.
        """
        step, X, behaviour_proba = self._fit(X, step, action, reward, episode, behaviour_proba)
        choice, unconstrained, none_permitted = _constrained_choice(
            self.q_values(X, step), behaviour_proba, self.support_threshold
        )
        self.n_changed_by_support_ = int(np.sum(choice != unconstrained))
        self.n_without_permitted_action_ = int(np.sum(none_permitted))
        return self

    def recommend(self, X, step, behaviour_proba):
        """The regime's action at each decision.

        Research use only: not medical advice; decisions stay with licensed clinicians, under local law and
        with ethics approval.

        Parameters
        ----------
        X : ndarray, shape (n, p)
        step : ndarray of int, shape (n,)
        behaviour_proba : ndarray, shape (n, K)
            Usual care's probabilities at these decisions (they decide which actions are permitted).

        Returns
        -------
        ndarray of int, shape (n,)
        """
        q = self.q_values(X, step)
        behaviour_proba = check_proba(behaviour_proba, q.shape[0], self.n_actions, "behaviour_proba")
        empty = np.flatnonzero(np.isnan(q).all(axis=1))
        if empty.size:
            raise UserInputError(
                f"row {empty[0]} is at step {np.asarray(step)[empty[0]]}, which has no decisions in the training "
                "data; the regime is undefined there."
            )
        return _constrained_choice(q, behaviour_proba, self.support_threshold)[0]

    def recommend_proba(self, X, step, behaviour_proba):
        """One-hot (n, K) probabilities of the regime, e.g. as ``target_proba`` for off-policy evaluation."""
        return np.eye(self.n_actions)[self.recommend(X, step, behaviour_proba)]

    def predicted_value(self, X0, behaviour_proba0):
        """Mean fitted Q of the regime's choice over first decisions (in-sample; optimistic).

        The maximisation makes this an upward-biased estimate of the learned regime's value; use the
        off-policy estimators of :mod:`regimewise.ope` or fitted-Q evaluation on fresh data to report a value.
        """
        step0 = np.zeros(np.shape(X0)[0], dtype=int)
        choice = self.recommend(X0, step0, behaviour_proba0)
        return float(np.mean(self.q_values(X0, step0)[np.arange(choice.size), choice]))


class FittedQEvaluation(_BackwardQModel):
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

    def __init__(self, n_actions, horizon, gamma=1.0, alpha=0.0):
        self.n_actions = n_actions
        self.horizon = horizon
        self.gamma = gamma
        self.alpha = alpha

    def _next_value(self, q_next, proba_next):
        return _policy_average(q_next, proba_next)

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
        return _policy_average(q, check_proba(target_proba, q.shape[0], self.n_actions, "target_proba"))

    def taken_and_target_values(self, X, step, action, target_proba):
        """Q̂ of the taken action and V̂ of the evaluated regime at each decision (doubly robust inputs)."""
        q = self.q_values(X, step)
        action = check_codes(action, "action", self.n_actions)
        if action.shape[0] != q.shape[0]:
            raise UserInputError(
                f"action has {action.shape[0]} values for {q.shape[0]} decisions; pass one per decision."
            )
        v = _policy_average(q, check_proba(target_proba, q.shape[0], self.n_actions, "target_proba"))
        return q[np.arange(q.shape[0]), action], v

    def value_estimate(self, X0, target_proba0):
        """Estimated value of the regime: mean over first decisions of Σ_a π(a|s_0) Q̂_0(s_0, a)."""
        return float(np.mean(self.state_values(X0, np.zeros(np.shape(X0)[0], dtype=int), target_proba0)))
