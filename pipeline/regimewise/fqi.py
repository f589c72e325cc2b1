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
import scipy.linalg
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.exceptions import NotFittedError
from threadpoolctl import threadpool_limits

from .errors import StatisticalWarning, UserInputError
from .pessimism import PessimisticEnsemble, patient_bootstrap_weights

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


WELL_CONDITIONED = 1e8  # condition number of the Gram matrix below which the normal equations are used


def _least_squares(design, y, alpha):
    """Least squares with a ridge penalty ``alpha`` on every coefficient but the intercept.

    A well-conditioned problem is solved by the normal equations (Cholesky; fast, and equal to the SVD
    solution to rounding); a rank-deficient or ill-conditioned one, such as a saturated design with an
    intercept, by the minimum-norm SVD solution (``numpy.linalg.lstsq``).
    """
    gram = design.T @ design
    if alpha > 0:
        gram[1:, 1:] += alpha * np.eye(design.shape[1] - 1)
    rhs = design.T @ y
    if np.linalg.cond(gram) < WELL_CONDITIONED:
        return scipy.linalg.solve(gram, rhs, assume_a="pos")
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


def constrained_choice(score, behaviour_proba, support_threshold, rule_permitted=None):
    """Best permitted action per row, the best action ignoring the support constraint, and fallback rows.

    An action is permitted if its score (Q, or a pessimistic Q) is defined, the clinical rules allow it
    (``rule_permitted``, all True if None) and usual care gives it probability >= the support threshold
    (batch-constrained filtering, Fujimoto, Meger & Precup 2019). Without a permitted action, the choice is
    usual care's most likely action among the defined, rule-permitted ones (among the defined ones if the
    rules leave none).

    Returns
    -------
    choice, unconstrained, none_permitted : ndarray, shape (n,)
        ``unconstrained`` is the best defined, rule-permitted action without the support constraint (the
        fallback where the rules leave no defined action).
    """
    fitted = ~np.isnan(score)
    allowed = fitted if rule_permitted is None else fitted & np.asarray(rule_permitted, dtype=bool)
    permitted = allowed & (behaviour_proba >= support_threshold)
    none_permitted = ~permitted.any(axis=1)
    best = np.where(permitted, score, -np.inf).argmax(axis=1)
    fallback_set = np.where(allowed.any(axis=1)[:, None], allowed, fitted)
    fallback = np.where(fallback_set, behaviour_proba, -np.inf).argmax(axis=1)
    unconstrained = np.where(allowed.any(axis=1), np.where(allowed, score, -np.inf).argmax(axis=1), fallback)
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
        if isinstance(self.alpha, str) and self.alpha == "cv" and hasattr(self, "alpha_grid"):
            return
        if isinstance(self.alpha, str) or not (np.isfinite(self.alpha) and self.alpha >= 0):
            raise UserInputError(f"alpha (ridge penalty) must be >= 0 (or 'cv' when learning), got {self.alpha!r}.")

    def _next_value(self, q_next, proba_next):
        raise NotImplementedError

    def _checked_table(self, X, step, action, reward, episode, proba):
        """Check the parameters and the decision table; return step, action, episode, X, reward, proba."""
        self._check_params()
        step, action, episode = check_layout(step, action, episode, self.horizon, self.n_actions)
        X = check_finite(X, "X", 2)
        reward = check_finite(reward, "reward", 1)
        if not X.shape[0] == reward.shape[0] == step.shape[0]:
            raise UserInputError(
                f"X has {X.shape[0]} rows and reward {reward.shape[0]} but there are {step.shape[0]} decisions; "
                "pass one row per decision."
            )
        return step, action, episode, X, reward, check_proba(proba, step.shape[0], self.n_actions, self._proba_name)

    def _fit(self, X, step, action, reward, episode, proba):
        step, action, episode, X, reward, proba = self._checked_table(X, step, action, reward, episode, proba)
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

    _fitted_attribute = "coef_"

    def _checked_rows(self, X, step):
        """Check that the model is fitted and that X and step describe decisions it can score."""
        if not hasattr(self, self._fitted_attribute):
            raise NotFittedError(f"this {type(self).__name__} is not fitted yet; call fit(...) first.")
        X = check_finite(X, "X", 2)
        step = check_codes(step, "step", self.horizon)
        if X.shape != (step.shape[0], self.n_features_in_):
            raise UserInputError(
                f"X has shape {X.shape} but {step.shape[0]} decisions with the {self.n_features_in_} features "
                f"used in fit need ({step.shape[0]}, {self.n_features_in_})."
            )
        return X, step

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
        X, step = self._checked_rows(X, step)
        return np.einsum("nkp,np->nk", self.coef_[step], _design(X))


