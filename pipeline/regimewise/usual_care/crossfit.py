"""Cross-fitted usual-care probabilities (each patient's decisions predicted by a model fitted on the other folds)
and the probability floor that caps every inverse probability.
"""

from __future__ import annotations

import numpy as np

from regimewise.core.arrays import as_actions, as_proba
from regimewise.errors import UserInputError
from regimewise.usual_care.logit import as_design


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
    values, _ = as_design(X)
    codes = as_actions(action, n_actions, n_rows=values.shape[0])
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
    proba = as_proba(proba)
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
