"""Ranks of sorted codes counted where they change (``dense_codes``) and the rows regrouped by step with the steps
as small integers (``step_order``) against the numpy calls they replace, exactly.

These are equivalence checks with no outside reference: the replaced calls (``numpy.unique(..., return_inverse=True)``
and a stable ``numpy.argsort`` of the steps) are the reference, on small invented data."""

from __future__ import annotations

import numpy as np
import pytest

from regimewise.core.arrays import dense_codes, step_order


def episodes(n_episodes, horizon, seed):
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, horizon + 1, n_episodes)
    return np.repeat(np.arange(n_episodes), lengths), np.concatenate([np.arange(n) for n in lengths])


def same(got, want):
    return got.dtype == want.dtype and got.shape == want.shape and np.array_equal(got, want)


@pytest.mark.parametrize("seed", range(4))
def test_dense_codes_of_a_folds_episodes_equal_numpys_unique(seed):
    episode, _ = episodes(500, 6, seed)
    rng = np.random.default_rng(seed)
    fold = rng.integers(0, 3, episode.max() + 1)[episode]
    for codes in (episode, episode[fold == 1], episode[:1], episode[:0], episode.astype(np.int32)[fold != 2]):
        assert same(dense_codes(codes), np.unique(codes, return_inverse=True)[1])


def test_dense_codes_of_unsorted_codes_equal_numpys_unique():
    codes = np.random.default_rng(1).integers(0, 50, 400)
    assert same(dense_codes(codes), np.unique(codes, return_inverse=True)[1])


@pytest.mark.parametrize("horizon", [1, 3, 12, 300])
def test_step_order_equals_a_stable_argsort(horizon):
    episode, step = episodes(400, horizon, horizon)
    rng = np.random.default_rng(2)
    for steps in (step, step[rng.random(step.size) < 0.5], step.astype(np.int32), step[:0], rng.permutation(step)):
        assert same(step_order(steps, horizon), np.argsort(steps, kind="stable"))


def test_step_order_of_steps_outside_the_horizon_equals_a_stable_argsort():
    steps = np.array([0, 5, 1, 300, -2, 1, 0])
    assert same(step_order(steps, 3), np.argsort(steps, kind="stable"))
