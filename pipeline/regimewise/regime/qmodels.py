"""Per-action Q-models and the backward induction they share: least squares with a ridge penalty (optionally
chosen by cross-validation with folds by patient) or gradient boosting, one model per decision step.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from regimewise.core.arrays import (
    action_name,
    check_codes,
    check_finite,
    check_layout,
    check_proba,
    next_row_index,
    step_order,
)
from regimewise.core.terms import SEPARATE
from regimewise.errors import StatisticalWarning, UserInputError


def _design(X):
    """Design matrix [1, X] of the linear Q-model."""
    return np.hstack([np.ones((X.shape[0], 1)), X])


Q_BLOCK_ROWS = 100_000  # rows per block of q_values: 100k x 4 actions x 21 coefficients = 67 MB of copies

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
        y = np.concatenate([y, np.zeros((penalty.shape[0],) + np.shape(y)[1:])])
    return np.linalg.lstsq(design, y, rcond=None)[0]


def _least_squares_columns(design, y, alpha):
    """:func:`_least_squares` of each column of ``y`` (n, R) on the same design, (p + 1, R).

    The Gram matrix and its condition number are computed once; each column is then solved exactly as
    :func:`_least_squares` solves a single response, so a column's coefficients do not depend on the others.
    """
    gram = design.T @ design
    if alpha > 0:
        gram[1:, 1:] += alpha * np.eye(design.shape[1] - 1)
    # each response as its own contiguous vector: a strided column can take another summation path in BLAS,
    # which would make a regime's coefficients depend (at rounding level) on how many regimes share the pass
    columns = [np.ascontiguousarray(y[:, j]) for j in range(y.shape[1])]
    if np.linalg.cond(gram) >= WELL_CONDITIONED:
        return np.column_stack([_least_squares(design, column, alpha) for column in columns])
    return np.column_stack([scipy.linalg.solve(gram, design.T @ column, assume_a="pos") for column in columns])


def _shared_design(design, action, present, interactions):
    """The design of the shared-slope fit: [the columns of ``design`` other than ``interactions`` (intercept
    first), a 0/1 column per action present but the first, each action's own copy of the ``interactions``
    columns (zero on the other actions' rows)]."""
    J = list(interactions)
    keep = [j for j in range(design.shape[1]) if j not in set(J)]
    indicators = [(action == a).astype(float)[:, None] for a in present]
    return np.hstack([design[:, keep], *indicators[1:], *(design[:, J] * i for i in indicators)]), keep


def _shared_solve(Z, y, alpha, unpenalised):
    """Least squares of ``y`` (n,) or (n, R) on the shared design ``Z`` with a ridge penalty ``alpha`` on every
    coefficient but those at ``unpenalised`` (the intercept and the actions' intercept shifts). Every action's
    slopes on the interaction columns are its own and penalised alike, so the fit does not depend on which action
    comes first. Each response column is solved on its own, as :func:`_least_squares_columns`."""
    penalty = np.full(Z.shape[1], float(alpha))
    penalty[list(unpenalised)] = 0.0
    gram = Z.T @ Z + np.diag(penalty)
    columns = [y] if y.ndim == 1 else [np.ascontiguousarray(y[:, j]) for j in range(y.shape[1])]
    if np.linalg.cond(gram) < WELL_CONDITIONED:
        solved = [scipy.linalg.solve(gram, Z.T @ c, assume_a="pos") for c in columns]
    else:
        root = (np.sqrt(penalty)[:, None] * np.eye(Z.shape[1]))[penalty > 0]
        augmented, pad = np.vstack([Z, root]), np.zeros(root.shape[0])
        solved = [np.linalg.lstsq(augmented, np.concatenate([c, pad]), rcond=None)[0] for c in columns]
    return solved[0] if y.ndim == 1 else np.column_stack(solved)


def _rooted(design, y, weight):
    """``design`` and ``y`` with every row multiplied by the square root of its ``weight``, in place: the caller
    passes rows gathered for this fit (copies of its own). ``weight`` None or boolean (rows kept or left out, each
    kept row's weight 1): the arrays as they are."""
    if weight is None or weight.dtype == bool:
        return design, y
    root = np.sqrt(weight)
    design *= root[:, None]
    y *= root if y.ndim == 1 else root[:, None]
    return design, y


ROOTED_BLOCK_ROWS = 4096  # rows gathered and weighted at a time by _gathered_rooted: 4,096 x 21 columns = 688 kB


def _gathered_rooted(design, y, rows, weight):
    """:func:`_rooted` of ``design[rows]`` and ``y[rows]`` with the ``weight`` (positive) of those rows: the same
    arrays, element for element (each is one product of a gathered value and its row's square root).

    A bootstrap fit gathers most of an action's rows: gathering them all and then multiplying them in a second
    pass read and wrote the whole copy twice, out of the cache; here each block of rows is multiplied while it is
    still in the cache."""
    root = np.sqrt(weight)
    out = np.empty((rows.size, design.shape[1]))
    for start in range(0, rows.size, ROOTED_BLOCK_ROWS):
        block = out[start : start + ROOTED_BLOCK_ROWS]
        np.take(design, rows[start : start + ROOTED_BLOCK_ROWS], axis=0, out=block, mode="clip")
        block *= root[start : start + ROOTED_BLOCK_ROWS, None]
    target = y[rows]
    target *= root if target.ndim == 1 else root[:, None]
    return out, target


@dataclass(frozen=True)
class ActionCells:
    """Each action's rows of one table, gathered once (separate slopes: every action is fitted on its own rows).

    A bootstrap ensemble fits the same table 1 + B times with other row weights (:mod:`regimewise.regime.pessimism`).
    Selecting an action's rows from the whole design again for every fit (a comparison over all rows, then a
    gather of rows spread over the table) took more time than the least-squares fits; with the cells, a fit
    gathers the rows of positive weight out of the action's own compact rows. The rows, their order and so every
    number a fit sees are the same: ``rows[a]`` are the positions of action ``a``'s rows in ascending order, as
    ``numpy.flatnonzero`` of the action's mask gives them, and ``design[a]``, ``y[a]`` the table's rows of [1, X]
    and y there. Built from the states X, action by action, so together they hold [1, X] once: the whole table's
    design is not built beside them.
    """

    rows: tuple
    design: tuple
    y: tuple

    @classmethod
    def gather(cls, X, action, y, n_actions) -> ActionCells:
        rows = tuple(np.flatnonzero(action == a) for a in range(n_actions))
        return cls(rows, tuple(_design(X[r]) for r in rows), tuple(y[r] for r in rows))

    @property
    def width(self) -> int:
        """Columns of the design [1, X]."""
        return self.design[0].shape[1]

    def weighted(self, a, weight):
        """Action ``a``'s rows of positive ``weight`` (all of them if None), multiplied by the square roots of their
        weights: the design and the response :func:`fit_actions` fits action ``a`` on."""
        if weight is None:
            return self.design[a], self.y[a]
        w = weight[self.rows[a]]
        kept = np.flatnonzero(w > 0)
        if weight.dtype == bool:
            return self.design[a][kept], self.y[a][kept]
        return _gathered_rooted(self.design[a], self.y[a], kept, w[kept])


def fit_actions(design, action, y, alpha, n_actions, slopes=SEPARATE, weight=None, cells=None):
    """Coefficients of every action's linear Q-model on ``design`` ([1, X]): (K, p + 1), or (K, p + 1, R) when
    ``y`` is (n, R); NaN for an action without rows (or without positive weight).

    ``slopes`` (:class:`regimewise.core.terms.ActionSlopes`) says whether each action is fitted on its own rows
    (separate) or all actions in one fit with common slopes (shared), returned as each action's coefficient
    vector: intercept β₀ + γ_a, the common slopes θ, and the action's own slopes on the interaction columns.
    ``weight`` (n,) fits weighted least squares (rows of zero weight are left out; a boolean ``weight`` only
    selects the rows, the same numbers as fitting the selected rows alone). ``cells``
    (:class:`ActionCells` of the table's X, ``action`` and ``y``; separate slopes only) saves selecting each
    action's rows again when the same table is fitted with several weights: the same numbers; ``design`` may
    then be None.
    """
    keep_rows = np.ones(len(action), dtype=bool) if weight is None else weight > 0
    coef = np.full((n_actions, cells.width if design is None else design.shape[1]) + np.shape(y)[1:], np.nan)

    def rooted(rows):
        return _rooted(design[rows], y[rows], None if weight is None else weight[rows])

    if not slopes.shared:
        for a in range(n_actions):
            if cells is None:
                d, t = rooted(np.flatnonzero((action == a) & keep_rows))
            else:
                d, t = cells.weighted(a, weight)
            if d.shape[0]:
                coef[a] = _least_squares(d, t, alpha) if y.ndim == 1 else _least_squares_columns(d, t, alpha)
        return coef
    rows = np.flatnonzero(keep_rows)
    present = np.flatnonzero(np.bincount(action[rows], minlength=n_actions) > 0)
    if not present.size:
        return coef
    J = list(slopes.interactions)
    Z, keep = _shared_design(design[rows], action[rows], present, J)
    if weight is not None:
        Z = Z * np.sqrt(weight[rows])[:, None]
    shifts = len(keep) + np.arange(len(present) - 1)
    c = _shared_solve(Z, rooted(rows)[1], alpha, [0, *shifts])
    own = len(keep) + len(present) - 1
    for k, a in enumerate(present):
        coef[a][keep] = c[: len(keep)]
        if k:
            coef[a][0] = coef[a][0] + c[shifts[k - 1]]
        coef[a][J] = c[own + k * len(J) : own + (k + 1) * len(J)]
    return coef


def _backward_induction(
    X, step, action, reward, next_row, *, horizon, n_actions, gamma, alpha, next_value, slopes=SEPARATE
):
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
        coef[t] = fit_actions(design[rows], action[rows], target[rows], alpha, n_actions, slopes)
    return coef


GATHER_ROWS = 32_768  # rows of X read at a time into a step's design


def target_rows(target, rows, n_actions):
    """A regime's probabilities (m, K) at ``rows`` (integer positions, a mask or a slice). ``target`` is the
    regime's (n, K) probabilities; its (n,) action codes when it takes one action with probability 1 (made one-hot
    here, for the rows asked for only); or a function of the rows that returns their probabilities (a regime
    computed row by row, built for the rows asked for only)."""
    if callable(target):
        return target(rows)
    target = np.asarray(target)
    if target.ndim == 2:
        return target[rows]
    codes = target[rows]
    out = np.zeros((codes.shape[0], n_actions))
    out[np.arange(codes.shape[0]), codes] = 1.0
    return out


def evaluate_policies(
    X,
    step,
    action,
    reward,
    episode,
    targets,
    *,
    horizon,
    n_actions,
    gamma,
    alpha,
    action_labels=None,
    slopes=SEPARATE,
    x_rows=None,
):
    """Fitted-Q evaluation of several regimes on the same decisions at once (Le, Voloshin & Yue 2019).

    The backward induction of :class:`regimewise.evaluation.fqe.FittedQEvaluation` run for every regime of
    ``targets`` together: each step's and action's least-squares problem has the same design for every regime, so
    it is solved once with one right-hand side per regime. A target is what :func:`target_rows` reads: a regime's
    (n, K) probabilities, its (n,) action codes, or a function of the rows. Rows sorted by episode then step,
    steps 0, 1, 2, ... within an episode, as everywhere. ``action_labels`` name the actions in the errors;
    ``slopes`` (:class:`regimewise.core.terms.ActionSlopes`) shares the slopes across actions in one fit per step.
    ``x_rows`` (integer positions, optional): the rows of ``X`` and of every target that these decisions are, when
    those hold more (a fold's decisions, without copying the fold's part out); the other arrays hold these
    decisions only. ``X`` is read only by ``X[positions]``, one step's rows at a time, so it may be an object
    that computes the rows asked for (:class:`regimewise.evaluation.values.FeatureRows`).

    The work goes one step at a time, from the last: that step's rows of [1, X] are gathered, the backed-up
    targets r + γ V̂_{t+1} of its rows formed, the models fitted, and the Q-values of its rows kept only as long as
    it takes to read off Q̂ of the action taken and V̂ = Σ_a π(a|s) Q̂(s, a). So no regime's (n, K) Q-values and no
    copy of the whole design are ever held; the next step down reads V̂ of its next rows, the same numbers the
    backup of :class:`regimewise.evaluation.fqe.FittedQEvaluation` computes.

    Returns
    -------
    list
        Per regime, (Q̂ of the action taken, V̂ of the regime), each (n,) in the order of the decisions, or the
        :class:`UserInputError` that stopped it (the regime gives probability to an action never seen at some
        step: found from the last step down, as the backup finds it).
    """
    step, action = np.asarray(step), np.asarray(action)
    next_row = next_row_index(np.asarray(episode))
    n, n_regimes = step.shape[0], len(targets)
    # rows regrouped by step (stable: episode order kept within a step); the rows each least-squares fit sees,
    # and their order, are those of the decision table
    order = step_order(step, horizon)
    bounds = np.concatenate([[0], np.cumsum(np.bincount(step, minlength=horizon)[:horizon])])  # step t: [b_t, b_t+1)
    X = X if hasattr(X, "shape") else np.asarray(X, dtype=float)  # an array, or rows computed when asked for
    source = order if x_rows is None else np.asarray(x_rows)[order]  # the row of X and of the targets behind each
    reward = np.asarray(reward, dtype=float)
    taken = [np.full(n, np.nan) for _ in range(n_regimes)]  # per regime, in the decisions' order
    value = [np.full(n, np.nan) for _ in range(n_regimes)]
    failed: list = [None] * n_regimes
    # one buffer for [1, X] of a step's rows, the largest step's size, reused by every step (no churn of large
    # allocations, which the allocator would keep as resident memory)
    design = np.empty((int(np.diff(bounds).max(initial=0)), X.shape[1] + 1))
    design[:, 0] = 1.0
    for t in range(horizon - 1, -1, -1):
        here = order[bounds[t] : bounds[t + 1]]  # this step's decisions
        positions = source[bounds[t] : bounds[t + 1]]  # their rows of X and of the targets, one object for all
        later = next_row[here]
        cont = np.flatnonzero(later >= 0)
        later = later[cont]
        at_step = design[: here.size]  # [1, X] of this step's rows
        for start in range(0, here.size, GATHER_ROWS):  # in blocks: features computed on demand stay small
            block = positions[start : start + GATHER_ROWS]
            at_step[start : start + block.size, 1:] = X[block]
        target = np.repeat(reward[here][:, None], n_regimes, axis=1)
        for r in range(n_regimes):
            if cont.size and failed[r] is None:
                target[cont, r] = target[cont, r] + gamma * value[r][later]
        acted = action[here]
        coef = fit_actions(at_step, acted, target, alpha, n_actions, slopes)
        del target
        present = np.flatnonzero(np.bincount(acted, minlength=n_actions) > 0)
        for r in range(n_regimes):
            if failed[r] is not None:
                continue
            q = np.full((here.size, n_actions), np.nan)
            for a in present:  # one regime at a time, no BLAS: the same bits whatever shares the pass
                q[:, a] = np.einsum("np,p->n", at_step, np.ascontiguousarray(coef[a][:, r]))
            taken[r][here] = q[np.arange(here.size), acted]
            try:
                value[r][here] = _regime_average(q, targets[r], positions, action_labels)
            except UserInputError as err:
                failed[r] = err
        positions = block = None  # this step's rows let go, and with them what a target kept for them
    return [(taken[r], value[r]) if failed[r] is None else failed[r] for r in range(n_regimes)]


def _regime_average(q, target, rows, action_labels=None):
    """:func:`policy_average` of ``q`` (m, K) under ``target`` at ``rows`` (as :func:`target_rows` reads them). A
    regime given by its action codes takes its action's Q-value (:func:`chosen_value`) without building its one-hot
    probabilities: the same numbers."""
    if isinstance(target, np.ndarray) and target.ndim == 1:
        return chosen_value(q, target[rows], action_labels)
    return policy_average(q, target_rows(target, rows, q.shape[1]), action_labels)


def chosen_value(q, codes, action_labels=None):
    """:func:`policy_average` of ``q`` (m, K) under the one-hot probabilities of ``codes`` (m,), bit for bit, and
    the same error where the chosen action's Q is undefined.

    That row sum adds 1.0 · Q(s, chosen) (NaN and infinities replaced as ``numpy.nan_to_num`` does) to zeros (numpy's
    sum starts from +0.0, even over one action): adding +0.0 changes no number but turns -0.0 into +0.0, which
    ``+ 0.0`` does here."""
    chosen = q[np.arange(codes.shape[0]), codes]
    undefined = np.flatnonzero(np.isnan(chosen))
    if undefined.size:
        raise _undefined_value(codes[undefined[0]], 1.0, action_labels)
    chosen = np.nan_to_num(chosen)
    return chosen + 0.0


def policy_average(q, proba, action_labels=None):
    """Σ_a π(a|s) Q(s, a) per row; actions the policy never takes are skipped even where Q is undefined.

    ``action_labels`` (one per column) name the action in the error; without them it is named by its code.
    """
    undefined = (proba > 0) & np.isnan(q)
    if undefined.any():
        row, a = np.argwhere(undefined)[0]
        raise _undefined_value(a, proba[row, a], action_labels)
    return np.where(proba > 0, proba * np.nan_to_num(q), 0.0).sum(axis=1)


def _undefined_value(a, probability, action_labels=None) -> UserInputError:
    """The error of a regime that gives action ``a`` ``probability`` where its Q-value was never fitted."""
    return UserInputError(
        f"the evaluated regime gives {action_name(a, action_labels)} probability {probability:.3g} at a "
        "decision where that action never occurs in the data at that step, so its value cannot be fitted; "
        "restrict the regime to actions seen at every step."
    )


class BackwardQModel:
    """Parameter checks, fitting and prediction shared by fitted-Q iteration and fitted-Q evaluation."""

    _proba_name = "proba"

    def _check_params(self):
        if not (isinstance(self.n_actions, (int, np.integer)) and self.n_actions >= 1):
            raise UserInputError(f"n_actions must be a positive integer, got {self.n_actions!r}.")
        if self.action_labels is not None and len(self.action_labels) != self.n_actions:
            raise UserInputError(
                f"action_labels has {len(self.action_labels)} labels for {self.n_actions} actions; give one per action."
            )
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
            X,
            step,
            action,
            reward,
            next_row_index(episode),
            horizon=self.horizon,
            n_actions=self.n_actions,
            gamma=self.gamma,
            alpha=self.alpha,
            next_value=lambda q_next, rows: self._next_value(q_next, proba[rows]),
            slopes=getattr(self, "slopes", None) or SEPARATE,
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
            cells = ", ".join(f"step {t} {action_name(a, self.action_labels)}" for t, a in missing)
            warnings.warn(
                f"no decisions with {cells}: their Q is undefined there and they are never recommended.",
                StatisticalWarning,
                stacklevel=4,
            )

    _fitted_attribute = "coef_"

    def _checked_rows(self, X, step):
        """Check that the model is fitted and that X and step describe decisions it can score."""
        if not hasattr(self, self._fitted_attribute):
            from sklearn.exceptions import NotFittedError  # scikit-learn's, imported where it is raised

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
        if X.shape[0] <= Q_BLOCK_ROWS:
            return np.einsum("nkp,np->nk", self.coef_[step], _design(X))
        return np.concatenate(  # row blocks: coef_[step] copies (K, p + 1) coefficients per row
            [
                np.einsum("nkp,np->nk", self.coef_[step[s : s + Q_BLOCK_ROWS]], _design(X[s : s + Q_BLOCK_ROWS]))
                for s in range(0, X.shape[0], Q_BLOCK_ROWS)
            ]
        )


class LinearActionModel:
    """Linear Q-model in [1, X] with one coefficient vector per action (action-by-state interactions, or with
    ``slopes`` shared across actions: :func:`fit_actions`).

    Fitted by (weighted) minimum-norm least squares with a ridge penalty ``alpha`` on every coefficient but
    the intercept. Actions without rows (or with zero total weight) get NaN coefficients and Q.
    """

    def __init__(self, n_actions, alpha=0.0, slopes=SEPARATE):
        self.n_actions = n_actions
        self.alpha = alpha
        self.slopes = slopes

    def fit(self, X, action, y, weight=None):
        return self.fit_design(_design(X), action, y, weight)

    def fit_design(self, design, action, y, weight=None, cells=None):
        """:meth:`fit` on a design matrix [1, X] built once by the caller (e.g. for a bootstrap ensemble), with the
        action cells of :meth:`cells` when the caller has them (the same numbers).

        Rows of zero weight are dropped before the square-root weights are applied, so a resample's fit touches
        only its own rows (the same numbers, row by row, as weighting every row first).
        """
        self.coef_ = fit_actions(design, action, y, self.alpha, self.n_actions, self.slopes, weight, cells)
        return self

    def cells(self, X, action, y):
        """The :class:`ActionCells` of a table (states ``X``) this model will fit several times (with other
        weights), or None when the slopes are shared (one fit on all rows: nothing to select per action)."""
        return None if self.slopes.shared else ActionCells.gather(X, action, y, self.n_actions)

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
        from sklearn.ensemble import HistGradientBoostingRegressor  # only boosted Q-models need scikit-learn

        self.model_ = HistGradientBoostingRegressor(
            early_stopping=False, random_state=self.random_state, **(self.params or {})
        ).fit(np.hstack([X, np.eye(self.n_actions)[action]]), y, sample_weight=weight)
        return self

    def predict(self, X):
        n = X.shape[0]
        q = np.column_stack(
            [
                self.model_.predict(np.hstack([X, np.tile(np.eye(self.n_actions)[a], (n, 1))]))
                for a in range(self.n_actions)
            ]
        )
        return np.where(self.seen_, q, np.nan)


def out_of_fold_errors(make_model, X, action, y, folds):
    """Squared error of each row's taken-action Q predicted by a model fitted without the row's fold.

    A linear model fitting each action on its own (one with :meth:`LinearActionModel.cells`) gathers [1, X] and
    each action's rows once for all the folds; each fold's fit then selects its training rows out of them (a
    boolean weight), the rows and order of ``X[~test]``, so the same numbers as fitting ``X[~test]`` alone.
    """
    error = np.full(y.shape[0], np.nan)
    model = make_model()
    separate = hasattr(model, "cells") and not model.slopes.shared
    design = _design(X) if separate else None  # the folds' rows to predict
    cells = model.cells(X, action, y) if separate else None
    for f in np.unique(folds):
        test = folds == f
        if test.all():
            continue
        if cells is None:
            q = make_model().fit(X[~test], action[~test], y[~test], None).predict(X[test])
        else:
            q = design[test] @ make_model().fit_design(design, action, y, ~test, cells).coef_.T
        error[test] = (q[np.arange(q.shape[0]), action[test]] - y[test]) ** 2
    return error


def choose_ridge_alpha(n_actions, grid, X, action, y, folds, slopes=SEPARATE):
    """Ridge penalty from ``grid`` with the smallest out-of-fold mean squared error (first on ties)."""
    scores = [
        np.nanmean(out_of_fold_errors(lambda a=alpha: LinearActionModel(n_actions, a, slopes), X, action, y, folds))
        for alpha in grid
    ]
    return float(grid[int(np.nanargmin(scores))])
