"""Helpers that turn numbers into plain JSON values (NaN and infinities become None)."""

import math

import numpy as np


def plain(x):
    """A Python float (or int/bool) for JSON; NaN and ±inf become None."""
    if x is None:
        return None
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    value = float(x)
    return value if math.isfinite(value) else None


def plain_list(values):
    """A list of plain values."""
    return [plain(x) for x in np.asarray(values).tolist()]
