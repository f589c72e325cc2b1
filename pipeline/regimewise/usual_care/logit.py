"""Usual-care (behaviour) models: the probability of every action given the state.

The usual-care model estimates how clinicians chose among the actions in the records. Its probabilities give the
propensity scores of inverse-probability weighting (Rosenbaum & Rubin 1983, Biometrika 70:41) and the behaviour
policy of off-policy evaluation (Precup, Sutton & Singh 2000).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import log_softmax

from regimewise.core.arrays import as_actions
from regimewise.errors import ConvergenceWarning, StatisticalWarning, UserInputError

# A log-likelihood this close to 0 means the covariates predict every action taken with certainty: complete
# separation, where the maximum-likelihood estimate does not exist (Albert & Anderson 1984, Biometrika 71:1).
_SEPARATION_LLF = -1e-6


def as_design(X, what="X"):
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


def standardise(values):
    """Column means and scales for a numerically stable fit; constant columns get scale 0.

    One column at a time, so no temporary of the whole matrix's size is made. Each column is copied once into
    a contiguous array and its mean and standard deviation are taken there: numpy sums a strided column and its
    contiguous copy in the same (pairwise) order, so the numbers are the same, and the column is gathered from
    across the whole matrix once instead of in every pass of the mean and the deviation, about twice as fast."""
    mean, scale = np.empty(values.shape[1]), np.empty(values.shape[1])
    for j in range(values.shape[1]):
        column = np.ascontiguousarray(values[:, j])
        mean[j], scale[j] = column.mean(), column.std()
    constant = np.ptp(values, axis=0) == 0
    scale[constant] = 0.0
    return mean, scale


def prediction_design(model, X, fitted_attribute):
    """Check that ``model`` is fitted and ``X`` has its number of columns; return ``as_design(X)``."""
    if not hasattr(model, fitted_attribute):
        from sklearn.exceptions import NotFittedError  # scikit-learn's, imported where it is raised

        raise NotFittedError(f"this {type(model).__name__} is not fitted yet; call fit(X, action, n_actions)")
    values, names = as_design(X)
    if values.shape[1] != model.n_features_in_:
        raise UserInputError(f"X has {values.shape[1]} columns but the model was fitted on {model.n_features_in_}")
    return values, names


def _run_mnlogit(design, endog, method, maxiter, start=None):
    """Maximum-likelihood fit of the multinomial logit, or ``None`` when it breaks down (singular Hessian,
    non-finite estimates).

    ``"newton"`` is :func:`_newton_mnlogit`, which reads the records in blocks, from ``start`` (coefficients on
    the design's scale) if given; any other method is statsmodels' ``MNLogit`` optimiser of that name, from
    statsmodels' start, whose own warnings are silenced here (the caller reports convergence problems in its own
    words).
    """
    if method == "newton":
        return _newton_mnlogit(design, endog, maxiter, start=start)
    import statsmodels.api as sm  # only the other optimisers: a job fitting by Newton does not load statsmodels

    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        try:
            result = sm.MNLogit(endog, design).fit(method=method, maxiter=maxiter, disp=0, skip_hessian=True)
        except np.linalg.LinAlgError:
            return None
    if not np.all(np.isfinite(result.params)):
        return None
    retvals = result.mle_retvals
    return MNLogitFit(np.asarray(result.params), bool(retvals.get("converged", True)), retvals.get("iterations"))


@dataclass(frozen=True)
class ScaledDesign:
    """What a fit ran on: the design (:func:`scaled_design`), the index in ``classes_`` of every record's action,
    and the covariates' means and scales (:func:`standardise`)."""

    design: np.ndarray
    endog: np.ndarray
    mean: np.ndarray
    scale: np.ndarray


@dataclass(frozen=True)
class MNLogitFit:
    """Coefficients (one column per non-reference class), whether the optimiser converged, iterations used."""

    params: np.ndarray
    converged: bool
    iterations: int | None


# Rows per block of every pass over the records (Newton step, rank, log-likelihood, probabilities): about 20 MB
# of temporaries with 13 columns and 4 classes.
BLOCK_ROWS = 65_536


def row_blocks(n_rows, size=None):
    """Slices of consecutive rows, ``size`` (default :data:`BLOCK_ROWS`) at a time."""
    size = BLOCK_ROWS if size is None else size
    return (slice(start, start + size) for start in range(0, n_rows, size))


# Step halvings of Newton's method before a fit that cannot raise its log-likelihood stops (see _newton_mnlogit).
HALVINGS = 30
# Relative fall of the log-likelihood that counts as rounding near the maximum, not as a worse point.
LLF_ROUNDING = 1e-9


