"""Kept powers read back when every row asked for is kept (one gather of whole rows) against the reading they
replace (an element-wise gather into the kept positions), bit for bit, in the same memory layout, and with the
same store afterwards (the powers computed, for every kept row).

These are equivalence checks with no outside reference: the replaced method is written out below as the
reference, on small invented data."""

from __future__ import annotations

import numpy as np
import pytest

from regimewise.core.arrays import exact_power
from regimewise.core.features import KeptPowers


def replaced_reading(store, positions, powered):
    """The replaced reading of a block whose rows are all kept: an element-wise gather into the block's positions."""
    values = np.empty_like(powered)
    values[np.arange(len(positions))] = store[positions]
    return values


def same(a, b):
    return (
        a.shape == b.shape
        and a.flags.c_contiguous == b.flags.c_contiguous
        and a.flags.f_contiguous == b.flags.f_contiguous
        and a.tobytes(order="A") == b.tobytes(order="A")
    )


@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("capacity_rows", [500, 180])
def test_reading_every_kept_row_equals_the_replaced_reading(order, capacity_rows):
    rng = np.random.default_rng(0)
    n, width, degrees = 500, 3, (3, 4)
    states = rng.normal(size=(n, width)) * 4  # of both signs
    budget = capacity_rows * 8 * width * len(degrees)
    kept = KeptPowers(n, width, len(degrees), budget)
    step = np.arange(0, n, 4)
    calls = [
        step,  # nothing kept yet: computed and kept
        step,  # every row kept (within the capacity), or some past it
        step[:20],  # every row kept
        np.arange(1, n, 4),  # nothing kept
        np.sort(np.concatenate([step[:30], np.arange(1, 60, 4)])),  # every row kept
        np.sort(np.concatenate([step[:30], np.arange(2, 60, 4)])),  # some kept, some not
        np.arange(0, 0),  # no row
        rng.permutation(np.arange(0, 160, 4)),  # kept, in another order
    ]
    read_whole = 0
    for positions in calls:
        powered = np.asarray(states[positions], order=order)
        every = positions.size and (positions < kept.capacity).all() and kept.kept[positions].all()
        want = [replaced_reading(kept.store[i], positions, powered) for i in range(len(degrees))] if every else None
        got = kept.powers(positions, powered, degrees)
        assert all(same(g, exact_power(powered, k)) for g, k in zip(got, degrees))  # the computed powers
        if every:
            read_whole += 1
            assert all(same(g, w) for g, w in zip(got, want))
        assert (
            kept.store[:, kept.kept].tobytes()
            == np.stack([exact_power(states[: kept.capacity][kept.kept], k) for k in degrees]).tobytes()
        )
    assert read_whole >= 3
