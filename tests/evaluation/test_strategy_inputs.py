"""The strategies' inputs gathered once per rows and shared by the strategies (``StrategyInputs``) against each
strategy gathering its own rows, as it did, bit for bit and in the same memory layout.

These are equivalence checks with no outside reference: the replaced per-strategy gathering is written out below
as the reference, on small invented data."""

from __future__ import annotations

import threading
import weakref
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from regimewise.evaluation.strategies import FAMILIES, strategy, strategy_proba
from regimewise.evaluation.values import StrategyInputs, _strategy_by_rows

PARAMETERS = {"partial_adoption": (0.2, 0.6), "override_gain": (0.5, 2.0), "incremental_odds": (4.0,)}
STRATEGIES = [strategy(family, value) for family in FAMILIES for value in PARAMETERS[family]]


def inputs(n=3000, k=4, seed=0):
    rng = np.random.default_rng(seed)
    recommended = rng.integers(0, k, n)
    proba = rng.dirichlet(np.ones(k), n)
    learned_q = np.asfortranarray(rng.normal(size=(n, k)) * 3)  # column-major, as a frame's values come
    return recommended, proba, learned_q


def replaced_rows_proba(s, recommended, proba, learned_q, rows):
    """The replaced gathering: each strategy indexed the three arrays itself."""
    q = None if learned_q is None else learned_q[rows]
    return strategy_proba(s, recommended[rows], proba[rows], q)


def same(a, b):
    return (
        a.dtype == b.dtype
        and a.shape == b.shape
        and a.flags.c_contiguous == b.flags.c_contiguous
        and a.flags.f_contiguous == b.flags.f_contiguous
        and a.tobytes() == b.tobytes()
    )


def row_sets(n):
    rng = np.random.default_rng(1)
    positions = np.flatnonzero(np.arange(n) % 7 == 3)
    return [
        positions,
        positions,  # the same object again: read from what was gathered
        positions.copy(),  # equal positions, another object: gathered again
        rng.permutation(n)[: n // 3],
        np.arange(n) % 5 == 1,  # a mask
        slice(100, 900),
        slice(0, 0),
        positions,
    ]


@pytest.mark.parametrize("with_q", [True, False])
def test_shared_inputs_give_each_strategy_what_its_own_gathering_gave(with_q):
    recommended, proba, learned_q = inputs()
    learned_q = learned_q if with_q else None
    shared = StrategyInputs(recommended, proba, learned_q)
    strategies = [s for s in STRATEGIES if with_q or s.family != "override_gain"]
    functions = [_strategy_by_rows(s, shared) for s in strategies]
    for rows in row_sets(len(recommended)):
        for s, rows_proba in zip(strategies, functions):
            assert same(rows_proba(rows), replaced_rows_proba(s, recommended, proba, learned_q, rows)), s.name


def test_rows_gathered_once_for_the_same_rows_object():
    recommended, proba, learned_q = inputs()
    shared = StrategyInputs(recommended, proba, learned_q)
    rows = np.arange(0, 3000, 11)
    first = shared.at(rows)
    assert all(a is b for a, b in zip(shared.at(rows), first))
    again = shared.at(rows.copy())
    assert all(a is not b for a, b in zip(again, first))
    assert all(same(a, b) for a, b in zip(again, first))


def test_threads_each_read_their_own_rows():
    recommended, proba, learned_q = inputs(n=6000)
    shared = StrategyInputs(recommended, proba, learned_q)
    functions = [(s, _strategy_by_rows(s, shared)) for s in STRATEGIES]
    folds = [np.flatnonzero(np.arange(6000) % 4 == f) for f in range(4)]
    barrier = threading.Barrier(4)

    def fold_pass(rows):
        barrier.wait()
        out = []
        for _ in range(5):  # interleaved with the other threads' calls
            out += [(s, rows_proba(rows)) for s, rows_proba in functions]
        return rows, out

    with ThreadPoolExecutor(4) as pool:
        for rows, out in pool.map(fold_pass, folds):
            for s, got in out:
                assert same(got, replaced_rows_proba(s, recommended, proba, learned_q, rows)), s.name


def test_what_was_gathered_is_let_go_with_the_rows():
    recommended, proba, learned_q = inputs()
    shared = StrategyInputs(recommended, proba, learned_q)
    rows = np.arange(0, 3000, 11)
    gathered = weakref.ref(shared.at(rows)[1])
    assert gathered() is not None and shared.at(rows)[1] is gathered()
    del rows
    assert gathered() is None
    block = slice(0, 500)
    assert shared.at(block)[1].base is proba  # a slice's views, not remembered