def _newton_mnlogit(design, endog, maxiter, tol=1e-8, ridge=1e-10, start=None):
    """Newton's method for the multinomial logit, as statsmodels' ``MNLogit.fit(method="newton")`` runs it, with
    step halving where a full step would lower the log-likelihood.

    Start at 0 (or at ``start``, coefficients (columns, classes - 1) on the design's scale); each step solves (H +
    ridge·I) Δ = −score with the Hessian H of the log-likelihood; stop when no coefficient moves by more than
    ``tol`` or after ``maxiter`` passes (then ``converged`` is False). statsmodels' defaults (``tol`` 1e-8, ridge
    1e-10) are kept, so both give the same estimates to rounding; the tests check it. The score and the Hessian are
    sums over the records, accumulated here block by block: with A_j = X·p_j (each row of X times the probability of
    class j), −H has blocks δ_jl X'diag(p_j)X − A_j'A_l, two matrix products per block (Agresti 2013, Categorical
    Data Analysis, 3rd ed., §8.1 for the likelihood equations).
    Memory stays at a block's worth of temporaries instead of several copies of the design.

    The log-likelihood is concave, so a full Newton step raises it wherever the quadratic model holds and the
    iterates are statsmodels' exactly. Under (quasi-)separation the estimates diverge, the fitted probabilities
    reach 0 and 1 in floating point and the Hessian turns singular; a full step can then jump to a far worse point
    (how far depends on rounding, so on the numpy and BLAS build). Each pass therefore also sums the
    log-likelihood, and a step that lowered it by more than rounding (:data:`LLF_ROUNDING`) is halved, up to
    :data:`HALVINGS` times, before the fit stops unconverged at its best point (the usual safeguard of Newton's
    method, backtracking: Nocedal & Wright 2006, Numerical Optimization, 2nd ed., §3.1).
    """
    n_rows, n_cols = design.shape
    n_other = int(endog.max())  # classes 1 .. n_other against the reference class 0
    params = np.zeros((n_cols, n_other)) if start is None else np.array(start, dtype=float)
    if params.shape != (n_cols, n_other):
        raise ValueError(f"start has shape {params.shape}; the design needs {(n_cols, n_other)}")
    others = np.arange(1, n_other + 1)
    best = None  # (params, log-likelihood, step) of the last point a step was taken from
    halvings = 0
    for iteration in range(1, maxiter + 1):
        score = np.zeros((n_other, n_cols))
        information = np.zeros((n_other * n_cols, n_other * n_cols))
        llf = 0.0
        with np.errstate(all="ignore"):
            for rows in row_blocks(n_rows):
                X = design[rows]
                log_proba = log_proba_by_class(X, params)
                llf += float(log_proba[endog[rows], np.arange(len(X))].sum())
                proba = np.ascontiguousarray(np.exp(log_proba[1:]).T)  # records × classes, as the products want
                taken = endog[rows, None] == others
                score += (taken - proba).T @ X
                A = (X[:, None, :] * proba[:, :, None]).reshape(len(X), -1)  # columns: class-major, as the blocks
                information -= A.T @ A
                weighted = A.T @ X
                for j in range(n_other):
                    block = slice(j * n_cols, (j + 1) * n_cols)
                    information[block, block] += weighted[block]
        # the step lowered the likelihood beyond rounding (or made it undefined)
        if best is not None and not llf >= best[1] - LLF_ROUNDING * (1.0 + abs(best[1])):
            if halvings == HALVINGS:
                return MNLogitFit(best[0], False, iteration)
            halvings += 1
            best = (best[0], best[1], best[2] / 2.0)
            params = best[0] - best[2]
            continue
        halvings = 0
        hessian = -information
        hessian[np.diag_indices_from(hessian)] += ridge
        try:
            step = np.linalg.solve(hessian, score.ravel())
        except np.linalg.LinAlgError:
            return None
        step = step.reshape(n_other, n_cols).T
        best = (params, llf, step)
        params = params - step
        if not np.all(np.isfinite(params)):
            return None
        if np.all(np.abs(step) <= tol):
            return MNLogitFit(params, True, iteration)
    return MNLogitFit(params, False, maxiter)


# Rows of the covariates centred and scaled at a time by scaled_design: a block that stays in the processor's cache.
FILL_ROWS = 4096


