"""Input checks shared by the survival modules; every failure is one :class:`UserInputError` line."""

import math

import numpy as np

from regimewise.errors import UserInputError

_ROW_SUM_TOLERANCE = 1e-6


def require_columns(frame, columns, what):
    """Refuse a table that lacks any of ``columns``."""
    missing = [name for name in columns if name not in frame.columns]
    if missing:
        raise UserInputError(
            f"{what} lacks column(s) {', '.join(missing)}; it has {', '.join(map(str, frame.columns))}: "
            "rename the columns or map them in the protocol"
        )


def as_float_array(values, what):
    """``values`` as a float array; text or ragged input is refused."""
    try:
        return np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise UserInputError(
            f"{what} must be numeric (codes, days or probabilities), not text or ragged lists"
        ) from None


def finite_vector(values, what, length=None):
    """Return ``values`` as a finite 1-D float array (of ``length`` rows if given)."""
    array = as_float_array(values, what)
    if array.ndim != 1:
        raise UserInputError(f"{what} must be one-dimensional; got shape {array.shape}")
    if length is not None and array.shape[0] != length:
        raise UserInputError(f"{what} has {array.shape[0]} rows but the decisions have {length}: align the arrays")
    bad = int(np.sum(~np.isfinite(array)))
    if bad:
        raise UserInputError(f"{what} has {bad} missing or infinite value(s): fill or drop those rows")
    return array


def probability_matrix(values, what, n_rows, n_actions=None):
    """Return an (n_rows, K) matrix of probabilities in [0, 1] whose rows sum to 1."""
    array = as_float_array(values, what)
    if array.ndim != 2 or array.shape[0] != n_rows or (n_actions is not None and array.shape[1] != n_actions):
        expected = f"({n_rows}, {'K' if n_actions is None else n_actions})"
        raise UserInputError(f"{what} has shape {array.shape} but {expected} is needed: one row per decision")
    if not np.all((array >= 0) & (array <= 1)):  # one pass when all is well: NaN and ±inf fail it too
        if not np.all(np.isfinite(array)):
            raise UserInputError(f"{what} has {int(np.sum(~np.isfinite(array)))} missing or infinite value(s)")
        outside = int(np.sum((array < 0) | (array > 1)))
        raise UserInputError(f"{what} has {outside} value(s) outside [0, 1]: pass probabilities, not scores")
    worst = float(np.max(np.abs(array.sum(axis=1) - 1.0)))
    if worst > _ROW_SUM_TOLERANCE:
        raise UserInputError(f"{what} rows must sum to 1; the worst row is off by {worst:.3g}: renormalise them")
    return array


def action_code_vector(values, what, n_rows, n_actions):
    """Return ``values`` as (n_rows,) integer action codes in 0..n_actions-1."""
    array = np.asarray(values)
    if array.ndim != 1 or array.shape[0] != n_rows:
        raise UserInputError(f"{what} has shape {array.shape} but ({n_rows},) is needed: one code per decision")
    if array.dtype.kind not in "iu":
        raise UserInputError(f"{what} must be integer action codes, not {array.dtype}: encode the actions first")
    if array.size and (array.min() < 0 or array.max() >= n_actions):
        raise UserInputError(f"{what} must be action codes 0..{n_actions - 1}: encode the actions first")
    return array


def positive_probability(values, what):
    """Refuse probabilities of the action taken that are not in (0, 1] (positivity)."""
    if np.any(values <= 0):
        raise UserInputError(
            f"{what} is 0 for {int(np.sum(values <= 0))} decision(s): an action taken with zero estimated "
            "probability breaks positivity; floor the usual-care model or restrict the cohort"
        )
    return values


def nonnegative_int(value, what):
    """Refuse anything but a non-negative integer (booleans included)."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise UserInputError(f"{what} must be a non-negative integer; got {value!r}")
    return int(value)


def positive_number(value, what):
    """Refuse anything but a finite number > 0."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise UserInputError(f"{what} must be a number; got {value!r}")
    if not math.isfinite(float(value)) or float(value) <= 0:
        raise UserInputError(f"{what} must be a finite number > 0; got {value!r}")
    return float(value)


def time_points(times, horizon, what="time points"):
    """Sorted unique finite times in [0, horizon]."""
    array = np.unique(finite_vector(np.atleast_1d(as_float_array(times, what)), what))
    if array.size == 0:
        raise UserInputError(f"{what} is empty: give at least one time in [0, horizon]")
    if array[0] < 0 or array[-1] > horizon:
        raise UserInputError(
            f"{what} must lie in [0, {horizon:g}] (the horizon); got {array[0]:g} to {array[-1]:g}: "
            "drop the times beyond the horizon or raise the horizon"
        )
    return array
