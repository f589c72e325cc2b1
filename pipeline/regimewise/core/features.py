"""Numeric design matrices built from the protocol's state variables.

Continuous and integer states are centred and scaled by their training mean and standard deviation (kept in
the fitted :class:`StateScaler`, so new states are transformed the same way); binary states stay 0/1.
Scaling changes no least-squares prediction; it keeps Newton steps of the usual-care model well conditioned.

A state whose missing-data policy is ``indicator`` (:mod:`regimewise.data.missing`) adds its 0/1 column
``<state>_missing`` after the states, unscaled, so the usual-care model, the Q-model and every summary that
lists covariates use it (missing-indicator method; Groenwold et al., CMAJ 2012;184(11):1265-9).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.errors import UserInputError
from regimewise.protocol.model import Protocol

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class StateScaler:
    """Centring and scaling of each state column, learned from training decisions, plus missing indicators.

    ``names`` lists the protocol's states, then the missing-indicator columns in use (``indicators``; mean 0,
    scale 1). An indicator column that is constant in the training decisions (no value of its state was
    missing, or every one was) carries no information and would make the usual-care design singular: it is
    left out (``indicators_dropped``), with a log message and an entry in :meth:`to_dict`.

    A frame without an indicator column (e.g. states simulated for new patients, which are complete) is read
    by this rule: when its state column has no missing value, every indicator is 0 (it records exactly that the
    state was observed); when the state column has a missing value, :class:`UserInputError` is raised, since
    the indicator's value is then unknown (pass such records through validation, which adds the column).
    """

    names: tuple[str, ...]
    means: tuple[float, ...]
    scales: tuple[float, ...]
    indicators: tuple[str, ...] = ()
    indicators_dropped: tuple[str, ...] = ()

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
        used, dropped = _split_constant_indicators(frame, indicator_columns(protocol))
        ones = (1.0,) * len(used)
        return cls(protocol.state_names + used, tuple(means) + (0.0,) * len(used), tuple(scales) + ones, used, dropped)

    def transform(self, frame: pd.DataFrame) -> np.ndarray:
        if not self.indicators:
            values = frame.loc[:, list(self.names)].to_numpy(dtype=float)
        else:
            states = frame.loc[:, list(self.names[: -len(self.indicators)])].to_numpy(dtype=float)
            values = np.column_stack([states, *(indicator_values(frame, c) for c in self.indicators)])
        return (values - np.asarray(self.means)) / np.asarray(self.scales)

    def covariate_states(self, protocol: Protocol) -> tuple:
        """The protocol's states, then each indicator in use as a binary :class:`IndicatorCovariate`."""
        return (*protocol.states, *(IndicatorCovariate(c) for c in self.indicators))

    def to_dict(self) -> dict:
        out = {"names": list(self.names), "means": list(self.means), "scales": list(self.scales)}
        if self.indicators or self.indicators_dropped:
            out["missing_indicators"] = list(self.indicators)
            out["missing_indicators_dropped_constant"] = list(self.indicators_dropped)
        return out


@dataclass(frozen=True)
class IndicatorCovariate:
    """A missing-indicator column described like a binary state (``name``, ``kind``) for readable summaries."""

    name: str
    kind: str = "binary"


def indicator_values(frame: pd.DataFrame, column: str) -> np.ndarray:
    """The 0/1 values of a missing-indicator column; all 0 if the frame lacks it and its state is complete.

    Raises :class:`UserInputError` if the frame lacks the column while its state has missing values.
    """
    if column in frame.columns:
        return frame[column].to_numpy(dtype=float)
    state = indicator_state(column)
    if frame[state].isna().any():
        raise UserInputError(
            f"state {state!r} has missing values but the table lacks its indicator column {column!r}; "
            "pass the records through validation (data.missing: indicator adds the column)"
        )
    return np.zeros(len(frame))


