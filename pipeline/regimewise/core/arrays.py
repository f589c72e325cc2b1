"""Checks and conversions of the long-format decision arrays that every estimator shares: codes, finite values,
probability matrices and the episode/step layout.
"""

from __future__ import annotations

import math

import numpy as np

from regimewise.errors import UserInputError


def as_actions(action, n_actions, n_rows=None):
    """Return ``action`` as a 1-D int array of codes in ``0 .. n_actions-1``."""
    if int(n_actions) != n_actions or n_actions < 1:
        raise UserInputError(f"n_actions must be a positive integer; got {n_actions!r}")
    values = np.asarray(action)
    if values.ndim != 1:
        raise UserInputError(f"action must be 1-D (one code per decision); got shape {values.shape}")
    if n_rows is not None and values.shape[0] != n_rows:
        raise UserInputError(f"action has {values.shape[0]} entries but the covariates have {n_rows} rows")
    message = f"action must hold integer codes 0..{int(n_actions) - 1}; map action labels to codes first"
    if values.dtype.kind not in "biuf" or not np.all(np.isfinite(values)):
        raise UserInputError(message)
    codes = values.astype(int)
    if not np.array_equal(codes, values) or codes.min(initial=0) < 0 or codes.max(initial=0) >= n_actions:
        raise UserInputError(message)
    return codes


def action_name(code, labels=None):
    """An action as a message names it: ``action 'label'`` with the protocol's labels, else its code.

    Examples
    --------
    >>> action_name(1, ("hold", "step_up")), action_name(1)
    ("action 'step_up'", 'action code 1')
    """
    return f"action {str(labels[int(code)])!r}" if labels is not None else f"action code {int(code)}"


def as_proba(proba):
    values = np.asarray(proba, dtype=float)
    if values.ndim != 2:
        raise UserInputError(f"proba must be 2-D (decisions x actions); got shape {values.shape}")
    return values


_LAYOUT_HINT = "rows must be sorted by episode then step, episodes coded 0..E-1 in contiguous blocks"


_PROBA_TOLERANCE = 1e-6


def next_row_index(episode):
    """Index of the next row of the same episode for every row, or -1 on an episode's last row.

    Parameters
    ----------
    episode : ndarray of int, shape (n,)
        Episode codes, rows sorted by episode then step.

    Returns
    -------
    ndarray of int, shape (n,)

    Examples
    --------
    >>> next_row_index(np.array([0, 0, 1, 2, 2, 2])).tolist()
    [1, -1, -1, 4, 5, -1]
    """
    episode = np.asarray(episode)
    following = np.full(episode.shape[0], -1)
    same = episode[1:] == episode[:-1]
    following[:-1][same] = np.flatnonzero(same) + 1
    return following


def dense_codes(codes):
    """``numpy.unique(codes, return_inverse=True)[1]`` of 1-D integer ``codes``: each code's rank among the distinct
    codes. Codes in ascending order (a fold's episodes of a sorted table) are ranked by counting where they change,
    without the sort; others are passed to ``numpy.unique``.

    Examples
    --------
    >>> dense_codes(np.array([3, 3, 5, 9, 9])).tolist()
    [0, 0, 1, 2, 2]
    """
    codes = np.asarray(codes)
    if codes.ndim != 1 or codes.dtype.kind not in "iu" or (codes[1:] < codes[:-1]).any():
        return np.unique(codes, return_inverse=True)[1]
    ranks = np.zeros(codes.shape[0], dtype=np.intp)
    np.cumsum(codes[1:] != codes[:-1], out=ranks[1:])
    return ranks


def step_order(step, horizon):
    """``numpy.argsort(step, kind="stable")`` of steps 0 .. horizon - 1: the rows regrouped by step, in their order
    within a step. A stable sort's order is fixed by the keys alone, so they are sorted as the smallest unsigned
    integers that hold them (numpy sorts 8- and 16-bit keys by radix, faster): the same positions."""
    step = np.asarray(step)
    small = np.min_scalar_type(max(int(horizon) - 1, 0))
    if step.size and step.dtype.kind in "iu" and small.itemsize < step.dtype.itemsize:
        if step.min() >= 0 and step.max() < horizon:
            return np.argsort(step.astype(small), kind="stable")
    return np.argsort(step, kind="stable")


