"""Learning a support-constrained regime from validated decisions.

:func:`fit_usual_care` fits the usual-care (behaviour) model of the protocol; :func:`learn_regime` fits it
and then the fitted-Q iteration (Murphy 2005; Ernst, Geurts & Wehenkel 2005) with the support constraint
(Fujimoto, Meger & Precup 2019). The resulting :class:`LearnedRegime` maps any table of states (with a
``step`` column) to recommended action codes, so the same object is applied to the records, to new
patients in the simulator, and in tests.

Research use only: a learned regime is a hypothesis for study, not a treatment recommendation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .behaviour import MultinomialLogitBehaviour
from .features import QFeatures, StateScaler, action_codes, behaviour_design, episode_codes
from .fqi import FittedQIteration
from .protocol import Protocol


@dataclass(frozen=True)
class UsualCareModel:
    """The fitted usual-care model with the scaling of its covariates."""

    scaler: StateScaler
    model: MultinomialLogitBehaviour
    horizon: int
    include_step: bool

    def predict_proba(self, frame: pd.DataFrame) -> np.ndarray:
        """Estimated probability of each action (protocol order) at each row's state and step."""
        return self.model.predict_proba(behaviour_design(self.scaler, frame, self.horizon, self.include_step))


@dataclass(frozen=True)
class LearnedRegime:
    """A deterministic regime: the permitted action with the largest fitted Q-value."""

    usual_care: UsualCareModel
    q_features: QFeatures
    fqi: FittedQIteration
    action_labels: tuple[str, ...]

    def q_values(self, frame: pd.DataFrame) -> np.ndarray:
        return self.fqi.q_values(self.q_features.transform(frame), frame["step"].to_numpy(dtype=np.int64))

    def recommend(self, frame: pd.DataFrame, behaviour_proba: np.ndarray | None = None) -> np.ndarray:
        """Recommended action codes; usual-care probabilities are estimated unless given."""
        if behaviour_proba is None:
            behaviour_proba = self.usual_care.predict_proba(frame)
        steps = frame["step"].to_numpy(dtype=np.int64)
        return self.fqi.recommend(self.q_features.transform(frame), steps, behaviour_proba)

    def __call__(self, frame: pd.DataFrame) -> np.ndarray:
        return self.recommend(frame)


def fit_usual_care(decisions: pd.DataFrame, protocol: Protocol) -> UsualCareModel:
    """Fit the protocol's usual-care model: multinomial logistic regression of action on state and step."""
    spec = protocol.behaviour_model
    scaler = StateScaler.fit(decisions, protocol)
    design = behaviour_design(scaler, decisions, protocol.horizon, spec.include_step)
    model = MultinomialLogitBehaviour(maxiter=spec.max_iterations).fit(
        design, action_codes(decisions, protocol.action_labels), len(protocol.actions)
    )
    return UsualCareModel(scaler, model, protocol.horizon, spec.include_step)


def fit_q_learning(
    decisions: pd.DataFrame, behaviour_proba: np.ndarray, protocol: Protocol, features: QFeatures
) -> FittedQIteration:
    """Backward fitted-Q iteration on the decisions, constrained by usual-care support."""
    return FittedQIteration(
        n_actions=len(protocol.actions),
        horizon=protocol.horizon,
        gamma=protocol.discount,
        support_threshold=protocol.constraints.support_threshold,
        alpha=protocol.q_model.ridge_alpha,
    ).fit(
        features.transform(decisions),
        decisions["step"].to_numpy(dtype=np.int64),
        action_codes(decisions, protocol.action_labels),
        decisions["reward"].to_numpy(dtype=float),
        episode_codes(decisions),
        behaviour_proba,
    )


def learn_regime(decisions: pd.DataFrame, protocol: Protocol) -> LearnedRegime:
    """Fit usual care, then the constrained regime, on validated decisions sorted by episode and step."""
    usual_care = fit_usual_care(decisions, protocol)
    proba = usual_care.predict_proba(decisions)
    features = QFeatures.from_protocol(usual_care.scaler, protocol)
    fqi = fit_q_learning(decisions, proba, protocol, features)
    return LearnedRegime(usual_care, features, fqi, protocol.action_labels)
