"""The simulator's version of the strategies derived from a learned regime, to compute their true values.

Each strategy acts on the action usual care would take at that review (its natural value, drawn by the
simulator's true usual care, hidden frailty included) and on the learned regime's recommendation, exactly as
:mod:`regimewise.evaluation.strategies` defines them for the estimators; pass one to
:func:`regimewise.demo.truth.true_value` like any regime. Invented scenario, research use only.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from regimewise.errors import UserInputError


def _codes(regime, frame) -> np.ndarray:
    return np.asarray(regime(frame), dtype=np.int64)


@dataclass(frozen=True)
class PartialAdoption:
    """Follow ``regime`` at a review with probability ``epsilon`` (one coin per review), usual care otherwise."""

    regime: Callable
    epsilon: float

    def modify(self, frame, natural, proba, coins):
        return np.where(coins < self.epsilon, _codes(self.regime, frame), natural)


@dataclass(frozen=True)
class OverrideGain:
    """Keep usual care's action unless ``q_values(frame)`` gives the regime's action a gain above ``threshold``."""

    regime: Callable
    q_values: Callable
    threshold: float

    def modify(self, frame, natural, proba, coins):
        rec = _codes(self.regime, frame)
        q = np.asarray(self.q_values(frame), dtype=float)
        rows = np.arange(len(rec))
        with np.errstate(invalid="ignore"):
            switch = q[rows, rec] - q[rows, natural] > self.threshold  # NaN (unseen action): keep
        return np.where(switch, rec, natural)


@dataclass(frozen=True)
class IncrementalOdds:
    """Odds of the regime's action under usual care multiplied by ``delta`` ≥ 1 (Kennedy 2019).

    Coupled to the natural action: keep it if it is the regime's action; otherwise switch to the regime's action
    with probability (q − p)/(1 − p), q = δp/(δp + 1 − p), which gives every action its incremental probability.
    """

    regime: Callable
    delta: float

    def __post_init__(self):
        if self.delta < 1.0:
            raise UserInputError(f"IncrementalOdds: delta {self.delta!r} is below 1; the simulator supports δ ≥ 1.")

    def modify(self, frame, natural, proba, coins):
        rec = _codes(self.regime, frame)
        p = np.asarray(proba, dtype=float)[np.arange(len(rec)), rec]
        q = self.delta * p / (self.delta * p + 1.0 - p)
        with np.errstate(invalid="ignore", divide="ignore"):
            switch = np.where(p < 1.0, (q - p) / (1.0 - p), 0.0)
        return np.where((natural == rec) | (coins < switch), rec, natural)
