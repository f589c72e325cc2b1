"""Usual-care (behaviour) models: the probability of every action given the state.

The usual-care model estimates how clinicians chose among the actions in the records. Its probabilities give the
propensity scores of inverse-probability weighting (Rosenbaum & Rubin 1983, Biometrika 70:41) and the behaviour
policy of off-policy evaluation (Precup, Sutton & Singh 2000).
"""

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import patsy
import statsmodels.api as sm
from scipy.special import log_softmax
from scipy.stats import rankdata
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.exceptions import NotFittedError
from threadpoolctl import threadpool_limits

from regimewise.errors import ConvergenceWarning, StatisticalWarning, UserInputError
from regimewise.features import StateScaler

__all__ = [
    "BehaviourDesign",
    "GradientBoostingBehaviour",
    "MultinomialLogitBehaviour",
    "apply_probability_floor",
    "cross_fit_proba",
    "multiclass_auc",
    "patient_folds",
    "probability_of_taken",
]

# A log-likelihood this close to 0 means the covariates predict every action taken with certainty: complete
# separation, where the maximum-likelihood estimate does not exist (Albert & Anderson 1984, Biometrika 71:1).
_SEPARATION_LLF = -1e-6


def _as_design(X, what="X"):
    """Return ``X`` as a finite 2-D float array, and its column names (``None`` for an array)."""
    names = [str(c) for c in X.columns] if isinstance(X, pd.DataFrame) else None
    try:
        values = np.asarray(X, dtype=float)
    except (TypeError, ValueError) as exc:
        raise UserInputError(f"{what} must be numeric; encode categories as indicator columns first ({exc})") from exc
    if values.ndim != 2 or values.shape[0] == 0:
        raise UserInputError(f"{what} must be a non-empty 2-D array (rows = decisions); got shape {values.shape}")
    if not np.all(np.isfinite(values)):
        bad = sorted({names[j] if names else str(j) for j in np.where(~np.isfinite(values))[1]})
        raise UserInputError(f"{what} has missing or infinite values in column(s) {', '.join(bad)}; impute or drop")
    return values, names


def _as_actions(action, n_actions, n_rows=None):
    """Return ``action`` as a 1-D int array of codes in ``0 .. n_actions-1``."""
    if int(n_actions) != n_actions or n_actions < 1:
        raise UserInputError(f"n_actions must be a positive integer; got {n_actions!r}")
    values = np.asarray(action)
    if values.ndim != 1:
        raise UserInputError(f"action must be 1-D (one code per decision); got shape {values.shape}")
    if n_rows is not None and values.shape[0] != n_rows:
        raise UserInputError(f"action has {values.shape[0]} entries but the covariates have {n_rows} rows")
    message = f"action must hold integer codes 0..{int(n_actions) - 1}; map action labels to codes first"
    if values.dtype.kind not in "biuf" or not np.all(np.isfinite(values)):
        raise UserInputError(message)
    codes = values.astype(int)
    if not np.array_equal(codes, values) or codes.min(initial=0) < 0 or codes.max(initial=0) >= n_actions:
        raise UserInputError(message)
    return codes


def _standardise(values):
    """Column means and scales for a numerically stable fit; constant columns get scale 0."""
    mean = values.mean(axis=0)
    scale = values.std(axis=0)
    constant = np.ptp(values, axis=0) == 0
    scale[constant] = 0.0
    return mean, scale


def _prediction_design(model, X, fitted_attribute):
    """Check that ``model`` is fitted and ``X`` has its number of columns; return ``_as_design(X)``."""
    if not hasattr(model, fitted_attribute):
        raise NotFittedError(f"this {type(model).__name__} is not fitted yet; call fit(X, action, n_actions)")
    values, names = _as_design(X)
    if values.shape[1] != model.n_features_in_:
        raise UserInputError(f"X has {values.shape[1]} columns but the model was fitted on {model.n_features_in_}")
    return values, names


def _run_mnlogit(design, endog, method, maxiter):
    """statsmodels MNLogit fit, or ``None`` when it breaks down (singular Hessian, non-finite estimates).

    statsmodels' own warnings are silenced here; the caller reports convergence problems in its own words.
    """
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        try:
            result = sm.MNLogit(endog, design).fit(method=method, maxiter=maxiter, disp=0, skip_hessian=True)
        except np.linalg.LinAlgError:
            return None
    return result if np.all(np.isfinite(result.params)) else None