class LinearActionModel:
    """Linear Q-model in [1, X] with one coefficient vector per action (action-by-state interactions).

    Fitted by (weighted) minimum-norm least squares with a ridge penalty ``alpha`` on every coefficient but
    the intercept. Actions without rows (or with zero total weight) get NaN coefficients and Q.
    """

    def __init__(self, n_actions, alpha=0.0):
        self.n_actions = n_actions
        self.alpha = alpha

    def fit(self, X, action, y, weight=None):
        design = _design(X)
        if weight is not None:
            root = np.sqrt(weight)
            design, y = design * root[:, None], y * root
        self.coef_ = np.full((self.n_actions, design.shape[1]), np.nan)
        for a in range(self.n_actions):
            cell = (action == a) if weight is None else (action == a) & (weight > 0)
            if cell.any():
                self.coef_[a] = _least_squares(design[cell], y[cell], self.alpha)
        return self

    def predict(self, X):
        return _design(X) @ self.coef_.T


class BoostedActionModel:
    """Histogram gradient boosting regression of the target on the state and the one-hot action.

    scikit-learn's ``HistGradientBoostingRegressor`` (Ke et al. 2017, LightGBM-style binning; Friedman 2001)
    with early stopping off, so a fit depends only on its inputs and ``random_state``. Q(s, a) is the
    prediction at the state with action a switched on; NaN for actions without rows.
    """

    def __init__(self, n_actions, params=None, random_state=None):
        self.n_actions = n_actions
        self.params = params
        self.random_state = random_state

    def fit(self, X, action, y, weight=None):
        present = action if weight is None else action[weight > 0]
        self.seen_ = np.bincount(present, minlength=self.n_actions) > 0
        self.model_ = HistGradientBoostingRegressor(
            early_stopping=False, random_state=self.random_state, **(self.params or {})
        ).fit(np.hstack([X, np.eye(self.n_actions)[action]]), y, sample_weight=weight)
        return self

    def predict(self, X):
        n = X.shape[0]
        q = np.column_stack(
            [self.model_.predict(np.hstack([X, np.tile(np.eye(self.n_actions)[a], (n, 1))])) for a in range(self.n_actions)]
        )
        return np.where(self.seen_, q, np.nan)


def patient_folds(groups, n_folds, seed):
    """Fold (0..n_folds-1) of every row, all rows of a patient in one fold, patients shuffled by ``seed``."""
    codes = np.unique(np.asarray(groups), return_inverse=True)[1]
    order = np.random.default_rng(seed).permutation(int(codes.max()) + 1)
    return (order % n_folds)[codes]


def out_of_fold_errors(make_model, X, action, y, folds):
    """Squared error of each row's taken-action Q predicted by a model fitted without the row's fold."""
    error = np.full(y.shape[0], np.nan)
    for f in np.unique(folds):
        test = folds == f
        if test.all():
            continue
        model = make_model().fit(X[~test], action[~test], y[~test], None)
        q = model.predict(X[test])[np.arange(test.sum()), action[test]]
        error[test] = (q - y[test]) ** 2
    return error


