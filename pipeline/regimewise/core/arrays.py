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