def _log_proba(design, params):
    """Log-probabilities of the reference class and the others, computed stably in log space.

    ``design`` includes the constant column; ``params`` has one column per non-reference class.
    """
    linear = np.column_stack([np.zeros(design.shape[0]), design @ params])
    return log_softmax(linear, axis=1)


def _breakdown_message(reason):
    return (
        f"the usual-care model cannot be fitted ({reason}); most often some action is perfectly predicted "
        "by the covariates (separation): merge rare actions or categories, or drop the covariate that "
        "separates them"
    )


class MultinomialLogitBehaviour:
    r"""Multinomial logistic regression of the action taken on the state (usual-care model).

    .. math:: P(A = k \mid x) = \frac{\exp(\beta_{0k} + x^\top \beta_k)}{\sum_j \exp(\beta_{0j} + x^\top \beta_j)},
              \quad \beta_{0c} = 0,\ \beta_c = 0 \text{ for the reference action } c = \text{classes\_}[0].

    Fitted by maximum likelihood with statsmodels ``MNLogit`` (McFadden 1974, in *Frontiers in Econometrics*;
    Agresti 2013, *Categorical Data Analysis*, 3rd ed., ch. 8). With two actions it is ordinary logistic
    regression. The class adds the intercept; the caller builds the design matrix (indicator columns for
    categories, squares, ...) and must not include a constant column of its own.

    Covariates are centred and scaled inside ``fit`` for a stable Newton iteration; ``params_`` are transformed
    back to the caller's scale. A column that is constant in the training data carries no information: it is
    left out of the fit with a :class:`StatisticalWarning` and its coefficients are 0.

    Actions that never occur in the training data get probability exactly 0 in :meth:`predict_proba` (their
    maximum-likelihood estimate); the other columns are the multinomial-logit probabilities over the actions
    that occur and sum to 1. An inverse weight ``1 / p`` for such an action is infinite, which is the honest
    answer: usual care gives no support to it (positivity fails).

    When the data do not identify the model, ``fit`` reacts as follows. Complete separation (the covariates
    predict every action taken with certainty; Albert & Anderson 1984) raises :class:`UserInputError`, since no
    maximum-likelihood estimate exists. If Newton's method breaks down (singular Hessian or overflow, typically
    quasi-separation), the model is refitted once with BFGS and a :class:`ConvergenceWarning` says so;
    ``method_`` records the optimiser used. If that fails too, :class:`UserInputError` is raised.

    Parameters
    ----------
    maxiter : int, default 100
        Maximum number of optimiser iterations.
    method : str, default "newton"
        statsmodels optimiser (``"newton"``, ``"bfgs"``, ``"lbfgs"``, ``"nm"``, ...).

    Attributes
    ----------
    classes_ : ndarray of int
        Action codes that occur in the training data, sorted; ``classes_[0]`` is the reference action.
    n_actions_ : int
        Number of actions ``K``; ``predict_proba`` returns ``K`` columns.
    n_features_in_ : int
        Number of covariate columns.
    feature_names_in_ : list of str or None
        Column names when ``X`` was a DataFrame.
    params_ : ndarray, shape (n_features_in_ + 1, len(classes_) - 1)
        Row 0 the intercepts, then one row per covariate; column ``j`` holds the log-odds coefficients of action
        ``classes_[j + 1]`` against ``classes_[0]``, on the scale of the caller's covariates.
    method_ : str or None
        Optimiser that produced ``params_`` (``"bfgs"`` after a Newton breakdown; ``None`` with one action).
    converged_ : bool
        Whether the optimiser reported convergence (``True`` when only one action occurs).
    n_iter_ : int or None
        Iterations used, when the optimiser reports them.
    llf_ : float
        Maximised log-likelihood (0 when only one action occurs).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(200, 2))
    >>> action = rng.integers(0, 3, size=200)
    >>> model = MultinomialLogitBehaviour().fit(X, action, n_actions=4)
    >>> model.predict_proba(X).shape
    (200, 4)
    >>> float(model.predict_proba(X)[:, 3].max())  # action 3 never occurred
    0.0
    """

    def __init__(self, maxiter=100, method="newton"):
        self.maxiter = maxiter
        self.method = method

    def fit(self, X, action, n_actions):
        """Fit the model on covariates ``X`` (n, p) and action codes ``action`` (n,) in ``0 .. n_actions-1``.

        Returns
        -------
        self

        Raises
        ------
        UserInputError
            Malformed input, a rank-deficient design, complete separation, or a fit that breaks down even
            after the BFGS fallback. Quasi-separation (only some decisions predicted with certainty) is not an
            error: it shows as a :class:`ConvergenceWarning` and probabilities near 0 and 1.
        """
        values, names = _as_design(X)
        codes = _as_actions(action, n_actions, n_rows=values.shape[0])
        self.n_actions_ = int(n_actions)
        self.n_features_in_ = values.shape[1]
        self.feature_names_in_ = names
        self.classes_ = np.unique(codes)
        mean, scale = _standardise(values)
        self._warn_constant_columns(scale == 0)
        if self.classes_.size == 1:
            self.params_ = np.zeros((self.n_features_in_ + 1, 0))
            self.converged_, self.n_iter_, self.llf_, self.method_ = True, 0, 0.0, None
            return self
        varying = scale > 0
        design = sm.add_constant((values[:, varying] - mean[varying]) / scale[varying], has_constant="add")
        self._check_rank(design)
        endog = np.searchsorted(self.classes_, codes)
        result = self._fit_mnlogit(design, endog)
        params = np.asarray(result.params)
        # statsmodels' llf overflows to nan when probabilities saturate; compute it in log space instead.
        llf = float(_log_proba(design, params)[np.arange(endog.size), endog].sum())
        if llf > _SEPARATION_LLF:
            raise UserInputError(_breakdown_message("every action taken is predicted with probability 1"))
        self.params_ = self._unscale(params, mean, scale)
        self.converged_ = bool(result.mle_retvals.get("converged", True))
        self.n_iter_ = result.mle_retvals.get("iterations")
        self.llf_ = llf
        self._warn_fit_problems()
        return self

    def predict_proba(self, X):
        """Probability of every action, shape (n, n_actions_), columns in action-code order."""
        values, names = _prediction_design(self, X, "params_")
        if names is not None and self.feature_names_in_ is not None and names != self.feature_names_in_:
            raise UserInputError("X has different column names or order than at fit; pass the same design columns")
        proba = np.zeros((values.shape[0], self.n_actions_))
        proba[:, self.classes_] = np.exp(_log_proba(np.column_stack([np.ones(len(values)), values]), self.params_))
        return proba

    def _fit_mnlogit(self, design, endog):
        """Fit MNLogit; if Newton's method breaks down, refit once with BFGS; if that fails too, raise."""
        self.method_ = self.method
        result = _run_mnlogit(design, endog, self.method, self.maxiter)
        if result is None and self.method == "newton":
            self.method_ = "bfgs"
            result = _run_mnlogit(design, endog, "bfgs", self.maxiter)
        if result is None:
            raise UserInputError(_breakdown_message("singular Hessian or non-finite estimates"))
        return result

    def _warn_fit_problems(self):
        if self.method_ != self.method:
            warnings.warn(
                "Newton's method broke down in the usual-care model (probabilities reached 0 or 1, usually "
                "quasi-separation: an action almost perfectly predicted by a covariate); it was refitted with "
                "BFGS and some coefficients are unstable: merge rare categories or drop that covariate",
                ConvergenceWarning,
                stacklevel=3,
            )
        if not self.converged_:
            warnings.warn(
                f"the usual-care model (MNLogit, method={self.method_!r}) did not converge in {self.maxiter} "
                "iterations; raise maxiter, try method='bfgs', or look for an action that a covariate almost "
                "perfectly predicts (quasi-separation) and merge categories or drop that covariate",
                ConvergenceWarning,
                stacklevel=3,
            )

    def _check_rank(self, design):
        rank = np.linalg.matrix_rank(design)
        if rank < design.shape[1]:
            raise UserInputError(
                f"the usual-care design matrix (with the intercept this model adds) has rank {rank} < "
                f"{design.shape[1]} columns: some covariates are linear combinations of others (e.g. a full set "
                "of indicator columns); drop one column per set"
            )

    def _warn_constant_columns(self, constant):
        if constant.any():
            labels = [self.feature_names_in_[j] if self.feature_names_in_ else str(j) for j in np.where(constant)[0]]
            warnings.warn(
                f"covariate column(s) {', '.join(labels)} are constant in the training data; they are left out "
                "of the usual-care model (coefficient 0)",
                StatisticalWarning,
                stacklevel=3,
            )

    @staticmethod
    def _unscale(params_scaled, mean, scale):
        """Map coefficients on centred and scaled covariates back to the original covariates."""
        varying = scale > 0
        slopes = np.zeros((scale.size, params_scaled.shape[1]))
        slopes[varying] = params_scaled[1:] / scale[varying, None]
        intercept = params_scaled[0] - mean @ slopes
        return np.vstack([intercept, slopes])