def choose_ridge_alpha(n_actions, grid, X, action, y, folds):
    """Ridge penalty from ``grid`` with the smallest out-of-fold mean squared error (first on ties)."""
    scores = [
        np.nanmean(out_of_fold_errors(lambda a=alpha: LinearActionModel(n_actions, a), X, action, y, folds))
        for alpha in grid
    ]
    return float(grid[int(np.nanargmin(scores))])


class FittedQIteration(_BackwardQModel):
    """Learn a regime by fitted-Q iteration with clinical rules, a support constraint and optional pessimism.

    Two learning modes: ``"backward"`` fits one Q-model per decision step by finite-horizon backward
    induction (Murphy 2005; Chakraborty & Moodie 2013); ``"pooled"`` fits one Q-model for all steps with the
    decision index (step / (H - 1)) as an extra feature, iterating the Bellman targets (Ernst, Geurts &
    Wehenkel 2005) until no target moves by more than ``tolerance``. In both, a row whose episode ends gets
    no next-stage value, so episodes may stop early.

    Q-models: ``"linear"`` (one coefficient vector per action in [1, X]; ridge penalty ``alpha``, or chosen
    from ``alpha_grid`` by cross-validation with folds by patient when ``alpha="cv"``) or
    ``"gradient_boosting"`` (:class:`BoostedActionModel`). With ``pessimism`` set, every Q-model is a
    :class:`regimewise.pessimism.PessimisticEnsemble` and actions are ranked by Q − k·sd.

    The regime takes the permitted action with the best score: permitted = Q defined, allowed by the clinical
    rules (the ``rule_permitted`` mask passed to :meth:`fit` and :meth:`recommend`) and usual-care
    probability >= ``support_threshold``; with none permitted, usual care's most likely rule-permitted action.
    ``support_threshold=0`` without rules is plain Q-learning; a threshold above 1 reproduces usual care's most
    likely action. The same rule gives the next-state value during learning.

    Research use only: recommendations are not medical advice; decisions stay with licensed clinicians.

    Parameters
    ----------
    n_actions, horizon : int
    gamma : float, default 1.0
    support_threshold : float, default 0.05
    alpha : float or "cv", default 0.0
    q_model : {"linear", "gradient_boosting"}, default "linear"
    mode : {"backward", "pooled"}, default "backward"
    alpha_grid : sequence of float, default (0, 0.1, 1, 10, 100)
    cv_folds : int, default 5
        Folds by patient for ``alpha="cv"`` and for :attr:`oof_mse_`.
    tolerance : float, default 1e-6
    max_iterations : int, default 200
    boosting_params : dict or None
        Keyword arguments of ``HistGradientBoostingRegressor``.
    pessimism : float or None, default None
        k of the pessimistic score; None fits no ensemble (0 fits one and changes nothing).
    ensemble_size : int, default 20
    oof_error : bool, default False
        Compute the out-of-fold error of the final Q-models per step (extra fits).
    random_state : int or None

    Attributes
    ----------
    models_ : list
        The fitted Q-model of each step (backward) or a one-element list (pooled).
    coef_ : ndarray
        Linear Q-models only: (H, K, p + 1) in backward mode, (K, p + 2) in pooled mode; NaN for actions
        without rows.
    fitted_actions_ : ndarray of bool, shape (H, K)
    alpha_ : list of float
        Ridge penalty used by each model (linear only).
    n_iterations_, converged_ : int, bool
        Pooled mode: iterations run and whether the tolerance was met (backward: H, True).
    oof_mse_ : dict {step: mean squared error} or None
    n_changed_by_support_ : int
        Observed decisions where the best rule-permitted action differs from the regime's choice.
    n_without_permitted_action_ : int
        Observed decisions where nothing was permitted and the fallback was taken.

    References
    ----------
    Ernst, Geurts & Wehenkel (2005); Murphy (2005); Chakraborty & Moodie (2013); Fujimoto, Meger & Precup
    (2019); Jin, Yang & Wang (2021), see the module docstring and :mod:`regimewise.pessimism`.

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
    _fitted_attribute = "models_"

    def __init__(self, n_actions, horizon, gamma=1.0, support_threshold=0.05, alpha=0.0, q_model="linear",
                 mode="backward", alpha_grid=(0.0, 0.1, 1.0, 10.0, 100.0), cv_folds=5, tolerance=1e-6,
                 max_iterations=200, boosting_params=None, pessimism=None, ensemble_size=20, oof_error=False,
                 random_state=None):  # fmt: skip
        self.n_actions = n_actions
        self.horizon = horizon
        self.gamma = gamma
        self.support_threshold = support_threshold
        self.alpha = alpha
        self.q_model = q_model
        self.mode = mode
        self.alpha_grid = alpha_grid
        self.cv_folds = cv_folds
        self.tolerance = tolerance
        self.max_iterations = max_iterations
        self.boosting_params = boosting_params
        self.pessimism = pessimism
        self.ensemble_size = ensemble_size
        self.oof_error = oof_error
        self.random_state = random_state

    def _check_params(self):
        super()._check_params()
        if self.alpha == "cv" and self.q_model != "linear":
            raise UserInputError("alpha='cv' applies to the linear Q-model only; set a number or q_model='linear'.")
        if not self.support_threshold >= 0:
            raise UserInputError(f"support_threshold must be >= 0, got {self.support_threshold!r}.")
        if self.q_model not in ("linear", "gradient_boosting"):
            raise UserInputError(f"q_model must be 'linear' or 'gradient_boosting', got {self.q_model!r}.")
        if self.mode not in ("backward", "pooled"):
            raise UserInputError(f"mode must be 'backward' or 'pooled', got {self.mode!r}.")
        if self.pessimism is not None and not self.pessimism >= 0:
            raise UserInputError(f"pessimism must be None or >= 0, got {self.pessimism!r}.")

    # ------------------------------------------------------------------------------------------- models
    def _make_model(self, alpha, seed):
        if self.q_model == "linear":
            return lambda: LinearActionModel(self.n_actions, alpha)
        return lambda: BoostedActionModel(self.n_actions, self.boosting_params, seed)

    def _fit_model(self, X, action, y, rows):
        """One Q-model on the table rows ``rows`` (CV for the ridge penalty, ensemble if pessimistic)."""
        alpha = self.alpha
        if alpha == "cv":
            alpha = choose_ridge_alpha(self.n_actions, list(self.alpha_grid), X, action, y, self._folds[rows])
        self.alpha_.append(alpha)
        make = self._make_model(alpha, self._model_seed)
        if self._ensemble_weights is not None:
            return PessimisticEnsemble(make, self._ensemble_weights, self.pessimism).fit(X, action, y, rows), make
        return make().fit(X, action, y, None), make

    def _scores(self, model, X):
        return model.score(X) if hasattr(model, "score") else model.predict(X)

    def _pooled_X(self, X, step):
        return np.column_stack([X, np.asarray(step, dtype=float) / max(self.horizon - 1, 1)])

    def _mask_unfitted(self, q, step):
        return np.where(self.fitted_actions_[step], q, np.nan)

    def _raw(self, X, step, scores):
        """Q-values (or pessimistic scores) (n, K) of the fitted models at the given steps."""
        pick = self._scores if scores else (lambda model, Z: model.predict(Z))
        if self.mode == "pooled":
            return self._mask_unfitted(pick(self.models_[0], self._pooled_X(X, step)), step)
        q = np.full((X.shape[0], self.n_actions), np.nan)
        for t in np.unique(step):
            rows = step == t
            q[rows] = pick(self.models_[t], X[rows])
        return self._mask_unfitted(q, step)

    def _next_values(self, X, step, proba, rules):
        score = self._raw(X, step, scores=True)
        choice = constrained_choice(score, proba, self.support_threshold, rules)[0]
        return score[np.arange(choice.size), choice]

    # ------------------------------------------------------------------------------------------- learning
    def _fit_backward(self, X, step, action, reward, next_row, proba, rules):
        target = reward.copy()
        self.models_ = [None] * self.horizon
        makers = [None] * self.horizon
        for t in range(self.horizon - 1, -1, -1):
            rows = np.flatnonzero(step == t)
            if not rows.size:
                continue
            later = next_row[rows]
            cont, later = rows[later >= 0], later[later >= 0]
            if cont.size:
                target[cont] = reward[cont] + self.gamma * self._next_values(
                    X[later], step[later], proba[later], None if rules is None else rules[later]
                )
            self.models_[t], makers[t] = self._fit_model(X[rows], action[rows], target[rows], rows)
        self.n_iterations_, self.converged_ = self.horizon, True
        return target, makers

    def _fit_pooled(self, X, step, action, reward, next_row, proba, rules):
        Xp = self._pooled_X(X, step)
        cont = np.flatnonzero(next_row >= 0)
        later = next_row[cont]
        target = reward.copy()
        self.converged_ = False
        for iteration in range(1, self.max_iterations + 1):
            self.alpha_ = []
            model, make = self._fit_model(Xp, action, target, np.arange(step.size))
            self.models_ = [model]
            updated = reward.copy()
            if cont.size:
                updated[cont] += self.gamma * self._next_values(
                    X[later], step[later], proba[later], None if rules is None else rules[later]
                )
            change = float(np.max(np.abs(updated - target)))
            target = updated
            if change <= self.tolerance:
                self.converged_ = True
                break
        self.n_iterations_ = iteration
        if not self.converged_:
            warnings.warn(
                f"pooled fitted-Q iteration stopped after {iteration} iterations with targets still moving by "
                f"{change:.3g} > tolerance {self.tolerance:g}; raise max_iterations or the tolerance.",
                StatisticalWarning,
                stacklevel=3,
            )
        return target, [make]

    def _out_of_fold(self, X, step, action, target, makers):
        folds = self._folds
        if self.mode == "pooled":
            error = out_of_fold_errors(makers[0], self._pooled_X(X, step), action, target, folds)
        else:
            error = np.full(step.size, np.nan)
            for t in np.unique(step):
                rows = step == t
                error[rows] = out_of_fold_errors(makers[t], X[rows], action[rows], target[rows], folds[rows])
        return {int(t): float(np.nanmean(error[step == t])) for t in np.unique(step)}

    def fit(self, X, step, action, reward, episode, behaviour_proba, rule_permitted=None, groups=None):
        """Fit the Q-models; return ``self``.

        Parameters
        ----------
        X : ndarray, shape (n, p)
            State features at each decision.
        step, action, reward, episode : ndarray, shape (n,)
            Decision table in the layout described in the module docstring.
        behaviour_proba : ndarray, shape (n, K)
            Estimated usual-care probability of every action at each decision.
        rule_permitted : ndarray of bool, shape (n, K), optional
            Actions the clinical rules allow at each decision (all, if None).
        groups : ndarray, shape (n,), optional
            Patient of each decision: the unit of cross-validation folds and bootstrap resamples (episode
            if None).
        """
        step, action, episode, X, reward, proba = self._checked_table(X, step, action, reward, episode, behaviour_proba)
        rules = self._check_rules(rule_permitted, step.shape[0])
        groups = episode if groups is None else np.asarray(groups)
        fold_seed, model_seed, boot_seed = np.random.SeedSequence(self.random_state).spawn(3)
        self._folds = patient_folds(groups, self.cv_folds, fold_seed)
        self._model_seed = int(model_seed.generate_state(1)[0])
        self._ensemble_weights = None
        if self.pessimism is not None:
            self._ensemble_weights = patient_bootstrap_weights(groups, self.ensemble_size, boot_seed)
        counts = np.zeros((self.horizon, self.n_actions), dtype=np.int64)
        np.add.at(counts, (step, action), 1)
        self.fitted_actions_ = counts > 0
        self.n_features_in_ = X.shape[1]
        self.alpha_ = []
        learn = self._fit_pooled if self.mode == "pooled" else self._fit_backward
        with threadpool_limits(limits=1):  # many small tall-skinny solves: BLAS threads only contend
            target, makers = learn(X, step, action, reward, next_row_index(episode), proba, rules)
            self._set_coef()
            self.oof_mse_ = self._out_of_fold(X, step, action, target, makers) if self.oof_error else None
        self._warn_unfitted(step)
        choice, unconstrained, none_permitted = constrained_choice(
            self._raw(X, step, scores=True), proba, self.support_threshold, rules
        )
        self.n_changed_by_support_ = int(np.sum(choice != unconstrained))
        self.n_without_permitted_action_ = int(np.sum(none_permitted))
        return self

    def _check_rules(self, rule_permitted, n_rows):
        if rule_permitted is None:
            return None
        rules = np.asarray(rule_permitted)
        if rules.shape != (n_rows, self.n_actions) or rules.dtype != bool:
            raise UserInputError(
                f"rule_permitted must be a boolean array of shape ({n_rows}, {self.n_actions}), got {rules.dtype} "
                f"{rules.shape}; pass one column per action."
            )
        return rules

    def _set_coef(self):
        linear = [getattr(m, "full_", m) for m in self.models_ if m is not None]
        if self.q_model != "linear":
            return
        if self.mode == "pooled":
            self.coef_ = linear[0].coef_
            return
        p1 = self.n_features_in_ + 1
        self.coef_ = np.stack(
            [np.full((self.n_actions, p1), np.nan) if m is None else getattr(m, "full_", m).coef_ for m in self.models_]
        )

    # ------------------------------------------------------------------------------------------- using
    def q_values(self, X, step):
        """Fitted Q-values (n, K) of every action (full-sample models); NaN where an action is unseen at a step."""
        return self._raw(*self._checked_rows(X, step), scores=False)

    def scores(self, X, step):
        """The scores actions are ranked by: Q, or Q − k·sd with pessimism."""
        return self._raw(*self._checked_rows(X, step), scores=True)

    def recommend(self, X, step, behaviour_proba, rule_permitted=None):
        """The regime's action at each decision.

        Research use only: not medical advice; decisions stay with licensed clinicians, under local law and
        with ethics approval.

        Parameters
        ----------
        X : ndarray, shape (n, p)
        step : ndarray of int, shape (n,)
        behaviour_proba : ndarray, shape (n, K)
            Usual care's probabilities at these decisions (they decide which actions are supported).
        rule_permitted : ndarray of bool, shape (n, K), optional
            Actions the clinical rules allow at these decisions.

        Returns
        -------
        ndarray of int, shape (n,)
        """
        score = self.scores(X, step)
        behaviour_proba = check_proba(behaviour_proba, score.shape[0], self.n_actions, "behaviour_proba")
        empty = np.flatnonzero(np.isnan(score).all(axis=1))
        if empty.size:
            raise UserInputError(
                f"row {empty[0]} is at step {np.asarray(step)[empty[0]]}, which has no decisions in the training "
                "data; the regime is undefined there."
            )
        rules = self._check_rules(rule_permitted, score.shape[0])
        return constrained_choice(score, behaviour_proba, self.support_threshold, rules)[0]

    def recommend_proba(self, X, step, behaviour_proba, rule_permitted=None):
        """One-hot (n, K) probabilities of the regime, e.g. as ``target_proba`` for off-policy evaluation."""
        return np.eye(self.n_actions)[self.recommend(X, step, behaviour_proba, rule_permitted)]

    def predicted_value(self, X0, behaviour_proba0, rule_permitted0=None):
        """Mean fitted Q of the regime's choice over first decisions (in-sample; optimistic).

        The maximisation makes this an upward-biased estimate of the learned regime's value; use the
        off-policy estimators of :mod:`regimewise.ope` or fitted-Q evaluation on fresh data to report a value.
        """
        step0 = np.zeros(np.shape(X0)[0], dtype=int)
        choice = self.recommend(X0, step0, behaviour_proba0, rule_permitted0)
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
