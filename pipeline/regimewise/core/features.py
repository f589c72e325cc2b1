"""Numeric design matrices built from the protocol's state variables.

Continuous and integer states are centred and scaled by their training mean and standard deviation (kept in
the fitted :class:`StateScaler`, so new states are transformed the same way); binary states stay 0/1; a
categorical state becomes one 0/1 column per level other than its reference (treatment coding).
Scaling changes no least-squares prediction; it keeps Newton steps of the usual-care model well conditioned.

A state whose missing-data policy is ``indicator`` (:mod:`regimewise.data.missing`) adds its 0/1 column
``<state>_missing`` after the states, unscaled, so the usual-care model, the Q-model and every summary that
lists covariates use it (missing-indicator method; Groenwold et al., CMAJ 2012;184(11):1265-9).
"""

from __future__ import annotations

import functools
import logging
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.core.arrays import exact_power
from regimewise.core.terms import SEPARATE, ActionSlopes, TermColumns, uncentred
from regimewise.errors import UserInputError
from regimewise.protocol.model import Protocol
from regimewise.protocol.types import level_text

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class StateScaler:
    """Centring and scaling of each state column, learned from training decisions, plus dummies and indicators.

    ``names`` lists the covariate columns: the protocol's states in order, a categorical state expanded in place
    into one 0/1 column ``<state>[<level>]`` per level other than its reference (treatment coding; levels in the
    protocol's order, then the merged ``other_level``), then the missing-indicator columns in use
    (``indicators``). Dummies and indicators have mean 0 and scale 1 (they are not scaled). A dummy or indicator
    column that is constant in the training decisions (a level absent from them, e.g. in a cross-fitting fold or
    a bootstrap resample, or merged away as rare) carries no information and would make the usual-care design
    singular: it is left out (``dummies_dropped``, ``indicators_dropped``), with a log message and an entry in
    :meth:`to_dict`; a decision at such a level is then coded like the reference level. When the reference level
    itself is absent from the training decisions, the first level present takes its place (its dummy is left
    out too), so the dummies never sum to the intercept.

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
    dummies: tuple[tuple[str, str, str], ...] = ()  # (column name, state, level) of each dummy column in use
    dummies_dropped: tuple[str, ...] = ()
    levels: tuple[tuple[str, tuple[str, ...]], ...] = ()  # (state, every level it may take) of each categorical

    @classmethod
    def fit(cls, frame: pd.DataFrame, protocol: Protocol) -> StateScaler:
        names, means, scales, dummies, dropped = [], [], [], [], []
        for s in protocol.states:
            if s.kind == "categorical":
                text = level_values(frame, s.name, s.coded_levels)
                present = [level for level in s.coded_levels if (text == level).any()]
                base = s.reference_level if s.reference_level in present or not present else present[0]
                for level in s.coded_levels:
                    column = dummy_name(s.name, level)
                    if level == s.reference_level:
                        continue
                    if level == base or level not in present:
                        dropped.append(column)
                        log.info(
                            "level %s is absent from the training decisions or stands in for the absent "
                            "reference; left out of the covariates",
                            column,
                        )
                        continue
                    names.append(column)
                    dummies.append((column, s.name, level))
                    means.append(0.0)
                    scales.append(1.0)
                continue
            names.append(s.name)
            values = frame[s.name].to_numpy(dtype=float)
            if s.kind == "binary":
                means.append(0.0)
                scales.append(1.0)
            else:
                sd = float(values.std())
                means.append(float(values.mean()))
                scales.append(sd if sd > 0 else 1.0)
        used, dropped_indicators = _split_constant_indicators(frame, indicator_columns(protocol))
        ones = (1.0,) * len(used)
        levels = tuple((s.name, s.coded_levels) for s in protocol.states if s.kind == "categorical")
        return cls(
            tuple(names) + used,
            tuple(means) + (0.0,) * len(used),
            tuple(scales) + ones,
            used,
            dropped_indicators,
            tuple(dummies),
            tuple(dropped),
            levels,
        )

    def transform(self, frame: pd.DataFrame) -> np.ndarray:
        """The covariate columns centred and scaled, (n, len(names)).

        The same two operations on every value as ``(unscaled - means) / scales``, the division in place in the
        centred result (the unscaled matrix may be a view of the frame's data, so it is not written)."""
        return self.scale(self.unscaled(frame))

    def scale(self, unscaled: np.ndarray) -> np.ndarray:
        """Covariate columns as :meth:`unscaled` gives them, centred and scaled (a new array; the input is not
        written, as it may be a view of a frame's data)."""
        scaled = np.subtract(unscaled, np.asarray(self.means))
        scaled /= np.asarray(self.scales)
        return scaled

    def unscaled(self, frame: pd.DataFrame) -> np.ndarray:
        """The covariate columns before centring and scaling (states as recorded, dummies, indicators).

        Raises :class:`UserInputError` if a categorical state takes a value outside its levels (validation
        reports such values as findings)."""
        states = list(self.names[: len(self.names) - len(self.indicators)])
        if not self.dummies and not self.indicators:
            return frame.loc[:, states].to_numpy(dtype=float)
        dummies = {column: (state, level) for column, state, level in self.dummies}
        text = {state: level_values(frame, state, levels) for state, levels in self.levels}
        columns = [
            (text[dummies[n][0]] == dummies[n][1]).astype(float) if n in dummies else frame[n].to_numpy(dtype=float)
            for n in states
        ]
        columns += [indicator_values(frame, column) for column in self.indicators]
        return np.column_stack(columns) if columns else np.zeros((len(frame), 0))

    def covariate_frame(self, frame: pd.DataFrame) -> pd.DataFrame:
        """The covariate columns by name, unscaled: numeric states as recorded, dummies and indicators 0/1."""
        return pd.DataFrame(self.unscaled(frame), columns=list(self.names), index=frame.index)

    def state_matrix(self, frame: pd.DataFrame) -> np.ndarray:
        """The states' columns unscaled (numeric states as recorded, categorical states as dummies), without
        the missing indicators."""
        return self.unscaled(frame)[:, : len(self.names) - len(self.indicators)]

    def covariate_states(self, protocol: Protocol) -> tuple:
        """Each covariate by name and kind: the numeric states, then each dummy of a categorical state and each
        indicator in use as a binary :class:`IndicatorCovariate`."""
        states = {s.name: s for s in protocol.states}
        return tuple(states.get(n) or IndicatorCovariate(n) for n in self.names)

    def to_dict(self) -> dict:
        out = {"names": list(self.names), "means": list(self.means), "scales": list(self.scales)}
        if self.indicators or self.indicators_dropped:
            out["missing_indicators"] = list(self.indicators)
            out["missing_indicators_dropped_constant"] = list(self.indicators_dropped)
        if self.levels:
            out["levels_dropped_constant"] = list(self.dummies_dropped)
        return out


def dummy_name(state: str, level: str) -> str:
    """Name of the 0/1 column of one level of a categorical state, e.g. ``education[college]``."""
    return f"{state}[{level}]"


def as_level_text(values: pd.Series) -> np.ndarray:
    """Each value as categorical level text (:func:`regimewise.protocol.types.level_text`; a missing value reads
    ``nan``), computed once per distinct value."""
    if not len(values):
        return np.zeros(0, dtype=object)
    codes, uniques = pd.factorize(values, use_na_sentinel=False)
    return np.asarray([level_text(u) for u in uniques], dtype=object)[codes]


def level_values(frame: pd.DataFrame, state: str, levels: tuple[str, ...]) -> np.ndarray:
    """A categorical state's values as level text; :class:`UserInputError` if one is not among ``levels``."""
    text = as_level_text(frame[state])
    unknown = ~np.isin(text, np.asarray(levels, dtype=object))
    if unknown.any():
        raise UserInputError(
            f"categorical state {state!r} has {int(unknown.sum())} value(s) outside its levels {list(levels)}; "
            "pass the records through validation"
        )
    return text


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


class StateArrays:
    """The columns of a decision table that :meth:`StateScaler.unscaled` reads, taken out of the frame once as
    numpy arrays, so that the covariates of any rows can be gathered many times (the evaluation's outcome models
    read every step's rows of the features in every pass and every fold) without building a frame each time.

    A numeric column is kept as the frame holds it (a float column is the frame's own data, not a copy) and turned
    into floats for the rows asked for, as ``to_numpy(dtype=float)`` turns them; a column of another dtype (e.g. a
    nullable one) is turned into floats once, whole. A categorical state is kept as its levels' codes, checked
    against its levels once (:func:`level_values`), and a dummy is 1.0 where the code is its level's. A missing
    indicator is read as :func:`indicator_values` reads it.
    """

    def __init__(self, scaler: StateScaler, frame: pd.DataFrame):
        self.n = len(frame)
        # the memory layout of StateScaler.unscaled: the frame's column block (column-major) when every covariate
        # is a state column, numpy.column_stack (row-major) otherwise
        self.order = "F" if not scaler.dummies and not scaler.indicators else "C"
        codes = {state: _level_codes(level_values(frame, state, levels), levels) for state, levels in scaler.levels}
        dummies = {column: (state, level) for column, state, level in scaler.dummies}
        levels = dict(scaler.levels)
        self.columns: list[tuple[np.ndarray, int | None]] = []  # per covariate: values, or codes and the level's
        for name in scaler.names[: len(scaler.names) - len(scaler.indicators)]:
            if name in dummies:
                state, level = dummies[name]
                self.columns.append((codes[state], levels[state].index(level)))
            else:
                self.columns.append((_numeric_column(frame[name]), None))
        for column in scaler.indicators:
            values = _numeric_column(frame[column]) if column in frame.columns else indicator_values(frame, column)
            self.columns.append((values, None))

    def unscaled(self, rows) -> np.ndarray:
        """``StateScaler.unscaled(frame.iloc[rows])``: the same values in the same memory layout."""
        m = len(np.arange(self.n)[rows]) if not _is_positions(rows) else len(rows)
        out = np.empty((m, len(self.columns)), order=self.order)
        for j, (values, level) in enumerate(self.columns):
            picked = values[rows]
            out[:, j] = picked if level is None else picked == level  # cast to float as to_numpy(dtype=float) does
        return out


def _is_positions(rows) -> bool:
    return isinstance(rows, np.ndarray) and rows.dtype.kind in "iu"


def _numeric_column(values: pd.Series) -> np.ndarray:
    """A column as numpy holds it when its dtype is numpy's boolean, integer or float (cast per block later),
    otherwise as floats (``to_numpy(dtype=float)``, whole)."""
    raw = values.to_numpy()
    return raw if raw.dtype.kind in "biuf" else values.to_numpy(dtype=float)


def _level_codes(text: np.ndarray, levels: tuple[str, ...]) -> np.ndarray:
    """Position in ``levels`` of each level text (all are among them: :func:`level_values` checked)."""
    codes, uniques = pd.factorize(text, use_na_sentinel=False)
    position = np.asarray([levels.index(u) for u in uniques], dtype=np.int64)
    return position[codes].astype(np.min_scalar_type(max(len(levels) - 1, 0)))


# Rows of the scaled states computed at a time (:func:`stack_by_blocks`): 65,536 rows of 8 states and their powers
# are a few MB of temporaries, where the whole table's would be several times the size of the result.
FEATURE_BLOCK_ROWS = 65_536


def stack_by_blocks(frame: pd.DataFrame, scaler: StateScaler, block, whole: list) -> np.ndarray:
    """``numpy.column_stack([*block(scaler.transform(frame)), *whole])``, the same bits in the same memory layout,
    with the scaled states and the columns ``block`` makes of them computed :data:`FEATURE_BLOCK_ROWS` rows at a
    time (``block`` must work row by row, as element-wise arithmetic does), so that they exist for one block only.

    ``whole`` holds columns computed on the whole table (e.g. spline bases, whose matrix products are left as
    they were). The result is laid out as ``numpy.column_stack`` lays out these parts (:func:`_stacked_order`):
    matrix products downstream may round differently on another layout.
    """
    return stack_parts_by_blocks(len(frame), lambda rows: block(scaler.transform(frame.iloc[rows])), whole)


def stack_parts_by_blocks(n: int, parts_of_rows, whole: list) -> np.ndarray:
    """:func:`stack_by_blocks` of ``n`` rows whose block columns ``parts_of_rows(rows)`` returns for a slice of
    them, so that the states may come from elsewhere than a frame (:class:`StateArrays`) and the columns may be
    read from what is kept of them (:class:`KeptPowers`)."""
    out = None
    for start in range(0, max(n, 1), FEATURE_BLOCK_ROWS):
        rows = slice(start, start + FEATURE_BLOCK_ROWS)
        parts = parts_of_rows(rows)
        if out is None:
            width = sum(part.shape[1] for part in [*parts, *whole])
            out = np.empty((n, width), order=_stacked_order([*parts, *whole]))
        column = 0
        for part in parts:
            out[rows, column : column + part.shape[1]] = part
            column += part.shape[1]
    for part in whole:
        out[:, column : column + part.shape[1]] = part
        column += part.shape[1]
    return out


def _stacked_order(parts: list) -> str:
    """The memory layout ("C" or "F") of ``numpy.column_stack(parts)`` for 2-D ``parts``, found by stacking 2-row
    stand-ins of the same layouts (a part that is both row- and column-contiguous, e.g. one column, stands in as one
    column too)."""

    def stand_in(part):
        if part.flags.c_contiguous and part.flags.f_contiguous:
            return np.empty((2, 1))
        by_column = part.flags.f_contiguous or (not part.flags.c_contiguous and part.strides[0] <= part.strides[1])
        return np.empty((2, max(part.shape[1], 2)), order="F" if by_column else "C")

    stacked = np.column_stack([stand_in(part) for part in parts])
    return "F" if stacked.flags.f_contiguous and not stacked.flags.c_contiguous else "C"


class KeptPowers:
    """The powers above the square (cubes) of the numeric scaled states of the first rows of a table, computed once
    and then read: a cube (:func:`regimewise.core.arrays.exact_power`, a dozen operations per element) is the
    slowest element-wise operation of the Q-features, and the evaluation reads every row's features in every pass.
    Each element's power depends on that element alone (the same bits whatever else is in the array, checked in
    the tests), so a kept power is the computed one.

    Rows ``0 .. capacity - 1`` are kept, ``capacity`` being as many as ``budget`` bytes hold (all of a table
    that fits); later rows are computed every time, so the memory stays bounded whatever the table's size. The
    store is written as rows are first asked for, so its pages are taken only as they fill. Threads that read
    different rows (the folds' outcome models) may share it: a row is marked as kept only after its powers are
    written, and two threads that compute one row write the same bits.
    """

    def __init__(self, n: int, width: int, count: int, budget: int):
        per_row = 8 * width * count
        self.capacity = min(n, budget // per_row) if per_row else 0
        self.store = np.empty((count, self.capacity, width))
        self.kept = np.zeros(self.capacity, dtype=bool)

    def powers(self, positions: np.ndarray, powered: np.ndarray, degrees) -> list[np.ndarray]:
        """``[exact_power(powered, k) for k in degrees]`` for the rows at ``positions`` (``powered`` holds their numeric
        scaled states), each in the memory layout of ``powered**k``; the kept rows read, the others computed (and kept
        when there is room). ``degrees``: every degree above 2 of the features, in order."""
        inside = np.flatnonzero(positions < self.capacity)
        slots = positions[inside]
        known = self.kept[slots]
        read, write = inside[known], inside[~known]
        fresh = np.ones(len(positions), dtype=bool)
        fresh[read] = False
        out = []
        every = 0 < read.size == len(positions)  # every row kept (the slots are then the positions)
        for i, k in enumerate(degrees):
            if read.size:
                values = np.empty_like(powered)  # the layout of powered**k
                if every:  # the kept rows taken whole at once (a far faster gather), then laid out
                    values[...] = np.take(self.store[i], slots, axis=0)
                else:
                    values[fresh] = exact_power(powered[fresh], k)
                    values[read] = self.store[i, slots[known]]
            else:  # nothing kept yet (or past the capacity): computed as without a store
                values = exact_power(powered, k)
            if write.size:
                self.store[i, slots[~known]] = values[write]
            out.append(values)
        self.kept[slots[~known]] = True
        return out


@dataclass(frozen=True)
class QFeatures:
    """Covariates of the Q-model: scaled states, plus powers of the continuous and integer states for a polynomial
    basis (a binary state, a categorical state's dummies and a missing indicator get no powers), plus the columns
    of ``q_model.terms`` (:class:`regimewise.core.terms.TermColumns`).

    The Q-model stays linear in its parameters (least squares per decision point and action, i.e. full
    action-by-covariate interactions, or with ``q_model.action_slopes: shared`` one fit per decision point with
    common slopes; :meth:`action_slopes`); powers let it bend, e.g. for a reward penalising distance from a target.
    ``basis: quadratic`` adds the square of every non-binary state, ``basis: cubic`` the square and the cube
    (a separable polynomial of degree 3 in each centred and scaled state; no cross-products between states: those
    are ``interaction`` terms). A state entered as a ``spline`` term loses its linear column and its basis powers
    to the spline's columns.
    """

    scaler: StateScaler
    squared: tuple[int, ...]
    degree: int = 2
    terms: TermColumns | None = None

    @classmethod
    def from_protocol(cls, scaler: StateScaler, protocol: Protocol, frame: pd.DataFrame | None = None) -> QFeatures:
        """The protocol's Q-model features; ``frame`` (the training decisions) is needed when ``q_model.terms``
        holds a spline (its knots sit at the training values' quantiles)."""
        q = protocol.q_model
        splined = {t.spline for t in q.terms if t.spline is not None}
        numeric = {s.name for s in protocol.states if s.kind in ("continuous", "integer")} - splined
        squared = tuple(i for i, n in enumerate(scaler.names) if q.degree > 1 and n in numeric)
        terms = None
        if q.terms:
            if splined and frame is None:
                raise ValueError("a spline term needs the training decisions to place its knots")
            terms = TermColumns.fit(q.terms, frame if frame is not None else pd.DataFrame(), scaler)
        return cls(scaler, squared, max(q.degree, 2), terms)

    def _linear(self) -> list[int]:
        replaced = set(self.terms.spline_states) if self.terms is not None else set()
        return [j for j, name in enumerate(self.scaler.names) if name not in replaced]

    def transform(self, frame: pd.DataFrame) -> np.ndarray:
        """The Q-model's covariates (n, len(names)): the scaled states, their powers, then the terms' columns
        (:func:`stack_by_blocks`: the scaled states and their powers are computed a block of rows at a time)."""
        terms = [] if self.terms is None else [self.terms.transform(frame, uncentred(self.scaler, frame))]
        return stack_by_blocks(frame, self.scaler, self._block, terms)

    def transform_arrays(self, states: StateArrays, rows, kept: KeptPowers | None = None) -> np.ndarray:
        """``transform(frame.iloc[rows])`` from the frame's states taken out once (:class:`StateArrays`): the same
        bits in the same memory layout, the rows gathered by numpy indexing instead of a frame built per call.
        ``rows``: integer positions, a mask or a slice. ``kept`` (built for these states and features) holds the
        powers above the square of the rows it has seen, read instead of computed again. Without
        ``q_model.terms`` only (a term may read any column of the frame; :meth:`transform` serves then)."""
        if self.terms is not None:
            raise ValueError("features with q_model.terms are computed from the frame (QFeatures.transform)")
        positions = rows if _is_positions(rows) else np.arange(states.n)[rows]

        def parts(part):
            at = positions[part]
            power = None if kept is None else functools.partial(kept.powers, at)
            return self._block(self.scaler.scale(states.unscaled(at)), power)

        return stack_parts_by_blocks(len(positions), parts, [])

    def _block(self, states: np.ndarray, power=None) -> list:
        """The columns made of a block of scaled states: the linear ones, then each power of the numeric ones.
        ``power(powered, degrees)`` may give the powers above the square (:meth:`KeptPowers.powers`)."""
        squared = list(self.squared)
        degrees = range(2, self.degree + 1) if squared else range(0)
        powered = states[:, squared]
        if power is None or len(degrees) < 2:
            return [states[:, self._linear()], *(exact_power(powered, k) for k in degrees)]
        return [states[:, self._linear()], powered**2, *power(powered, degrees[1:])]

    def kept_powers(self, n: int, budget: int) -> KeptPowers:
        """A :class:`KeptPowers` for ``n`` rows of these features in at most ``budget`` bytes."""
        return KeptPowers(n, len(self.squared), max(self.degree - 2, 0) if self.squared else 0, budget)

    @property
    def names(self) -> list[str]:
        powers = [f"{self.scaler.names[i]}^{k}" for k in range(2, self.degree + 1) for i in self.squared]
        own = list(self.terms.names) if self.terms is not None else []
        return [self.scaler.names[j] for j in self._linear()] + powers + own

    def action_slopes(self, protocol: Protocol) -> ActionSlopes:
        """How the linear Q-model's coefficients vary with the action (``q_model.action_slopes``), with the design
        columns ([1, X], so X's first column is 1) of ``q_model.action_interactions``. A categorical state's
        dummies left out of this fit (a level absent from the training decisions) have no column to interact."""
        q = protocol.q_model
        if q.action_slopes == "separate":
            return SEPARATE
        position = {name: j + 1 for j, name in enumerate(self.names)}
        columns = []
        for entry in q.action_interactions:
            if isinstance(entry, str):
                owned = [c for c, owner, _ in self.scaler.dummies if owner == entry] or [entry]
            else:
                owned = list(self.terms.columns_of(entry)) if self.terms is not None else []
            columns += [position[name] for name in owned if name in position]
        return ActionSlopes(True, tuple(columns))


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
    return known_action_codes(pd.Categorical(frame["action"], categories=list(labels)).codes)


def known_action_codes(codes: np.ndarray) -> np.ndarray:
    """``codes`` (int64), the positions of action labels in the protocol's labels, refused when a label was not
    among them (code -1)."""
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