def probability_of_taken(proba, action):
    """Probability each decision's model gave to the action actually taken.

    Parameters
    ----------
    proba : array_like, shape (n, K)
        Action probabilities, columns in action-code order (e.g. from ``predict_proba``).
    action : array_like of int, shape (n,)
        Action codes taken.

    Returns
    -------
    ndarray, shape (n,)

    Examples
    --------
    >>> probability_of_taken([[0.2, 0.8], [0.6, 0.4]], [1, 0])
    array([0.8, 0.6])
    """
    proba = _as_proba(proba)
    codes = _as_actions(action, proba.shape[1], n_rows=proba.shape[0])
    return proba[np.arange(codes.size), codes]


def _as_proba(proba):
    values = np.asarray(proba, dtype=float)
    if values.ndim != 2:
        raise UserInputError(f"proba must be 2-D (decisions x actions); got shape {values.shape}")
    return values


def _binary_auc(positive, score):
    """Area under the ROC curve via the Mann–Whitney statistic with mid-ranks for ties."""
    ranks = rankdata(score)
    n_pos = positive.sum()
    n_neg = positive.size - n_pos
    return (ranks[positive].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg)


def multiclass_auc(action, proba, n_actions):
    """One-vs-rest macro-averaged AUC of a usual-care model.

    For each action ``k`` that occurs, the AUC of ``proba[:, k]`` for telling decisions with action ``k`` from
    all others (the Mann–Whitney form, ties counted one half; Hanley & McNeil 1982, Radiology 143:29); the result
    is the unweighted mean over those actions ("one-vs-rest, macro average"; Provost & Domingos 2000, as used by
    scikit-learn's ``roc_auc_score(multi_class="ovr", average="macro")``). Hand & Till (2001, Machine Learning
    45:171) average over pairs instead; it is not used here. With two actions both forms equal the ordinary AUC.

    Parameters
    ----------
    action : array_like of int, shape (n,)
        Action codes taken.
    proba : array_like, shape (n, n_actions)
        Predicted probabilities, columns in action-code order.
    n_actions : int
        Number of actions.

    Returns
    -------
    float
        The AUC; ``nan`` when fewer than two actions occur (discrimination is undefined).

    Examples
    --------
    >>> multiclass_auc([0, 0, 1, 1], [[0.9, 0.1], [0.6, 0.4], [0.3, 0.7], [0.5, 0.5]], 2)
    1.0
    """
    proba = _as_proba(proba)
    if proba.shape[1] != n_actions:
        raise UserInputError(f"proba has {proba.shape[1]} columns but n_actions is {n_actions}")
    codes = _as_actions(action, n_actions, n_rows=proba.shape[0])
    present = np.unique(codes)
    if present.size < 2:
        return float("nan")
    return float(np.mean([_binary_auc(codes == k, proba[:, k]) for k in present]))