def _split_constant_indicators(frame: pd.DataFrame, columns: tuple[str, ...]) -> tuple[tuple, tuple]:
    """The indicator columns that vary in the training decisions, and those that are constant (left out)."""
    used, dropped = [], []
    for column in columns:
        values = indicator_values(frame, column)
        if values.size and np.ptp(values) > 0:
            used.append(column)
        else:
            dropped.append(column)
            log.info("missing indicator %s is constant in the training decisions; left out of the covariates", column)
    return tuple(used), tuple(dropped)


@dataclass(frozen=True)
class QFeatures:
    """Covariates of the Q-model: scaled states, plus powers of the non-binary states for a polynomial basis.

    The Q-model stays linear in its parameters (least squares per decision point and action, i.e. full
    action-by-covariate interactions); powers let it bend, e.g. for a reward penalising distance from a target.
    ``basis: quadratic`` adds the square of every non-binary state, ``basis: cubic`` the square and the cube
    (a separable polynomial of degree 3 in each scaled state; no cross-products between states).
    """

    scaler: StateScaler
    squared: tuple[int, ...]
    degree: int = 2

    @classmethod
    def from_protocol(cls, scaler: StateScaler, protocol: Protocol) -> QFeatures:
        degree = {"linear": 1, "quadratic": 2, "cubic": 3}[protocol.q_model.basis]
        squared = tuple(i for i, s in enumerate(protocol.states) if degree > 1 and s.kind != "binary")
        return cls(scaler, squared, max(degree, 2))

    def transform(self, frame: pd.DataFrame) -> np.ndarray:
        states = self.scaler.transform(frame)
        powered = states[:, list(self.squared)]
        return np.column_stack([states] + [powered**k for k in range(2, self.degree + 1)]) if self.squared else states

    @property
    def names(self) -> list[str]:
        powers = [f"{self.scaler.names[i]}^{k}" for k in range(2, self.degree + 1) for i in self.squared]
        return list(self.scaler.names) + powers


# Column a bootstrap resample adds (:func:`regimewise.bootstrap.replicates.resample_patients`): the patient a copy was
# drawn from.
RESAMPLED_FROM = "resampled_from"


def patient_clusters(frame: pd.DataFrame) -> np.ndarray:
    """Patient of every row for assigning folds: in a bootstrap resample, the patient each copy was drawn from.

    A resample gives every draw a new ``patient_id`` (copies count as separate patients for the bootstrap), but
    two copies of one patient in different folds would let a model be scored on a patient it learned from; so
    folds follow ``resampled_from`` when the frame has it.
    """
    return frame[RESAMPLED_FROM].to_numpy() if RESAMPLED_FROM in frame.columns else frame["patient_id"].to_numpy()


def action_codes(frame: pd.DataFrame, labels: tuple[str, ...]) -> np.ndarray:
    """Integer codes of the action labels, in the protocol's order."""
    codes = pd.Categorical(frame["action"], categories=list(labels)).codes
    if (codes < 0).any():
        raise ValueError("an action label is not in the protocol's action set; validate the records first")
    return codes.astype(np.int64)


def episode_codes(frame: pd.DataFrame) -> np.ndarray:
    """Integer episode codes 0..E-1 in order of appearance (rows must be sorted by episode and step)."""
    return pd.factorize(frame["episode_id"], sort=False)[0].astype(np.int64)


INDICATOR_SUFFIX = "_missing"


def indicator_name(state: str) -> str:
    """Name of the 0/1 column the ``indicator`` policy adds for ``state``."""
    return state + INDICATOR_SUFFIX


def indicator_state(column: str) -> str:
    """The state whose missing indicator ``column`` is (inverse of :func:`indicator_name`)."""
    return column.removesuffix(INDICATOR_SUFFIX)


def indicator_columns(protocol: Protocol) -> tuple[str, ...]:
    """The missing-indicator columns of the states whose policy is ``indicator``, in the protocol's state order."""
    return tuple(indicator_name(s.name) for s in protocol.states if protocol.data.missing.get(s.name) == "indicator")
