"""Fitting the protocol's usual-care (behaviour) model, with K-fold cross-fitting by patient when the protocol asks,
and the probability floor.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.core.features import StateScaler, action_codes, patient_clusters
from regimewise.core.folds import patient_folds
from regimewise.core.seeds import stream_ints
from regimewise.protocol.model import Protocol
from regimewise.usual_care.boosting import GradientBoostingBehaviour
from regimewise.usual_care.crossfit import apply_probability_floor, cross_fit_proba
from regimewise.usual_care.design import BehaviourDesign
from regimewise.usual_care.logit import MultinomialLogitBehaviour
from regimewise.usual_care.mixture import FloorMixtureLogitBehaviour


@dataclass(frozen=True, eq=False)
class UsualCareModel:
    """The fitted usual-care model, its design, and the cross-fitted probabilities of the training records.

    ``model`` is fitted on all decisions and predicts new states (e.g. new patients in the simulator);
    ``record_proba`` holds each training decision's out-of-fold probabilities (the model of the other folds'
    patients), both raised to the protocol's probability floor.
    """

    design: BehaviourDesign
    model: MultinomialLogitBehaviour | FloorMixtureLogitBehaviour | GradientBoostingBehaviour
    floor: float
    record_proba: np.ndarray
    folds: np.ndarray

    @property
    def scaler(self) -> StateScaler:
        return self.design.scaler

    def predict_proba(self, frame: pd.DataFrame) -> np.ndarray:
        """Estimated probability of each action (protocol order) at each row's state and step."""
        return apply_probability_floor(self.model.predict_proba(self.design.transform(frame)), self.floor)


def _behaviour_model_factory(protocol: Protocol, seed: int):
    spec = protocol.behaviour_model
    if spec.kind == "gradient_boosting":
        return lambda: GradientBoostingBehaviour(max_iter=spec.max_iterations, random_state=seed)
    if spec.floor_mixture:
        return lambda: FloorMixtureLogitBehaviour(maxiter=spec.max_iterations)
    return lambda: MultinomialLogitBehaviour(maxiter=spec.max_iterations)


def fit_usual_care(decisions: pd.DataFrame, protocol: Protocol, start=None) -> UsualCareModel:
    """Fit the protocol's usual-care model with K-fold cross-fitting by patient (none when ``folds`` is 1).

    The model (multinomial logit, optionally mixed with an even floor, or gradient boosting; optionally with
    spline terms) is fitted once per fold
    for the records' out-of-fold probabilities and once on all decisions for new states. Seeds come from the
    protocol's root seed (stream ``usual_care`` of :mod:`regimewise.core.seeds`).

    ``start``: a usual-care model fitted on other records of the same protocol (``UsualCareModel.model`` of another
    cross-fitting fold's training records, say), whose coefficients start the Newton iterations of the logit
    model fitted on all decisions (``fit(..., start=)``): the same maximum, in fewer iterations. Boosting, and the
    models of the folds of ``behaviour_model.folds``, ignore it.
    """
    spec = protocol.behaviour_model
    model_seed = stream_ints(protocol.seed, "usual_care", 2)[1]
    design = BehaviourDesign.fit(decisions, protocol)
    X = design.transform(decisions)
    codes = action_codes(decisions, protocol.action_labels)
    make_model = _behaviour_model_factory(protocol, int(model_seed))
    warm = {} if start is None or spec.kind == "gradient_boosting" else {"start": start}
    model = make_model().fit(X, codes, len(protocol.actions), **warm)
    folds = usual_care_folds(decisions, protocol)
    if spec.folds == 1:  # parametric model, no cross-fitting: in-sample probabilities for the records
        out_of_fold = model.predict_proba(X)
    else:
        out_of_fold = cross_fit_proba(make_model, X, codes, len(protocol.actions), folds)
    floor = spec.probability_floor
    return UsualCareModel(design, model, floor, apply_probability_floor(out_of_fold, floor), folds)


def usual_care_folds(decisions: pd.DataFrame, protocol: Protocol) -> np.ndarray:
    """The fold of each decision in the usual-care model's cross-fitting by patient (all 0 with one fold): the
    folds :func:`fit_usual_care` uses, from the records' patients and the protocol's root seed, so another job can
    find them again."""
    spec = protocol.behaviour_model
    if spec.folds == 1:
        return np.zeros(len(decisions), dtype=np.int64)
    fold_seed = stream_ints(protocol.seed, "usual_care", 2)[0]
    return patient_folds(patient_clusters(decisions), spec.folds, int(fold_seed))