class GradientBoostingBehaviour:
    """Histogram gradient boosting of the action taken on the state (usual-care model).

    A thin wrapper of scikit-learn's ``HistGradientBoostingClassifier`` (multinomial log-loss; Friedman 2001,
    Ann Stat 29:1189; Ke et al. 2017, LightGBM, NeurIPS) that returns one probability column per action code,
    like :class:`MultinomialLogitBehaviour`: actions absent from the training data get probability 0. Early
    stopping is off so that a fit depends only on the data and ``random_state``.

    Parameters
    ----------
    max_iter : int, default 100
        Boosting rounds.
    learning_rate : float, default 0.1
    max_leaf_nodes : int, default 31
    min_samples_leaf : int, default 20
    random_state : int or None
        Seed of the tie-breaking randomness (derive it from the protocol seed).
    n_threads : int or None, default 1
        OpenMP threads for fitting and prediction (``None``: scikit-learn's default, all cores). One thread
        keeps results byte-identical across machines and avoids oversubscription when several jobs share cores.

    Attributes
    ----------
    classes_ : ndarray of int
        Action codes that occur in the training data.
    n_actions_ : int
    n_features_in_ : int
    estimator_ : HistGradientBoostingClassifier or None
        The fitted scikit-learn model (``None`` when only one action occurs).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(300, 2))
    >>> model = GradientBoostingBehaviour(max_iter=10, random_state=0).fit(X, rng.integers(0, 2, 300), 3)
    >>> model.predict_proba(X).shape
    (300, 3)
    """

    def __init__(
        self, max_iter=100, learning_rate=0.1, max_leaf_nodes=31, min_samples_leaf=20, random_state=None, n_threads=1
    ):
        self.max_iter = max_iter
        self.learning_rate = learning_rate
        self.max_leaf_nodes = max_leaf_nodes
        self.min_samples_leaf = min_samples_leaf
        self.random_state = random_state
        self.n_threads = n_threads

    def fit(self, X, action, n_actions):
        """Fit on covariates ``X`` (n, p) and action codes ``action`` in ``0 .. n_actions-1``; returns self."""
        values, _ = _as_design(X)
        codes = _as_actions(action, n_actions, n_rows=values.shape[0])
        self.n_actions_ = int(n_actions)
        self.n_features_in_ = values.shape[1]
        self.classes_ = np.unique(codes)
        self.estimator_ = None
        if self.classes_.size > 1:
            estimator = HistGradientBoostingClassifier(
                max_iter=self.max_iter,
                learning_rate=self.learning_rate,
                max_leaf_nodes=self.max_leaf_nodes,
                min_samples_leaf=self.min_samples_leaf,
                early_stopping=False,
                random_state=self.random_state,
            )
            with threadpool_limits(limits=self.n_threads, user_api="openmp"):
                self.estimator_ = estimator.fit(values, codes)
        return self

    def predict_proba(self, X):
        """Probability of every action, shape (n, n_actions_), columns in action-code order."""
        values, _ = _prediction_design(self, X, "classes_")
        proba = np.zeros((values.shape[0], self.n_actions_))
        if self.estimator_ is None:
            proba[:, self.classes_[0]] = 1.0
        else:
            with threadpool_limits(limits=self.n_threads, user_api="openmp"):
                proba[:, self.classes_] = self.estimator_.predict_proba(values)
        return proba


