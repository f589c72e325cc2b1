"""The one patient-fold function: patients (all of a patient's episodes together) dealt into K folds from a seed.
Used by cross-fitting of usual care, cross-fitted evaluation and cross-validated ridge penalties.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from regimewise.errors import UserInputError


def patient_folds(patients, n_folds, seed, setting="behaviour_model.folds"):
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
        raise UserInputError(f"{uniques.size} patient(s) cannot fill {n_folds} folds; lower {setting}")
    order = np.random.default_rng(seed).permutation(uniques.size)
    fold_of_patient = np.empty(uniques.size, dtype=np.int64)
    fold_of_patient[order] = np.arange(uniques.size) % n_folds
    return fold_of_patient[codes]