def check_codes(values, name, upper=None):
    """Return ``values`` as a 1-D int array after checking they are whole numbers in [0, upper)."""
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise UserInputError(f"{name} must be one-dimensional, got shape {arr.shape}; pass one value per decision.")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        if not np.issubdtype(arr.dtype, np.number) or not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
            raise UserInputError(f"{name} must hold whole-number codes; recode it as integers 0, 1, 2, ...")
    arr = arr.astype(np.int64)
    bad = np.flatnonzero((arr < 0) | ((arr >= upper) if upper is not None else False))
    if bad.size:
        limit = f"0..{upper - 1}" if upper is not None else ">= 0"
        raise UserInputError(f"{name} at row {bad[0]} is {arr[bad[0]]}, outside {limit}; recode it or raise the limit.")
    return arr


def check_finite(values, name, ndim):
    """Return ``values`` as a float array of dimension ``ndim`` after checking there is no NaN or infinity."""
    arr = np.asarray(values, dtype=float)
    if arr.ndim != ndim:
        raise UserInputError(f"{name} must be {ndim}-dimensional, got shape {arr.shape}.")
    finite = np.isfinite(arr)
    if not finite.all():
        bad = np.argwhere(~finite)
        raise UserInputError(f"{name} has a missing or infinite value at {tuple(bad[0])}; impute or drop that row.")
    return arr


def check_proba(proba, n_rows, n_actions, name):
    """Return a probability matrix (n_rows, n_actions) after checking its shape, range and row sums."""
    arr = check_finite(proba, name, 2)
    if arr.shape != (n_rows, n_actions):
        raise UserInputError(
            f"{name} has shape {arr.shape} but {n_rows} decisions and {n_actions} actions need "
            f"({n_rows}, {n_actions}); pass one column per action code."
        )
    outside = arr.size > 0 and (arr.min() < 0 or arr.max() > 1)  # one pass each when all is well
    bad = np.flatnonzero((arr < 0).any(axis=1) | (arr > 1).any(axis=1)) if outside else np.empty(0, dtype=np.intp)
    bad = bad if bad.size else np.flatnonzero(np.abs(arr.sum(axis=1) - 1) > _PROBA_TOLERANCE)
    if bad.size:
        raise UserInputError(
            f"{name} row {bad[0]} is not a probability distribution ({arr[bad[0]].tolist()}); "
            "each row must lie in [0, 1] and sum to 1."
        )
    return arr


def check_layout(step, action, episode, horizon, n_actions):
    """Validate the step, action and episode codes of a decision table and return them as int arrays."""
    step = check_codes(step, "step", horizon)
    action = check_codes(action, "action", n_actions)
    episode = check_codes(episode, "episode")
    if not step.size:
        raise UserInputError("the decision table is empty; pass at least one decision.")
    if not step.shape == action.shape == episode.shape:
        raise UserInputError(
            f"step, action and episode have lengths {step.size}, {action.size}, {episode.size}; "
            "pass one value per decision in each."
        )
    jumps = np.diff(episode, prepend=0)
    bad = np.flatnonzero((jumps < 0) | (jumps > 1) | (np.arange(jumps.size) == 0) & (jumps != 0))
    if bad.size:
        raise UserInputError(f"episode codes break at row {bad[0]}: {_LAYOUT_HINT}.")
    expected = np.where(jumps == 1, 0, np.concatenate([[0], step[:-1] + 1]))
    bad = np.flatnonzero(step != expected)
    if bad.size:
        raise UserInputError(
            f"step at row {bad[0]} is {step[bad[0]]} but {expected[bad[0]]} was expected: steps run 0, 1, 2, ... "
            f"within an episode and {_LAYOUT_HINT}."
        )
    return step, action, episode