@dataclass(frozen=True)
class BehaviourDesign:
    """Covariates of the usual-care model: scaled states, natural-spline bases, and the decision index.

    States named in ``spline_states`` enter through a natural cubic regression spline basis with ``spline_df``
    columns (patsy ``cr``, centred so the model's own intercept stays identifiable; Hastie & Tibshirani 1990,
    *Generalized Additive Models*; Wood 2017, *Generalized Additive Models*, 2nd ed., section 5.3.1). Knots sit
    at quantiles of the training values; beyond the outer knots the basis continues linearly. The other states
    enter linearly, scaled as in :class:`regimewise.features.StateScaler`, followed by its missing-indicator
    columns (0/1, for states with ``data.missing: indicator``; left out when constant in the training data).
    """

    scaler: StateScaler
    splines: tuple[tuple[str, object], ...]
    horizon: int
    include_step: bool

    @classmethod
    def fit(cls, frame, protocol):
        spec = protocol.behaviour_model
        scaler = StateScaler.fit(frame, protocol)
        use_splines = spec.kind == "multinomial_logit"
        splines = tuple(
            (name, _spline_basis(frame[name].to_numpy(dtype=float), spec.spline_df).design_info)
            for name in (spec.spline_states if use_splines else [])
        )
        return cls(scaler, splines, protocol.horizon, spec.include_step)

    def transform(self, frame):
        """Design matrix (n, len(names))."""
        spline_names = {name for name, _ in self.splines}
        linear = [j for j, name in enumerate(self.scaler.names) if name not in spline_names]
        blocks = [self.scaler.transform(frame)[:, linear]]
        for name, info in self.splines:
            blocks.append(np.asarray(patsy.build_design_matrices([info], {"x": frame[name].to_numpy(dtype=float)})[0]))
        if self.include_step:
            blocks.append((frame["step"].to_numpy(dtype=float) / max(self.horizon - 1, 1))[:, None])
        return np.column_stack(blocks)

    @property
    def names(self):
        spline_names = {name for name, _ in self.splines}
        names = [name for name in self.scaler.names if name not in spline_names]
        for name, info in self.splines:
            names += [f"ns({name})[{k}]" for k in range(len(info.column_names))]
        return names + (["step_fraction"] if self.include_step else [])


