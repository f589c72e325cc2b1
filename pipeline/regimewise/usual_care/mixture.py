"""Usual-care model with an even floor: a multinomial logit mixed with a share of decisions spread evenly over the
actions, the share estimated with the coefficients by maximum likelihood.

Routine care often takes every action now and then whatever the state (a clinician's habit, a patient's request,
a recording slip). A plain logit cannot represent such a floor: it pushes the probability of an action far from
where it is usual towards 0, so its inverse weights for those decisions are too large and the importance-weighted
estimators are biased. The mixture is the multinomial form of Copas's contaminated logistic regression (Copas
1988, J R Stat Soc B 50:225, section 4).
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy.special import chdtrc, expit

from regimewise.errors import ConvergenceWarning
from regimewise.usual_care.logit import (
    MultinomialLogitBehaviour,
    log_proba_by_class,
    log_proba_rows,
    prediction_design,
    rescale,
    row_blocks,
    unscale,
)

# The optimiser works on z = logit(share); these bounds keep the share in about [1e-9, 1 - 1e-9].
_Z_BOUNDS = (-20.0, 20.0)
# Start of the share: 5% of decisions from the even component (the plain logit's coefficients start the rest).
_Z_START = float(np.log(0.05 / 0.95))


def _mixture_pass(design, params, z, endog, n_classes, derivatives=True):
    """Log-likelihood, score and Hessian of the mixture in (β, z), summed over the records in row blocks; with
    ``derivatives`` False, the log-likelihood alone (the same number) and None, None.

    With s = softmax(x'β) over the classes (β = 0 for class 0), share λ = expit(z), P_a = (1 − λ) s_a + λ/K and
    r = (1 − λ) s_t / P_t for the class t taken (the posterior probability that the decision came from the logit
    part): ∂ log P_t/∂η_j = r (e_j − s_j); ∂² log P_t/∂η_j∂η_l = −r (δ_jl s_j − s_j s_l) + r (1 − r)(e_j − s_j)(e_l
    − s_l); ∂ log P_t/∂λ = (1/K − s_t)/P_t; ∂² log P_t/∂η_j∂λ = −(e_j − s_j) s_t / (K P_t²); ∂² log P_t/∂λ² =
    −((1/K − s_t)/P_t)², with e the indicator of t. Derivatives in z follow by the chain rule, dλ/dz = λ(1 − λ).
    The vector of parameters is β of class 1, then class 2, ..., then z.

    The block (j, l) of the Hessian in β is X'diag(w_jl)X with the weight w_jl of the second derivative above.
    The per-record quantities are held class by class (one contiguous row of the block's records per class, and
    the block's covariates transposed likewise), so that every elementwise product runs along the records
    instead of along a short row of classes or covariates, several times faster. The products and sums are the
    same operations in the same order as on records × classes arrays, and the matrix products the same ones, one
    per pair of classes: the result is the records × classes formulation's to the last bit (a test checks it).
    """
    n_cols, n_other = params.shape
    share = float(expit(z))
    dshare = share * (1.0 - share)
    total = 0.0
    score = np.zeros(n_other * n_cols + 1)
    hessian = np.zeros((n_other * n_cols + 1, n_other * n_cols + 1))
    for rows in row_blocks(design.shape[0]):
        X = design[rows]
        taken = endog[rows]
        by_record = np.arange(taken.size)
        s = np.exp(log_proba_by_class(X, params))  # (classes, records)
        s_taken = s[taken, by_record]
        p_taken = (1.0 - share) * s_taken + share / n_classes
        total += float(np.log(p_taken).sum())
        if not derivatives:
            continue
        r = (1.0 - share) * s_taken / p_taken
        residual = (np.arange(1, n_classes)[:, None] == taken) - s[1:]  # e_j − s_j, classes 1..K−1
        g_share = (1.0 / n_classes - s_taken) / p_taken
        score[:-1] += (X.T @ np.ascontiguousarray((r * residual).T)).T.ravel()
        score[-1] += float(g_share.sum()) * dshare
        cross = -(s_taken / (n_classes * p_taken**2)) * residual * dshare
        hessian[:-1, -1] += (X.T @ np.ascontiguousarray(cross.T)).T.ravel()
        hessian[-1, -1] += float((-(g_share**2) * dshare**2 + g_share * dshare * (1.0 - 2.0 * share)).sum())
        covariates = np.ascontiguousarray(X.T)
        weighted = np.empty_like(covariates)
        r_residual = r * (1.0 - r) * residual  # r (1 − r)(e_j − s_j), the first factors of every weight
        r_s = r * s[1:]
        for j in range(n_other):
            for k in range(j, n_other):
                weight = r_residual[j] * residual[k] + r_s[j] * s[k + 1]
                if j == k:
                    weight -= r_s[j]
                block = X.T @ np.multiply(weight, covariates, out=weighted).T
                hessian[j * n_cols : (j + 1) * n_cols, k * n_cols : (k + 1) * n_cols] += block
                if j != k:
                    hessian[k * n_cols : (k + 1) * n_cols, j * n_cols : (j + 1) * n_cols] += block.T
    if not derivatives:
        return total, None, None
    hessian[-1, :-1] = hessian[:-1, -1]
    return total, score, hessian


def _newton_mixture(design, endog, n_classes, params, z, maxiter, tol=1e-8):
    """Maximise the mixture's log-likelihood by Newton's method with step halving, from (params, z).

    Where the Hessian is not negative definite (far from the optimum) the step is taken along the score, scaled
    by the diagonal; every step is halved until the log-likelihood rises. z stays within :data:`_Z_BOUNDS`.
    Returns (params, z, log-likelihood, converged, iterations).
    """
    n_cols, n_other = params.shape
    theta = np.append(params.T.ravel(), z)

    def unpack(vector):
        return vector[:-1].reshape(n_other, n_cols).T, float(np.clip(vector[-1], *_Z_BOUNDS))

    llf, score, hessian = _mixture_pass(design, *unpack(theta), endog, n_classes)
    for iteration in range(1, maxiter + 1):
        information = -hessian
        try:
            np.linalg.cholesky(information)
            step = np.linalg.solve(information, score)
        except np.linalg.LinAlgError:
            step = score / np.maximum(np.abs(np.diag(information)), 1.0)
        # a step this small ends the fit once taken (a halved or clipped trial moves less): its trial point needs
        # the log-likelihood only, not the score and Hessian no further step would use
        last = bool(np.max(np.abs(step)) <= tol)
        for _ in range(60):
            trial = theta + step
            trial[-1] = np.clip(trial[-1], *_Z_BOUNDS)
            new_llf, new_score, new_hessian = _mixture_pass(
                design, *unpack(trial), endog, n_classes, derivatives=not last
            )
            if np.isfinite(new_llf) and new_llf >= llf - 1e-12 * abs(llf):
                break
            step = step / 2.0
        else:
            return *unpack(theta), llf, False, iteration
        moved = np.max(np.abs(trial - theta))
        if moved <= tol:
            return *unpack(trial), new_llf, True, iteration
        if new_hessian is None:  # rounding moved the point by more than the step: its derivatives after all
            new_llf, new_score, new_hessian = _mixture_pass(design, *unpack(trial), endog, n_classes)
        theta, llf, score, hessian = trial, new_llf, new_score, new_hessian
    return *unpack(theta), llf, False, maxiter


def boundary_p_value(statistic):
    """P-value of a likelihood-ratio statistic for one parameter tested at the boundary of its space.

    Under the null the statistic follows ½χ²₀ + ½χ²₁ (Self & Liang 1987, JASA 82:605, case 1), so the p-value is
    ½ P(χ²₁ > LR) for LR > 0 and 1 at LR = 0.

    >>> round(boundary_p_value(2.7055), 4)  # the 5% critical value of the 50:50 mixture is χ²₁'s 10% point
    0.05
    """
    # chdtrc(1, x) is the χ²₁ upper tail that scipy.stats.chi2.sf(x, 1) returns (it calls chdtrc), without
    # scipy.stats, which takes longer to import than the usual-care modules
    return float(0.5 * chdtrc(1, statistic)) if statistic > 0 else 1.0


class FloorMixtureLogitBehaviour:
    r"""Multinomial logit of the action taken on the state, mixed with an even floor (usual-care model).

    .. math:: P(A = k \mid x) = (1 - \lambda)\,\frac{\exp(\beta_{0k} + x^\top \beta_k)}
              {\sum_j \exp(\beta_{0j} + x^\top \beta_j)} + \frac{\lambda}{K},

    over the ``K`` actions that occur in the training data (an action never taken keeps probability exactly 0,
    as in :class:`~regimewise.usual_care.logit.MultinomialLogitBehaviour`), so every such action has probability
    at least ``floor_ = λ / K`` at every state. The share ``λ`` and the coefficients are estimated together by
    maximum likelihood (Copas 1988, J R Stat Soc B 50:225): the plain logit is fitted first (its checks of rank
    and separation apply, and it gives the starting coefficients), then the mixture's log-likelihood is maximised
    by Newton's method with step halving over the coefficients and ``z = logit(λ)`` (the observed information in
    :func:`_mixture_pass`), on centred and scaled covariates as the plain logit.

    ``λ = 0`` is the plain logit, so the mixture's log-likelihood is never below it. The likelihood-ratio test of
    ``λ = 0`` sits on the boundary of the parameter space: its statistic follows ½χ²₀ + ½χ²₁ under the null
    (Self & Liang 1987, JASA 82:605, case 1): :func:`boundary_p_value`.

    Parameters
    ----------
    maxiter : int, default 100
        Newton iterations of the plain logit, and again of the mixture.

    Attributes
    ----------
    classes_, n_actions_, n_features_in_, feature_names_in_ : as the plain logit.
    params_ : ndarray, shape (n_features_in_ + 1, len(classes_) - 1)
        The logit part's coefficients on the caller's scale (row 0 the intercepts).
    share_ : float
        ``λ``, the estimated share of decisions taken evenly at random among the actions.
    floor_ : float
        ``λ / K``, every observed action's smallest probability.
    llf_ : float
        Maximised log-likelihood of the mixture.
    logit_llf_ : float
        Maximised log-likelihood of the plain logit.
    lr_statistic_, p_value_ : float
        Likelihood-ratio test of ``λ = 0`` (boundary-corrected p-value).
    converged_ : bool
    n_iter_ : int
    method_ : str
        ``"newton"``.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(2000, 1))
    >>> eta = 3.0 * X[:, 0]
    >>> logit = np.exp(eta) / (1 + np.exp(eta))
    >>> p1 = 0.8 * logit + 0.1  # a share of 0.2 spread evenly over the two actions
    >>> model = FloorMixtureLogitBehaviour().fit(X, (rng.random(2000) < p1).astype(int), n_actions=2)
    >>> 0.1 < model.share_ < 0.3
    True
    """

    def __init__(self, maxiter=100):
        self.maxiter = maxiter

    def fit(self, X, action, n_actions, start=None):
        """Fit on covariates ``X`` (n, p) and action codes ``action`` (n,) in ``0 .. n_actions-1``; returns self.

        ``start``: a mixture (or a plain logit) fitted on other records of the same design columns (another
        cross-fitting fold's training records, say): its plain logit's coefficients start the plain logit's Newton
        iterations when it saw the same actions (:func:`~regimewise.usual_care.logit.warm_start`); the plain logit's
        maximum is unique, so only the iterations change. The mixture itself always starts from this fit's plain
        logit and a share of 5%: its likelihood may have several maxima (on a few thousand decisions, a start from
        another fold's mixture ended elsewhere), and the fit must not depend on where another fit ended.

        Raises :class:`UserInputError` where the plain logit does (malformed input, rank deficiency, complete
        separation, a breakdown even after BFGS).
        """
        logit = MultinomialLogitBehaviour(maxiter=self.maxiter)
        scaled = logit.fit_scaled(X, action, n_actions, start)  # the design, classes and scaling the mixture reuses
        for name in ("classes_", "n_actions_", "n_features_in_", "feature_names_in_"):
            setattr(self, name, getattr(logit, name))
        self.logit_llf_ = logit.llf_
        self.logit_params_ = logit.params_
        self.method_ = "newton"
        if self.classes_.size == 1:
            self.params_, self.share_, self.floor_ = logit.params_, 0.0, 0.0
            self.llf_, self.lr_statistic_, self.p_value_ = logit.llf_, 0.0, 1.0
            self.converged_, self.n_iter_ = True, 0
            return self
        design, endog, mean, scale = scaled.design, scaled.endog, scaled.mean, scaled.scale
        start = rescale(logit.params_, mean, scale)  # the plain logit's coefficients start the fit
        n_classes = self.classes_.size
        with np.errstate(over="ignore", under="ignore", divide="ignore"):
            params, z, llf, converged, iterations = _newton_mixture(
                design, endog, n_classes, start, _Z_START, self.maxiter
            )
        if llf < self.logit_llf_:  # a worse local optimum: the plain logit (share 0) is the better point
            params, z, llf = start, -np.inf, self.logit_llf_
        self.llf_ = float(llf)
        self.share_ = float(expit(z))
        self.floor_ = self.share_ / n_classes
        self.params_ = unscale(params, mean, scale)
        self.lr_statistic_ = float(max(0.0, 2.0 * (self.llf_ - self.logit_llf_)))
        self.p_value_ = boundary_p_value(self.lr_statistic_)
        self.converged_ = bool(converged)
        self.n_iter_ = int(iterations)
        if not self.converged_:
            warnings.warn(
                f"the usual-care model with an even floor did not converge in {self.maxiter} Newton iterations; "
                "raise behaviour_model.max_iterations or set behaviour_model.floor_mixture: false",
                ConvergenceWarning,
                stacklevel=2,
            )
        return self

    def predict_proba(self, X):
        """Probability of every action, shape (n, n_actions_), columns in action-code order."""
        values, _ = prediction_design(self, X, "params_")
        proba = np.zeros((values.shape[0], self.n_actions_))
        for rows in row_blocks(values.shape[0]):
            design = np.column_stack([np.ones(len(values[rows])), values[rows]])
            logit_part = np.exp(log_proba_rows(design, self.params_))
            proba[rows, self.classes_] = (1.0 - self.share_) * logit_part + self.floor_
        return proba
