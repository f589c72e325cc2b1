"""Numeric design matrices built from the protocol's state variables.

Continuous and integer states are centred and scaled by their training mean and standard deviation (kept in
the fitted :class:`StateScaler`, so new states are transformed the same way); binary states stay 0/1.
Scaling changes no least-squares prediction; it keeps Newton steps of the usual-care model well conditioned.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .protocol import Protocol


@dataclass(frozen=True)
class StateScaler:
    """Centring and scaling of each state column, learned from training decisions."""

    names: tuple[str, ...]
    means: tuple[float, ...]
    scales: tuple[float, ...]

    @classmethod
    def fit(cls, frame: pd.DataFrame, protocol: Protocol) -> StateScaler:
        means, scales = [], []
        for s in protocol.states:
            values = frame[s.name].to_numpy(dtype=float)
            if s.kind == "binary":
                means.append(0.0)
                scales.append(1.0)
            else:
                sd = float(values.std())
                means.append(float(values.mean()))
                scales.append(sd if sd > 0 else 1.0)
        return cls(protocol.state_names, tuple(means), tuple(scales))

    def transform(self, frame: pd.DataFrame) -> np.ndarray:
        values = frame.loc[:, list(self.names)].to_numpy(dtype=float)
        return (values - np.asarray(self.means)) / np.asarray(self.scales)

    def to_dict(self) -> dict:
        return {"names": list(self.names), "means": list(self.means), "scales": list(self.scales)}


@dataclass(frozen=True)
class QFeatures:
    """Covariates of the Q-model: scaled states, plus the squares of non-binary states for a quadratic basis.

    The Q-model stays linear in its parameters (least squares per decision point and action, i.e. full
    action-by-covariate interactions); squares let it bend, e.g. for a reward penalising distance from a target.
    """

    scaler: StateScaler
    squared: tuple[int, ...]

    @classmethod
    def from_protocol(cls, scaler: StateScaler, protocol: Protocol) -> QFeatures:
        quadratic = protocol.q_model.basis == "quadratic"
        squared = tuple(i for i, s in enumerate(protocol.states) if quadratic and s.kind != "binary")
        return cls(scaler, squared)

    def transform(self, frame: pd.DataFrame) -> np.ndarray:
        states = self.scaler.transform(frame)
        return np.column_stack([states, states[:, list(self.squared)] ** 2]) if self.squared else states

    @property
    def names(self) -> list[str]:
        return list(self.scaler.names) + [f"{self.scaler.names[i]}^2" for i in self.squared]


def action_codes(frame: pd.DataFrame, labels: tuple[str, ...]) -> np.ndarray:
    """Integer codes of the action labels, in the protocol's order."""
    codes = pd.Categorical(frame["action"], categories=list(labels)).codes
    if (codes < 0).any():
        raise ValueError("an action label is not in the protocol's action set; validate the records first")
    return codes.astype(np.int64)


def episode_codes(frame: pd.DataFrame) -> np.ndarray:
    """Integer episode codes 0..E-1 in order of appearance (rows must be sorted by episode and step)."""
    return pd.factorize(frame["episode_id"], sort=False)[0].astype(np.int64)
