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

from dataclasses import dataclass

import numpy as np

# rows per block of the ensemble's spread: 20 replicates x 4 actions = 2.6 MB of draws, which stay in the cache
# (blocks of 4,096 rows are about three times faster than blocks of 100,000; the same bits, as each block starts at
# a multiple of 4,096 rows, so the matrix product takes its rows in the same tiles as on the whole table)
SPREAD_BLOCK_ROWS = 4096


@dataclass(frozen=True)
class PatientResamples:
    """Bootstrap resamples of patients kept per patient: how many times each resample drew each patient
    (``counts``, (B, P)) and each row's patient (``patient``, (n,) codes 0..P-1).

    A model gathers the row weights of its own rows (:meth:`rows`), so the (B, n) weights of the whole decision
    table never exist at once (20 resamples of 12 million decisions would be 1.9 GB of float64).
    """

    counts: np.ndarray
    patient: np.ndarray

    def __len__(self) -> int:
        return self.counts.shape[0]

    def rows(self, rows) -> np.ndarray:
        """Weights (B, len(rows)) of the table rows ``rows``: how many times each row's patient was drawn."""
        return self.counts[:, self.patient[rows]].astype(float)


def patient_resamples(groups, n_replicates, seed) -> PatientResamples:
    """Draw ``n_replicates`` bootstrap resamples of the patients of ``groups`` (n,) with ``seed`` (an int or a
    ``numpy.random.SeedSequence``): each resample draws as many patients as there are, with replacement."""
    codes = np.unique(np.asarray(groups), return_inverse=True)[1]
    n_patients = int(codes.max()) + 1
    rng = np.random.default_rng(seed)
    draws = rng.integers(0, n_patients, size=(n_replicates, n_patients))
    return PatientResamples(np.stack([np.bincount(d, minlength=n_patients) for d in draws]), codes)


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
        Each row's weight: how many times its patient was drawn in that resample (the resamples of
        :func:`patient_resamples` with the same seed).
    """
    resamples = patient_resamples(groups, n_replicates, seed)
    return resamples.rows(np.arange(resamples.patient.size))


class PessimisticEnsemble:
    """A Q-model fitted on the full sample plus one per bootstrap resample; scores = full − k · sd.

    Parameters
    ----------
    make_model : callable returning an unfitted action model (``fit(X, action, y, weight)``, ``predict(X)``)
    resamples : PatientResamples
        Bootstrap resamples of the patients of the whole decision table (:func:`patient_resamples`); let go of
        (set to None) by :meth:`fit` once it has taken its rows' weights.
    k : float
        Pessimism multiplier (>= 0).
    """

    def __init__(self, make_model, resamples, k):
        self.make_model = make_model
        self.resamples = resamples
        self.k = k

    def fit(self, X, action, y, rows):
        """Fit the full-sample model and the bootstrap models on the table rows ``rows``; return ``self``.

        Linear models (``fit_design``) share one design matrix [1, X] (as their own ``fit`` builds it) instead of
        building it once per fit: with separate slopes as each action's rows of it (``cells``, built from X; no
        design of the whole table beside them), instead of selecting them once per fit.
        """
        model, weights = self.make_model(), self.resamples.rows(rows)
        self.resamples = None  # the weights are taken: the fitted ensemble does not keep the table's resamples alive
        if hasattr(model, "fit_design"):
            cells = model.cells(X, action, y)
            design = np.hstack([np.ones((X.shape[0], 1)), X]) if cells is None else None
            self.full_ = model.fit_design(design, action, y, None, cells)
            self.replicates_ = [self.make_model().fit_design(design, action, y, w, cells) for w in weights]
        else:
            self.full_ = model.fit(X, action, y, None)
            self.replicates_ = [self.make_model().fit(X, action, y, w) for w in weights]
        return self

    def predict(self, X):
        """Full-sample Q-values (n, K)."""
        return self.full_.predict(X)

    def _draws(self, X):
        """Every replicate's Q-values (B, n, K), C-contiguous; linear replicates in one matrix product on one design
        matrix."""
        if not all(hasattr(m, "coef_") for m in self.replicates_):
            return np.stack([m.predict(X) for m in self.replicates_])
        design = np.hstack([np.ones((X.shape[0], 1)), X])
        coef = np.concatenate([m.coef_.T for m in self.replicates_], axis=1)  # (p + 1, B * K)
        q = design @ coef
        # contiguous, so the standard deviation over replicates runs over long rows (the same sums, in the same
        # order, as on the strided view: replicate after replicate for each row and action)
        return np.ascontiguousarray(q.reshape(X.shape[0], len(self.replicates_), -1).transpose(1, 0, 2))

    def spread(self, X):
        """Bootstrap standard deviation (n, K) of each action's Q; 0 where fewer than two replicates define it.

        Computed in blocks of :data:`SPREAD_BLOCK_ROWS` rows, so the (B, rows, K) draws stay small whatever the
        number of decisions (each row's spread depends on that row only; on the block boundaries, see the constant).
        """
        X = np.asarray(X)
        if X.shape[0] <= SPREAD_BLOCK_ROWS:
            return self._block_spread(X)
        starts = range(0, X.shape[0], SPREAD_BLOCK_ROWS)
        return np.concatenate([self._block_spread(X[start : start + SPREAD_BLOCK_ROWS]) for start in starts])

    def _block_spread(self, X):
        draws = self._draws(X)
        missing = np.isnan(draws)
        if not missing.any():  # numpy's nanstd without NaN is std, operation for operation
            return np.std(draws, axis=0, ddof=1) if len(draws) >= 2 else np.zeros(draws.shape[1:])
        defined = (~missing).sum(axis=0)
        with np.errstate(invalid="ignore"):
            sd = np.nanstd(np.where(defined >= 2, draws, 0.0), axis=0, ddof=1)
        return np.where(defined >= 2, sd, 0.0)

    def score(self, X, predicted=None):
        """Pessimistic score Q_full − k · sd (n, K); equals :meth:`predict` when ``k == 0``. ``predicted``:
        :meth:`predict` of ``X`` when the caller has it (not computed again)."""
        return (self.predict(X) if predicted is None else predicted) - self.k * self.spread(X)
