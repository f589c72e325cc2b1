"""Finite-horizon fitted-Q iteration (learning a regime) and fitted-Q evaluation (valuing a given regime).

Both run the same backward induction over decision steps. At the last step the reward is regressed on state
and action; at each earlier step the regression target is the reward plus the discounted value of the next
state, where that value is either the best permitted action's Q (learning) or the evaluated regime's average
of Q over actions (evaluation). Rows whose episode ends at a step get no next-stage value.

Data layout (shared with :mod:`regimewise.evaluation.ope`): long-format numpy arrays, one row per decision, rows
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

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from regimewise.core.arrays import check_proba, next_row_index
from regimewise.core.folds import patient_folds
from regimewise.core.terms import SEPARATE, ActionSlopes
from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.regime.permitted import constrained_choice, permitted_choice
from regimewise.regime.pessimism import PessimisticEnsemble, patient_resamples
from regimewise.regime.qmodels import (
    BackwardQModel,
    BoostedActionModel,
    LinearActionModel,
    choose_ridge_alpha,
    out_of_fold_errors,
)


@dataclass(frozen=True)
class QLearningSettings:
    """How :class:`FittedQIteration` learns: every setting but the problem's size and the random state.

    Parameters
    ----------
    gamma : float, default 1.0
    support_threshold : float, default 0.05
    alpha : float or "cv", default 0.0
    q_model : {"linear", "gradient_boosting"}, default "linear"
    mode : {"backward", "pooled"}, default "backward"
    alpha_grid : tuple of float, default (0, 0.1, 1, 10, 100)
    cv_folds : int, default 5
        Folds by patient for ``alpha="cv"`` and for the out-of-fold error.
    tolerance : float, default 1e-6
    max_iterations : int, default 200
    boosting_params : dict or None
        Keyword arguments of ``HistGradientBoostingRegressor``.
    pessimism : float or None, default None
        k of the pessimistic score; None fits no ensemble (0 fits one and changes nothing).
    ensemble_size : int, default 20
    oof_error : bool, default False
        Compute the out-of-fold error of the final Q-models per step (extra fits).
    slopes : ActionSlopes, default separate
        Linear Q-model only: each action fitted on its own, or slopes shared across actions
        (:class:`regimewise.core.terms.ActionSlopes`).
    """

    gamma: float = 1.0
    support_threshold: float = 0.05
    alpha: float | str = 0.0
    q_model: str = "linear"
    mode: str = "backward"
    alpha_grid: tuple = (0.0, 0.1, 1.0, 10.0, 100.0)
    cv_folds: int = 5
    tolerance: float = 1e-6
    max_iterations: int = 200
    boosting_params: dict | None = None
    pessimism: float | None = None
    ensemble_size: int = 20
    oof_error: bool = False
    slopes: ActionSlopes = SEPARATE


class FittedQIteration(BackwardQModel):
    """Learn a regime by fitted-Q iteration with clinical rules, a support constraint and optional pessimism.

    Two learning modes: ``"backward"`` fits one Q-model per decision step by finite-horizon backward
    induction (Murphy 2005; Chakraborty & Moodie 2013); ``"pooled"`` fits one Q-model for all steps with the
    decision index (step / (H - 1)) as an extra feature, iterating the Bellman targets (Ernst, Geurts &
    Wehenkel 2005) until no target moves by more than ``tolerance``. In both, a row whose episode ends gets
    no next-stage value, so episodes may stop early.

    Q-models: ``"linear"`` (one coefficient vector per action in [1, X]; ridge penalty ``alpha``, or chosen
    from ``alpha_grid`` by cross-validation with folds by patient when ``alpha="cv"``) or
    ``"gradient_boosting"`` (:class:`BoostedActionModel`). With ``pessimism`` set, every Q-model is a
    :class:`regimewise.regime.pessimism.PessimisticEnsemble` and actions are ranked by Q − k·sd.

    The regime takes the permitted action with the best score: permitted = Q defined, allowed by the clinical
    rules (the ``rule_permitted`` mask passed to :meth:`fit` and :meth:`recommend`) and usual-care
    probability >= ``support_threshold``; with none permitted, usual care's most likely rule-permitted action.
    ``support_threshold=0`` without rules is plain Q-learning; a threshold above 1 reproduces usual care's most
    likely action. The same rule gives the next-state value during learning.

    Research use only: recommendations are not medical advice; decisions stay with licensed clinicians.

    Parameters
    ----------
    n_actions, horizon : int
    settings : QLearningSettings, optional
        Discount, support threshold, Q-model, learning mode, penalties and pessimism (defaults if None).
    random_state : int or None
    action_labels : sequence of str, optional
        The protocol's label of each action code, used to name actions in warnings and errors.

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
    record_choice_ : ndarray of int, shape (n,)
        The regime's action at each decision it was fitted on: what :meth:`recommend` returns for the training
        ``X``, ``step``, ``behaviour_proba`` and ``rule_permitted``, without scoring them again.
    record_q_ : ndarray, shape (n, K), or None
        With ``fit(..., keep_q=True)``: :meth:`q_values` of the training ``X`` and ``step``, kept from the fit
        (backward mode predicts each step's rows once, right after fitting its model); None otherwise.

    References
    ----------
    Ernst, Geurts & Wehenkel (2005); Murphy (2005); Chakraborty & Moodie (2013); Fujimoto, Meger & Precup
    (2019); Jin, Yang & Wang (2021), see the module docstring and :mod:`regimewise.regime.pessimism`.

    Examples
    --------
    >>> X = np.array([[0.0], [1.0], [0.0], [1.0]])
    >>> model = FittedQIteration(2, 1, QLearningSettings(support_threshold=0.0)).fit(
    ...     X, step=[0, 0, 0, 0], action=[0, 0, 1, 1], reward=[1.0, 0.0, 0.0, 2.0], episode=[0, 1, 2, 3],
    ...     behaviour_proba=np.full((4, 2), 0.5))
    >>> model.recommend(X, [0, 0, 0, 0], np.full((4, 2), 0.5)).tolist()
    [0, 1, 0, 1]
    """

    _proba_name = "behaviour_proba"
    _fitted_attribute = "models_"

    def __init__(self, n_actions, horizon, settings=None, random_state=None, action_labels=None):
        self.n_actions = n_actions
        self.horizon = horizon
        self.settings = QLearningSettings() if settings is None else settings
        self.random_state = random_state
        self.action_labels = action_labels

    # the shared backward-induction base class reads these three by name
    gamma = property(lambda self: self.settings.gamma)
    alpha = property(lambda self: self.settings.alpha)
    alpha_grid = property(lambda self: self.settings.alpha_grid)

    def _check_params(self):
        super()._check_params()
        if self.settings.alpha == "cv" and self.settings.q_model != "linear":
            raise UserInputError("alpha='cv' applies to the linear Q-model only; set a number or q_model='linear'.")
        if not self.settings.support_threshold >= 0:
            raise UserInputError(f"support_threshold must be >= 0, got {self.settings.support_threshold!r}.")
        if self.settings.q_model not in ("linear", "gradient_boosting"):
            raise UserInputError(f"q_model must be 'linear' or 'gradient_boosting', got {self.settings.q_model!r}.")
        if self.settings.mode not in ("backward", "pooled"):
            raise UserInputError(f"mode must be 'backward' or 'pooled', got {self.settings.mode!r}.")
        if self.settings.pessimism is not None and not self.settings.pessimism >= 0:
            raise UserInputError(f"pessimism must be None or >= 0, got {self.settings.pessimism!r}.")

    # ------------------------------------------------------------------------------------------- models
    def _make_model(self, alpha, seed):
        if self.settings.q_model == "linear":
            return lambda: LinearActionModel(self.n_actions, alpha, self.settings.slopes)
        return lambda: BoostedActionModel(self.n_actions, self.settings.boosting_params, seed)

    def _fit_model(self, X, action, y, rows):
        """One Q-model on the table rows ``rows`` (CV for the ridge penalty, ensemble if pessimistic)."""
        alpha = self.settings.alpha
        if alpha == "cv":
            alpha = choose_ridge_alpha(
                self.n_actions, list(self.settings.alpha_grid), X, action, y, self._folds[rows], self.settings.slopes
            )
        self.alpha_.append(alpha)
        make = self._make_model(alpha, self._model_seed)
        if self._resamples is not None:
            return PessimisticEnsemble(make, self._resamples, self.settings.pessimism).fit(X, action, y, rows), make
        return make().fit(X, action, y, None), make

    def _scores(self, model, X, predicted=None):
        """The model's scores at ``X``; ``predicted``: its :meth:`predict` of ``X`` when the caller has it."""
        if hasattr(model, "score"):
            return model.score(X, predicted)
        return model.predict(X) if predicted is None else predicted

    def _pooled_X(self, X, step):
        return np.column_stack([X, np.asarray(step, dtype=float) / max(self.horizon - 1, 1)])

    def _mask_unfitted(self, q, step):
        return np.where(self.fitted_actions_[step], q, np.nan)

    def _raw(self, X, step, scores):
        """Q-values (or pessimistic scores) (n, K) of the fitted models at the given steps."""
        return self._predicted(X, step, q=not scores, score=scores)[0]

    def _predicted(self, X, step, q, score):
        """The fitted models' Q-values (``q``) and/or scores (``score``), each (n, K), at the given steps: a tuple,
        Q-values first.

        Asked for both, each step's full-sample model predicts once and the pessimistic score is formed from that
        prediction (:meth:`PessimisticEnsemble.score`), the same numbers as predicting twice. Rows all at one
        step (one step's rows scored at once, :func:`regimewise.regime.learning.score_by_step`) are passed as they
        are rather than copied out by a mask: every model copies its rows into a design of its own, so the
        numbers are the same.
        """

        def predict(model, Z):
            full = model.predict(Z)
            parts = [full] if q else []
            if score:
                parts.append(model.score(Z, full) if hasattr(model, "score") else full)
            return parts

        if self.settings.mode == "pooled":
            parts = predict(self.models_[0], self._pooled_X(X, step))
            return tuple(self._mask_unfitted(part, step) for part in parts)
        present = np.flatnonzero(np.bincount(step))  # the steps present, ascending (np.unique without a sort)
        if present.size == 1:
            parts = predict(self.models_[present[0]], X)
        else:
            parts = [np.full((X.shape[0], self.n_actions), np.nan) for _ in range(q + score)]
            for t in present:
                rows = step == t
                for part, predicted in zip(parts, predict(self.models_[t], X[rows])):
                    part[rows] = predicted
        return tuple(self._mask_unfitted(part, step) for part in parts)

    def _next_values(self, X, step, proba, rules):
        return self._chosen_score(self._raw(X, step, scores=True), proba, rules)

    def _chosen_score(self, score, proba, rules):
        """The score of the best permitted action in each row of ``score`` (n, K): the value carried backwards."""
        choice = permitted_choice(score, proba, self.settings.support_threshold, rules)
        return score[np.arange(choice.size), choice]

    # ------------------------------------------------------------------------------------------- learning
    def _fit_backward(self, X, step, action, reward, next_row, proba, rules):
        """Fit the step models from the last step back; return the targets, the model makers and the choices at
        every row (:func:`regimewise.regime.permitted.constrained_choice` of the fitted models' scores).

        Each step's rows are scored once, right after their model is fitted, and their choices made at once: the
        next-state values of the step before read the chosen scores, and :meth:`fit` keeps the choices for the
        records. Steps run 0, 1, 2, … within an episode (:func:`regimewise.core.arrays.check_layout`), so the next
        rows of step t are exactly the rows of step t + 1, in the same order; and a row's choice depends on its own
        row only: the same numbers as scoring and choosing again on the whole table.
        """
        target = reward.copy()
        self.models_ = [None] * self.horizon
        makers = [None] * self.horizon
        # every row is at some step and every step's rows are written below (no row is left unset)
        choice, unconstrained = np.empty(step.size, dtype=np.intp), np.empty(step.size, dtype=np.intp)
        none_permitted = np.empty(step.size, dtype=bool)
        chosen = None  # the chosen scores of step t + 1's rows, which are the next rows of step t
        for t in range(self.horizon - 1, -1, -1):
            rows = np.flatnonzero(step == t)
            if not rows.size:
                chosen = None
                continue
            later = next_row[rows]
            cont = rows[later >= 0]
            if cont.size:
                if chosen is None or chosen.size != cont.size:
                    raise RuntimeError("the next rows of a step are not the rows of the step after it")
                target[cont] = reward[cont] + self.settings.gamma * chosen
            X_t = X[rows]
            self.models_[t], makers[t] = self._fit_model(X_t, action[rows], target[rows], rows)
            if self.settings.oof_error:  # step t's targets are final now: scored on the rows gathered for the fit
                self._step_oof[t] = self._step_out_of_fold(makers[t], X_t, action[rows], target[rows], rows)
            # as _raw gives them: the rows are all at step t, so step t's fitted actions mask every row
            if self.record_q_ is None:
                score = np.where(self.fitted_actions_[t], self._scores(self.models_[t], X_t), np.nan)
            else:  # the step's Q-values, kept, are what q_values gives at these rows
                full = self.models_[t].predict(X_t)
                self.record_q_[rows] = np.where(self.fitted_actions_[t], full, np.nan)
                score = np.where(self.fitted_actions_[t], self._scores(self.models_[t], X_t, full), np.nan)
            choice[rows], unconstrained[rows], none_permitted[rows] = constrained_choice(
                score, proba[rows], self.settings.support_threshold, None if rules is None else rules[rows]
            )
            chosen = score[np.arange(rows.size), choice[rows]]  # as _chosen_score reads them
        self.n_iterations_, self.converged_ = self.horizon, True
        return target, makers, (choice, unconstrained, none_permitted)

    def _fit_pooled(self, X, step, action, reward, next_row, proba, rules):
        Xp = self._pooled_X(X, step)
        cont = np.flatnonzero(next_row >= 0)
        later = next_row[cont]
        target = reward.copy()
        self.converged_ = False
        for iteration in range(1, self.settings.max_iterations + 1):  # noqa: B007 - read after the loop
            self.alpha_ = []
            model, make = self._fit_model(Xp, action, target, np.arange(step.size))
            self.models_ = [model]
            updated = reward.copy()
            if cont.size:
                updated[cont] += self.settings.gamma * self._next_values(
                    X[later], step[later], proba[later], None if rules is None else rules[later]
                )
            change = float(np.max(np.abs(updated - target)))
            target = updated
            if change <= self.settings.tolerance:
                self.converged_ = True
                break
        self.n_iterations_ = iteration
        if not self.converged_:
            warnings.warn(
                f"pooled fitted-Q iteration stopped after {iteration} iterations with targets still moving by "
                f"{change:.3g} > tolerance {self.settings.tolerance:g}; raise max_iterations or the tolerance.",
                StatisticalWarning,
                stacklevel=3,
            )
        return target, [make], None

    def _out_of_fold(self, X, step, action, target, makers):
        """Mean out-of-fold squared error of the Q-models at each step present.

        Backward mode: each step's errors are averaged as they come (the same numbers, in the same order, as
        gathering them into a table and reading that step's rows back)."""
        folds = self._folds
        if self.settings.mode == "pooled":
            error = out_of_fold_errors(makers[0], self._pooled_X(X, step), action, target, folds)
            return {int(t): float(np.nanmean(error[step == t])) for t in np.unique(step)}
        # the steps present, ascending (np.unique without a sort); each step's error was computed by _fit_backward
        # right after its fit, on the rows it had gathered for it (not gathered out of X again here)
        return {int(t): self._step_oof[t] for t in np.flatnonzero(np.bincount(step))}

    def _step_out_of_fold(self, make, X_t, action_t, target_t, rows):
        """Mean out-of-fold squared error of one step's Q-models, on that step's rows (``rows`` of the table)."""
        return float(np.nanmean(out_of_fold_errors(make, X_t, action_t, target_t, self._folds[rows])))

    def fit(self, X, step, action, reward, episode, behaviour_proba, rule_permitted=None, groups=None, keep_q=False):
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
        keep_q : bool, default False
            Keep the Q-values of every action at the training decisions as ``record_q_`` (the numbers
            :meth:`q_values` gives there, without predicting them again).
        """
        step, action, episode, X, reward, proba = self._checked_table(X, step, action, reward, episode, behaviour_proba)
        rules = self._check_rules(rule_permitted, step.shape[0])
        groups = episode if groups is None else np.asarray(groups)
        fold_seed, model_seed, boot_seed = np.random.SeedSequence(self.random_state).spawn(3)
        self._folds = patient_folds(groups, self.settings.cv_folds, fold_seed)
        self._model_seed = int(model_seed.generate_state(1)[0])
        self._resamples = None
        if self.settings.pessimism is not None:
            self._resamples = patient_resamples(groups, self.settings.ensemble_size, boot_seed)
        counts = np.zeros((self.horizon, self.n_actions), dtype=np.int64)
        np.add.at(counts, (step, action), 1)
        self.fitted_actions_ = counts > 0
        self.n_features_in_ = X.shape[1]
        self.alpha_ = []
        self._step_oof = {}
        learn = self._fit_pooled if self.settings.mode == "pooled" else self._fit_backward
        # backward mode scores each step's rows right after its fit: asked to keep the Q-values there, it keeps them
        self.record_q_ = np.empty((step.size, self.n_actions)) if keep_q and learn == self._fit_backward else None
        with threadpool_limits(limits=1):  # many small tall-skinny solves: BLAS threads only contend
            target, makers, choices = learn(X, step, action, reward, next_row_index(episode), proba, rules)
            self._set_coef()
            self.oof_mse_ = self._out_of_fold(X, step, action, target, makers) if self.settings.oof_error else None
        self._warn_unfitted(step)
        if keep_q and self.record_q_ is None:
            self.record_q_ = self._raw(X, step, scores=False)
        if choices is None:
            choices = constrained_choice(self._raw(X, step, scores=True), proba, self.settings.support_threshold, rules)
        choice, unconstrained, none_permitted = choices
        self.record_choice_ = choice
        self.n_changed_by_support_ = int(np.sum(choice != unconstrained))
        self.n_without_permitted_action_ = int(np.sum(none_permitted))
        # the folds and resamples (one entry per decision and per patient) serve the fits only: not kept with the
        # fitted models, which a stage holds for several regimes at once
        del self._folds, self._resamples, self._step_oof
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
        if self.settings.q_model != "linear":
            return
        if self.settings.mode == "pooled":
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
        return self._choose(self.scores(X, step), step, behaviour_proba, rule_permitted)

    def recommend_with_q(self, X, step, behaviour_proba, rule_permitted=None):
        """:meth:`recommend` and :meth:`q_values` at once, each step's full-sample model predicting once for both
        (the same numbers as calling the two)."""
        q, score = self._predicted(*self._checked_rows(X, step), q=True, score=True)
        return self._choose(score, step, behaviour_proba, rule_permitted), q

    def _choose(self, score, step, behaviour_proba, rule_permitted):
        """The permitted action with the best ``score`` at each row (:meth:`recommend`)."""
        behaviour_proba = check_proba(behaviour_proba, score.shape[0], self.n_actions, "behaviour_proba")
        empty = np.flatnonzero(np.isnan(score).all(axis=1))
        if empty.size:
            raise UserInputError(
                f"row {empty[0]} is at step {np.asarray(step)[empty[0]]}, which has no decisions in the training "
                "data; the regime is undefined there."
            )
        rules = self._check_rules(rule_permitted, score.shape[0])
        return permitted_choice(score, behaviour_proba, self.settings.support_threshold, rules)

    def recommend_proba(self, X, step, behaviour_proba, rule_permitted=None):
        """One-hot (n, K) probabilities of the regime, e.g. as ``target_proba`` for off-policy evaluation."""
        return np.eye(self.n_actions)[self.recommend(X, step, behaviour_proba, rule_permitted)]

    def predicted_value(self, X0, behaviour_proba0, rule_permitted0=None):
        """Mean fitted Q of the regime's choice over first decisions (in-sample; optimistic).

        The maximisation makes this an upward-biased estimate of the learned regime's value; use the
        off-policy estimators of :mod:`regimewise.evaluation.ope` or fitted-Q evaluation on fresh data to report a
        value.
        """
        step0 = np.zeros(np.shape(X0)[0], dtype=int)
        choice = self.recommend(X0, step0, behaviour_proba0, rule_permitted0)
        return float(np.mean(self.q_values(X0, step0)[np.arange(choice.size), choice]))
