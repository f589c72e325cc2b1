"""Pessimism for fitted-Q iteration: a bootstrap ensemble of Q-models, actions ranked by mean − k·sd.

Each Q-model of the learning loop (one per decision point, or the pooled one) is fitted on the full sample
and on ``B`` bootstrap resamples of patients (Efron & Tibshirani 1993, ch. 6; resampling whole patients keeps
their decisions together). Actions are ranked by the pessimistic score

    Q_full(s, a) − k · sd_b Q_b(s, a),

and the value carried backwards is the score of the chosen action, so the penalty propagates through the
induction as in pessimistic value iteration (Jin, Yang & Wang 2021). The centre is the full-sample fit rather
than the bootstrap mean, so ``k = 0`` reproduces the plain regime exactly; the bootstrap supplies the spread.

References
----------
Jin, Y., Yang, Z. & Wang, Z. (2021). Is pessimism provably efficient for offline RL? ICML.
Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap. Chapman & Hall.
"""

from __future__ import annotations

import numpy as np


def patient_bootstrap_weights(groups, n_replicates, seed):
    """Multiplicity of every row in each bootstrap resample of patients (rows of a patient move together).

    Parameters
    ----------
    groups : ndarray of int, shape (n,)
        Patient (cluster) code of every row.
    n_replicates : int
    seed : int or numpy.random.SeedSequence

    Returns
    -------
    ndarray of float, shape (n_replicates, n)
        Each row's weight: how many times its patient was drawn in that resample.
    """
    codes = np.unique(np.asarray(groups), return_inverse=True)[1]
    n_patients = int(codes.max()) + 1
    rng = np.random.default_rng(seed)
    draws = rng.integers(0, n_patients, size=(n_replicates, n_patients))
    multiplicity = np.stack([np.bincount(d, minlength=n_patients) for d in draws])
    return multiplicity[:, codes].astype(float)


class PessimisticEnsemble:
    """A Q-model fitted on the full sample plus one per bootstrap resample; scores = full − k · sd.

    Parameters
    ----------
    make_model : callable returning an unfitted action model (``fit(X, action, y, weight)``, ``predict(X)``)
    weights : ndarray, shape (B, n_all)
        Bootstrap multiplicities of every row of the whole decision table (:func:`patient_bootstrap_weights`).
    k : float
        Pessimism multiplier (>= 0).
    """

    def __init__(self, make_model, weights, k):
        self.make_model = make_model
        self.weights = weights
        self.k = k

    def fit(self, X, action, y, rows):
        """Fit the full-sample model and the bootstrap models on the table rows ``rows``; return ``self``."""
        self.full_ = self.make_model().fit(X, action, y, None)
        self.replicates_ = [self.make_model().fit(X, action, y, w[rows]) for w in self.weights]
        return self

    def predict(self, X):
        """Full-sample Q-values (n, K)."""
        return self.full_.predict(X)

    def spread(self, X):
        """Bootstrap standard deviation (n, K) of each action's Q; 0 where fewer than two replicates define it."""
        draws = np.stack([m.predict(X) for m in self.replicates_])
        defined = (~np.isnan(draws)).sum(axis=0)
        with np.errstate(invalid="ignore"):
            sd = np.nanstd(np.where(defined >= 2, draws, 0.0), axis=0, ddof=1)
        return np.where(defined >= 2, sd, 0.0)

    def score(self, X):
        """Pessimistic score Q_full − k · sd (n, K); equals :meth:`predict` when ``k == 0``."""
        return self.predict(X) - self.k * self.spread(X)
