"""The learned regime's Q-values gathered for the strategies' rows only when an override strategy asks for them,
against each strategy gathering its own rows as it once did, bit for bit and in the same memory layout.

These are equivalence checks with no outside reference: the replaced gathering is written out below as the
reference, on small invented data."""

from __future__ import annotations

import numpy as np

from regimewise.evaluation.strategies import strategy, strategy_proba
from regimewise.evaluation.values import StrategyInputs, _strategy_by_rows


def replaced_rows_proba(s, recommended, proba, learned_q, rows):
    return strategy_proba(s, recommended[rows], proba[rows], learned_q[rows])


def same(a, b):
    return a.dtype == b.dtype and a.shape == b.shape and a.flags == b.flags and a.tobytes() == b.tobytes()


def test_the_q_values_are_gathered_when_an_override_strategy_first_asks_for_the_rows():
    rng = np.random.default_rng(4)
    n, k = 4000, 4
    recommended, proba = rng.integers(0, k, n), np.asfortranarray(rng.dirichlet(np.ones(k), n))
    learned_q = np.asfortranarray(rng.normal(size=(n, k)) * 3)
    shared = StrategyInputs(recommended, proba, learned_q)
    strategies = [strategy("partial_adoption", 0.4), strategy("override_gain", 1.0), strategy("incremental_odds", 4.0)]
    functions = [_strategy_by_rows(s, shared) for s in strategies]
    rows = np.flatnonzero(np.arange(n) % 9 == 2)
    got = functions[0](rows)
    assert shared.at(rows, with_q=False)[2] is None  # no override strategy has asked for these rows yet
    for s, rows_proba in zip(strategies, functions):
        got = rows_proba(rows)
        assert same(got, replaced_rows_proba(s, recommended, proba, learned_q, rows)), s.name
    first = shared.at(rows, with_q=False)
    assert first[2] is not None and all(a is b for a, b in zip(shared.at(rows), first))  # kept once gathered
    other = rows.copy()
    assert same(functions[1](other), replaced_rows_proba(strategies[1], recommended, proba, learned_q, other))