def scaled_design(values, mean, scale):
    """The intercept column, then every varying covariate centred and scaled: filled a few thousand rows at a
    time (:data:`FILL_ROWS`), so the only full-size array made is the design itself and every row is written
    once and in order (column by column, each column's writes stride across the whole design, several times
    slower). Each entry is (value − mean) / scale, whatever the order of filling."""
    varying = np.flatnonzero(scale > 0)
    design = np.empty((values.shape[0], varying.size + 1))
    design[:, 0] = 1.0
    centre, spread = mean[varying], scale[varying]
    for rows in row_blocks(values.shape[0], FILL_ROWS):
        block = design[rows, 1:]
        np.subtract(values[rows][:, varying], centre, out=block)
        block /= spread
    return design


def column_rank(design, block_rows=None):
    """``numpy.linalg.matrix_rank(design)`` for a tall matrix, read in blocks of rows.

    The triangular factor R of a QR decomposition has the singular values of ``design``; R is updated block by
    block (the R of [R; next block]), so no copy of the whole matrix is made. Singular values above numpy's
    default tolerance, largest × max(rows, columns) × machine epsilon, count.
    """
    r = np.zeros((0, design.shape[1]))
    for rows in row_blocks(design.shape[0], block_rows):
        r = np.linalg.qr(np.vstack([r, design[rows]]), mode="r")
    singular = np.linalg.svd(r, compute_uv=False)
    if singular.size == 0 or singular.max() == 0:
        return 0
    return int(np.sum(singular > singular.max() * max(design.shape) * np.finfo(float).eps))


# numpy sums fewer than this many values one after the other, (((a0 + a1) + a2) + ...), and more pairwise.
_SEQUENTIAL_SUM = 8


def log_softmax_by_class(linear):
    """``scipy.special.log_softmax(linear.T, axis=1).T`` to the last bit, for linear predictors laid out class
    by class, shape (classes, records), and several times faster with few classes.

    scipy's max and sum of exponentials over the classes of each record are reductions along a short, fast axis,
    slow in numpy; over the class rows they are elementwise operations along the records. The max is exact in
    any order, and the sum adds the classes in scipy's order, one after the other, as numpy does with fewer than
    :data:`_SEQUENTIAL_SUM` values; with more classes numpy sums pairwise, so scipy is called.
    """
    if linear.shape[0] >= _SEQUENTIAL_SUM:
        return log_softmax(linear.T, axis=1).T
    top = linear.max(axis=0)
    top[~np.isfinite(top)] = 0  # as scipy: an infinite or missing maximum shifts nothing
    shifted = linear - top
    with np.errstate(divide="ignore"):
        return shifted - np.log(np.exp(shifted).sum(axis=0))


def log_proba_by_class(design, params):
    """Log-probabilities of the reference class and the others, shape (classes, records), computed stably in
    log space (:func:`log_softmax_by_class`).

    ``design`` includes the constant column; ``params`` has one column per non-reference class.
    """
    linear = np.zeros((params.shape[1] + 1, design.shape[0]))
    linear[1:] = (design @ params).T
    return log_softmax_by_class(linear)


def log_proba_rows(design, params):
    """:func:`log_proba_by_class` with one row per record, shape (records, classes)."""
    return log_proba_by_class(design, params).T


