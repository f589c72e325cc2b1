"""Usual-care model by histogram gradient boosting (scikit-learn), a flexible alternative to the multinomial logit;
it must be cross-fitted (``behaviour_model.folds`` ≥ 2).
"""

from __future__ import annotations

import numpy as np
from threadpoolctl import threadpool_limits

from regimewise.core.arrays import as_actions
from regimewise.usual_care.logit import as_design, prediction_design


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
        values, _ = as_design(X)
        codes = as_actions(action, n_actions, n_rows=values.shape[0])
        self.n_actions_ = int(n_actions)
        self.n_features_in_ = values.shape[1]
        self.classes_ = np.unique(codes)
        self.estimator_ = None
        if self.classes_.size > 1:
            from sklearn.ensemble import HistGradientBoostingClassifier  # only boosted usual-care models need it

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
        values, _ = prediction_design(self, X, "classes_")
        proba = np.zeros((values.shape[0], self.n_actions_))
        if self.estimator_ is None:
            proba[:, self.classes_[0]] = 1.0
        else:
            with threadpool_limits(limits=self.n_threads, user_api="openmp"):
                proba[:, self.classes_] = self.estimator_.predict_proba(values)
        return proba
