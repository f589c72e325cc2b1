"""Row sums added a column at a time against numpy's own row sums, and the strategies and shares that use them
against those computations as they were written before, bit for bit.

These are equivalence checks with no outside reference: numpy's ``sum(axis=1)`` and the replaced expressions,
written out here, are the reference. ``row_sums`` relies on how numpy adds a short row (one value after the
other from +0.0, in any memory layout); the first test holds numpy to it, so a numpy that adds otherwise fails
here rather than changing a value elsewhere."""

from __future__ import annotations

import numpy as np
import pytest

from regimewise.evaluation import strategies
from regimewise.evaluation.strategies import changed_by_row, row_sums
from regimewise.evaluation.verdicts import unsupported_by_row


def awkward(rng, m, k):
    """Values of many magnitudes and both signs (their sums depend on the order of the additions), with signed
    zeros, whole rows of -0.0 and a few infinities and NaNs."""
    values = rng.random((m, k)) * 10.0 ** rng.integers(-8, 8, (m, k)) * rng.choice([-1.0, 1.0], (m, k))
    values[rng.random((m, k)) < 0.05] = -0.0
    values[rng.random((m, k)) < 0.02] = 0.0
    values[: min(m, 3)] = -0.0
    if m > 10:
        values[5, 0], values[6, -1], values[7, 0] = np.inf, -np.inf, np.nan
    return values


def same_bits(a, b) -> bool:
    a, b = np.asarray(a), np.asarray(b)
    return a.shape == b.shape and a.dtype == b.dtype and np.array_equal(a.view(np.int64), b.view(np.int64))


@pytest.mark.parametrize("k", range(1, 11))
@pytest.mark.parametrize("m", [0, 1, 2, 7, 8, 9, 1000, 20_000])
def test_row_sums_are_numpys_in_every_layout(k, m):
    rng = np.random.default_rng(100 * k + m)
    values = awkward(rng, m, k)
    wide = awkward(rng, m, 2 * k + 1)
    for layout in (
        np.ascontiguousarray(values),
        np.asfortranarray(values),
        wide[:, ::2],  # neither row- nor column-contiguous
        np.ascontiguousarray(values)[::-1],
        np.asfortranarray(values)[1::2],
    ):
        assert same_bits(row_sums(layout), np.sum(layout, axis=1)), (k, m, layout.flags)


def test_row_sums_leave_other_arrays_to_numpy():
    ints = np.arange(12).reshape(4, 3)
    assert same_bits(row_sums(ints), np.sum(ints, axis=1))
    single = np.arange(12, dtype=np.float32).reshape(4, 3)
    assert same_bits(row_sums(single), np.sum(single, axis=1))
    assert same_bits(row_sums(np.ones((3, 0))), np.sum(np.ones((3, 0)), axis=1))


def old_tidy(proba):
    proba = np.clip(proba, 0.0, 1.0)
    return proba / proba.sum(axis=1, keepdims=True)


def old_override(recommended, q_values, behaviour_proba, threshold):
    behaviour_proba = np.asarray(behaviour_proba, dtype=float)
    rows = np.arange(behaviour_proba.shape[0])
    moved = strategies.overridden_actions(recommended, q_values, threshold)
    out = np.where(moved, 0.0, behaviour_proba)
    out[rows, recommended] += np.sum(np.where(moved, behaviour_proba, 0.0), axis=1)
    return old_tidy(out)


def old_unsupported(target_proba, behaviour_proba, support_threshold):
    target = np.asarray(target_proba, dtype=float)
    below = np.asarray(behaviour_proba, dtype=float) < support_threshold
    return np.sum(np.where(below, target, 0.0), axis=1)


def old_changed(target_proba, behaviour_proba):
    diff = np.asarray(target_proba, dtype=float) - np.asarray(behaviour_proba, dtype=float)
    return np.sum(np.clip(diff, 0.0, None), axis=1)


def one_hot(codes, k):
    out = np.zeros((len(codes), k))
    out[np.arange(len(codes)), codes] = 1.0
    return out


@pytest.fixture(params=[3, 4, 9])
def inputs(request):
    """Usual care's probabilities (with zeros and ones), a regime's codes and Q-values, in both layouts."""
    k = request.param
    rng = np.random.default_rng(k)
    m = 5000
    behaviour = rng.dirichlet(np.full(k, 0.4), size=m)
    behaviour[:50] = one_hot(rng.integers(0, k, 50), k)  # usual care certain of its action
    behaviour[50:100, 0] = 0.0
    behaviour[50:100] /= behaviour[50:100].sum(axis=1, keepdims=True)
    codes = rng.integers(0, k, m)
    q = rng.normal(scale=3.0, size=(m, k))
    return k, behaviour, codes, q


def layouts(array):
    return [np.ascontiguousarray(array), np.asfortranarray(array)]


def old_strategy(s, codes, behaviour, q):
    """The strategy's probabilities as computed before, numpy's row sums included."""
    rows = np.arange(len(codes))
    if s.family == "override_gain":
        return old_override(codes, q, behaviour, s.parameter)
    if s.family == "partial_adoption":
        out = (1.0 - s.parameter) * behaviour
        out[rows, codes] += s.parameter
        return old_tidy(out)
    p = behaviour[rows, codes]
    scale = 1.0 / (s.parameter * p + 1.0 - p)
    out = behaviour * scale[:, None]
    out[rows, codes] = s.parameter * p * scale
    return old_tidy(out)


@pytest.mark.parametrize(
    "family, value",
    [("partial_adoption", 0.3), ("override_gain", 1.0), ("override_gain", 0.0), ("incremental_odds", 4.0)],
)
def test_strategies_are_those_summed_by_numpy(inputs, family, value):
    k, behaviour, codes, q = inputs
    s = strategies.strategy(family, value)
    for b in layouts(behaviour):
        new, old = strategies.strategy_proba(s, codes, b, q), old_strategy(s, codes, b, q)
        assert same_bits(new, old), (s.name, b.flags)
        assert (new.flags.c_contiguous, new.flags.f_contiguous) == (old.flags.c_contiguous, old.flags.f_contiguous)
        rows = np.arange(0, len(codes), 7)  # rows gathered as the outcome models ask for them
        assert same_bits(
            strategies.strategy_proba(s, codes[rows], b[rows], q[rows]), old_strategy(s, codes[rows], b[rows], q[rows])
        )


def test_shares_of_probabilities_and_of_codes_are_the_old_ones(inputs):
    k, behaviour, codes, q = inputs
    rng = np.random.default_rng(7)
    stochastic = rng.dirichlet(np.full(k, 0.5), size=len(codes))
    for b in layouts(behaviour):
        for target in layouts(stochastic) + layouts(one_hot(codes, k)):
            assert same_bits(unsupported_by_row(target, b, 0.05), old_unsupported(target, b, 0.05))
            assert same_bits(changed_by_row(target, b), old_changed(target, b))
        # a deterministic regime's codes: the terms of its one-hot rows, which are not built
        assert same_bits(unsupported_by_row(codes, b, 0.05), old_unsupported(one_hot(codes, k), b, 0.05))
        assert same_bits(changed_by_row(codes, b), old_changed(one_hot(codes, k), b))
        # usual care certain of the regime's action: no change, +0.0 as the old sum of zeros gives
        certain = one_hot(codes, k)
        assert same_bits(changed_by_row(codes, certain), old_changed(certain, certain))