def finite_or_none(x) -> float | None:
    """``float(x)``, or None for NaN (JSON has no NaN)."""
    x = float(x)
    return None if math.isnan(x) else x


def has_distinct(values: np.ndarray, count: int, unique=np.unique, first: int = 4096) -> bool:
    """Whether ``values`` hold at least ``count`` distinct values (``unique(values).size >= count``), read from a
    first part of them growing fourfold: the first rows of a table hold enough of them as a rule, and the
    distinct values of every row (a sort or a hash of millions of values) are then never needed."""
    rows = first
    while rows < len(values):
        if unique(values[:rows]).size >= count:
            return True
        rows *= 4
    return unique(values).size >= count


# ---------------------------------------------------------------------------------------------- powers
# Veltkamp's splitting constant for binary64, 2^27 + 1: a value splits into two halves of 26 bits each.
_SPLITTER = 134_217_729.0
# Within this range of |x| no product of :func:`exact_power` overflows or loses its low part to underflow.
_EXACT_CUBE_RANGE = (2.0**-300, 2.0**300)
POWER_BLOCK_ROWS = 65_536  # rows computed at a time by exact_power: a few MB of temporaries


def _product_error(a, b, product):
    """``a * b - product`` for ``product = fl(a * b)``, exactly: Dekker's product with Veltkamp's splitting
    (Dekker 1971, Numer Math 18:224, "mul12"; Muller et al. 2018, *Handbook of Floating-Point Arithmetic*, 2nd
    ed., section 4.4.2)."""
    scaled_a, scaled_b = _SPLITTER * a, _SPLITTER * b
    a_high, b_high = scaled_a - (scaled_a - a), scaled_b - (scaled_b - b)
    a_low, b_low = a - a_high, b - b_high
    return ((a_high * b_high - product) + a_high * b_low + a_low * b_high) + a_low * b_low


def _cube(x):
    # outside the exact range the products may overflow or underflow: those elements are replaced below, and numpy
    # warns (or not) as it does for x ** 3 there
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        square = x * x
        square_error = _product_error(x, x, square)  # x^2 = square + square_error exactly
        cube = square * x
        # x^3 = cube + (square * x - cube) + square_error * x; the sum's terms carry x^3 to within 2^-104 of it, so
        # its one rounding is the correct rounding of x^3 unless x^3 lies that close to a midpoint of two doubles
        cube += _product_error(square, x, cube) + square_error * x
    size = np.abs(x)
    outside = ~((size >= _EXACT_CUBE_RANGE[0]) & (size <= _EXACT_CUBE_RANGE[1]))  # zeros, infinities, NaN too
    if outside.any():
        cube[outside] = x[outside] ** 3
    return cube


def exact_power(x: np.ndarray, k: int) -> np.ndarray:
    """``x ** k`` of a float array for the powers the models use (2 and 3; any other ``k`` as ``x ** k``), in the
    memory layout ``x ** k`` has, each element correctly rounded.

    The square is one multiplication, correctly rounded by IEEE 754. A cube is not: numpy computes ``x ** 3`` by
    its general power function, which on processors with AVX-512 is a vector routine that misrounds a few
    percent of cubes (so the bits depend on the processor numpy runs on) and is the slowest element-wise
    operation of the Q-features by far. Here a cube is ``x * x * x`` carried in double-double arithmetic and
    rounded once: the correctly rounded cube (checked in the tests against exact rational arithmetic), the same
    on every IEEE 754 machine, about five times faster. Values whose cube could overflow or underflow (|x| above
    2^300 or below 2^-300, zeros, infinities and NaN) take ``x ** 3``.
    """
    x = np.asarray(x)
    if k != 3 or x.dtype != np.float64 or x.ndim == 0:
        return x**k
    out = np.empty_like(x)  # the layout of x ** 3 (numpy's ufuncs keep their input's layout)
    for start in range(0, x.shape[0], POWER_BLOCK_ROWS):
        rows = slice(start, start + POWER_BLOCK_ROWS)
        out[rows] = _cube(x[rows])
    return out