def _log_likelihood(design, endog, params) -> float:
    """Σ log P(action taken), in log space and over blocks of records (no full-size temporaries)."""
    total = 0.0
    for rows in row_blocks(design.shape[0]):
        log_proba = log_proba_by_class(design[rows], params)
        total += float(log_proba[endog[rows], np.arange(log_proba.shape[1])].sum())
    return total


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

    Fitted by maximum likelihood (McFadden 1974, in *Frontiers in Econometrics*; Agresti 2013, *Categorical Data
    Analysis*, 3rd ed., ch. 8): Newton's method as statsmodels ``MNLogit`` runs it, over the records in blocks
    (:func:`_newton_mnlogit`), or statsmodels' own optimiser for any other ``method``. With two actions it is
    ordinary logistic regression. The class adds the intercept; the caller builds the design matrix (indicator
    columns for categories, squares, ...) and must not include a constant column of its own.

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
        ``"newton"`` (the blockwise Newton iteration), or a statsmodels optimiser (``"bfgs"``, ``"lbfgs"``,
        ``"nm"``, ...).

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

    def fit(self, X, action, n_actions, start=None):
        """Fit the model on covariates ``X`` (n, p) and action codes ``action`` (n,) in ``0 .. n_actions-1``.

        ``start``: a model fitted on other records of the same design columns (another cross-fitting fold's
        training records, say; a plain logit, or a mixture with an even floor, whose plain logit is read), whose
        coefficients start Newton's method instead of 0 when it saw the same actions (:func:`warm_start`). The
        maximum is the same; fewer iterations reach it.

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
        self.fit_scaled(X, action, n_actions, start)
        return self

    def fit_scaled(self, X, action, n_actions, start=None):
        """:meth:`fit`, returning the design it ran on (a :class:`ScaledDesign`; ``None`` when only one action
        occurs), so that a model refined from this fit (:class:`~regimewise.usual_care.mixture.
        FloorMixtureLogitBehaviour`) need not check, standardise and copy the covariates a second time."""
        values, names = as_design(X)
        codes = as_actions(action, n_actions, n_rows=values.shape[0])
        self.n_actions_ = int(n_actions)
        self.n_features_in_ = values.shape[1]
        self.feature_names_in_ = names
        self.classes_ = np.unique(codes)
        mean, scale = standardise(values)
        self._warn_constant_columns(scale == 0)
        if self.classes_.size == 1:
            self.params_ = np.zeros((self.n_features_in_ + 1, 0))
            self.converged_, self.n_iter_, self.llf_, self.method_ = True, 0, 0.0, None
            return None
        design = scaled_design(values, mean, scale)
        self._check_rank(design)
        endog = np.searchsorted(self.classes_, codes)
        plain = "logit_params_" if hasattr(start, "logit_params_") else "params_"  # a mixture's plain logit
        result = self._fit_mnlogit(design, endog, warm_start(start, self, plain, mean, scale))
        params = np.asarray(result.params)
        # statsmodels' llf overflows to nan when probabilities saturate; compute it in log space instead.
        llf = _log_likelihood(design, endog, params)
        if llf > _SEPARATION_LLF:
            raise UserInputError(_breakdown_message("every action taken is predicted with probability 1"))
        self.params_ = unscale(params, mean, scale)
        self.converged_ = result.converged
        self.n_iter_ = result.iterations
        self.llf_ = llf
        self._warn_fit_problems()
        return ScaledDesign(design, endog, mean, scale)

    def predict_proba(self, X):
        """Probability of every action, shape (n, n_actions_), columns in action-code order."""
        values, names = prediction_design(self, X, "params_")
        if names is not None and self.feature_names_in_ is not None and names != self.feature_names_in_:
            raise UserInputError("X has different column names or order than at fit; pass the same design columns")
        proba = np.zeros((values.shape[0], self.n_actions_))
        for rows in row_blocks(values.shape[0]):  # blocks: no full-size copy of the design
            design = np.column_stack([np.ones(len(values[rows])), values[rows]])
            proba[rows, self.classes_] = np.exp(log_proba_rows(design, self.params_))
        return proba

    def _fit_mnlogit(self, design, endog, start=None):
        """Fit MNLogit (Newton's method from ``start``, on the design's scale, if given); if Newton's method breaks
        down, refit once with BFGS; if that fails too, raise."""
        self.method_ = self.method
        result = _run_mnlogit(design, endog, self.method, self.maxiter, start)
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
        rank = column_rank(design)
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


def warm_start(model, fitting, attribute, mean, scale):
    """The coefficients ``attribute`` of ``model`` (a model fitted on other records) on the scale of the fit under
    way (``fitting``, whose classes and columns are set, and its covariates' ``mean`` and ``scale``), to start
    Newton's method there; None (start as usual) without a model, or when the two saw different actions or
    columns, or the model's coefficients are not finite."""
    if model is None or not hasattr(model, attribute):
        return None
    if not np.array_equal(model.classes_, fitting.classes_) or model.n_features_in_ != fitting.n_features_in_:
        return None
    params = np.asarray(getattr(model, attribute), dtype=float)
    if params.shape != (fitting.n_features_in_ + 1, fitting.classes_.size - 1) or not np.isfinite(params).all():
        return None
    return rescale(params, mean, scale)


def rescale(params, mean, scale):
    """Coefficients on the original covariates (row 0 the intercepts) mapped onto the centred and scaled
    covariates of a fit: the inverse of :func:`unscale` (a constant column, left out of the fit, moves into the
    intercept at its value)."""
    varying = scale > 0
    return np.vstack([params[0] + mean @ params[1:], params[1:][varying] * scale[varying, None]])


def unscale(params_scaled, mean, scale):
    """Map coefficients on centred and scaled covariates back to the original covariates."""
    varying = scale > 0
    slopes = np.zeros((scale.size, params_scaled.shape[1]))
    slopes[varying] = params_scaled[1:] / scale[varying, None]
    intercept = params_scaled[0] - mean @ slopes
    return np.vstack([intercept, slopes])