def _spline_basis(values, df):
    if np.unique(values).size <= df:
        raise UserInputError(
            f"a spline with {df} degrees of freedom needs more than {df} distinct values of its state; "
            "lower behaviour_model.spline_df or remove the state from behaviour_model.spline_states"
        )
    return patsy.dmatrix(f"cr(x, df={df}, constraints='center') - 1", {"x": values})


def patient_folds(patients, n_folds, seed):
    """Fold index (0 .. n_folds-1) of every row; all rows of a patient share one fold.

    Patients are shuffled by a generator seeded with ``seed`` and dealt round-robin into the folds, so fold
    sizes differ by at most one patient (cross-fitting by cluster: Chernozhukov et al. 2018, Econometrics J
    21:C1, section 3).

    Examples
    --------
    >>> folds = patient_folds(["a", "a", "b", "c"], 2, seed=0)
    >>> bool(folds[0] == folds[1]), sorted(set(folds.tolist()))
    (True, [0, 1])
    """
    codes, uniques = pd.factorize(np.asarray(patients), sort=True)
    if np.any(codes < 0):
        raise UserInputError("patient identifiers are missing; every decision needs one for cross-fitting")
    if uniques.size < n_folds:
        raise UserInputError(
            f"{uniques.size} patient(s) cannot fill {n_folds} cross-fitting folds; lower behaviour_model.folds"
        )
    order = np.random.default_rng(seed).permutation(uniques.size)
    fold_of_patient = np.empty(uniques.size, dtype=np.int64)
    fold_of_patient[order] = np.arange(uniques.size) % n_folds
    return fold_of_patient[codes]


def cross_fit_proba(make_model, X, action, n_actions, folds):
    """Out-of-fold probabilities: each row predicted by a model fitted on the other folds.

    Parameters
    ----------
    make_model : callable
        Returns a fresh, unfitted model with ``fit(X, action, n_actions)`` and ``predict_proba(X)``.
    X : array_like, shape (n, p)
    action : array_like of int, shape (n,)
    n_actions : int
    folds : array_like of int, shape (n,)
        Fold of every row (e.g. :func:`patient_folds`).

    Returns
    -------
    ndarray, shape (n, n_actions)

    References
    ----------
    Chernozhukov et al. (2018), Double/debiased machine learning, Econometrics J 21:C1 (cross-fitting).
    """
    values, _ = _as_design(X)
    codes = _as_actions(action, n_actions, n_rows=values.shape[0])
    folds = np.asarray(folds)
    proba = np.empty((values.shape[0], int(n_actions)))
    for fold in np.unique(folds):
        test = folds == fold
        model = make_model().fit(values[~test], codes[~test], n_actions)
        proba[test] = model.predict_proba(values[test])
    return proba


def apply_probability_floor(proba, floor):
    """Raise every probability below ``floor`` to ``floor`` and shrink the others proportionally.

    Rows still sum to 1 and every entry is at least ``floor`` (needs ``floor * n_actions <= 1``); entries
    shrunk below the floor by the rescaling are raised in turn. A floor bounds inverse-probability weights
    by ``1 / floor`` (a form of weight truncation; Cole & Hernán 2008, Am J Epidemiol 168:656).

    Examples
    --------
    >>> apply_probability_floor(np.array([[0.0, 0.2, 0.8]]), 0.1).round(4).tolist()
    [[0.1, 0.18, 0.72]]
    """
    proba = _as_proba(proba)
    if floor * proba.shape[1] > 1:
        raise UserInputError(f"probability floor {floor} times {proba.shape[1]} actions exceeds 1; lower the floor")
    if floor <= 0:
        return proba.copy()
    clipped = np.zeros(proba.shape, dtype=bool)
    result = proba.copy()
    for _ in range(proba.shape[1]):
        newly = (result < floor) & ~clipped
        if not newly.any():
            break
        clipped |= newly
        rest = np.where(clipped, 0.0, proba)
        budget = 1.0 - floor * clipped.sum(axis=1, keepdims=True)
        total = rest.sum(axis=1, keepdims=True)
        scale = np.divide(budget, total, out=np.zeros_like(total), where=total > 0)
        result = np.where(clipped, floor, rest * scale)
    return np.where(clipped.any(axis=1, keepdims=True), result, proba)
