"""The importance weights' grid filled through its flat cells from views of each block of rows, against the filling
it replaces (row positions and (episode, step) pairs), bit for bit: episodes that end early, one step, one row, and
blocks smaller than the table."""

from __future__ import annotations

import numpy as np
import pytest

import regimewise.evaluation.ope as ope_module
from regimewise.evaluation.ope import _FOLLOW_TOLERANCE, importance_weights


def by_pairs(step, action, episode, behaviour, target, horizon):
    """The filling replaced: each block's rows by position, the grid by (episode, step)."""
    ratio = np.ones((episode[-1] + 1, horizon))
    followed = np.ones(ratio.shape, dtype=bool)
    for start in range(0, len(step), ope_module.WEIGHT_ROWS):
        rows = np.arange(start, min(start + ope_module.WEIGHT_ROWS, len(step)))
        taken_b, taken_e = behaviour[rows, action[rows]], target[rows, action[rows]]
        ratio[episode[rows], step[rows]] = taken_e / taken_b
        followed[episode[rows], step[rows]] = taken_e >= 1 - _FOLLOW_TOLERANCE
    return np.cumprod(ratio, axis=1), int(followed.all(axis=1).sum())


def table(lengths, horizon, k=3, seed=0):
    rng = np.random.default_rng(seed)
    step = np.concatenate([np.arange(m) for m in lengths])
    episode = np.repeat(np.arange(len(lengths)), lengths)
    behaviour = rng.dirichlet(np.ones(k), len(step))
    action = np.array([rng.choice(k, p=p) for p in behaviour])
    target = np.eye(k)[rng.integers(0, k, len(step))]
    target[::5] = rng.dirichlet(np.ones(k), len(target[::5]))  # some stochastic rows
    target[action == 0] = np.eye(k)[0]  # so that some episodes follow the regime throughout
    return step, action, episode, behaviour, target, horizon


@pytest.mark.parametrize(
    "lengths, horizon",
    [([4, 2, 4, 1, 3] * 30, 4), ([1] * 50, 1), ([1], 3), ([5] * 41, 5)],
    ids=["early ends", "one step", "one row", "full"],
)
@pytest.mark.parametrize("block_rows", [1, 7, 65_536])
def test_weights_filled_by_cells_equal_those_filled_by_pairs(monkeypatch, lengths, horizon, block_rows):
    monkeypatch.setattr(ope_module, "WEIGHT_ROWS", block_rows)
    step, action, episode, behaviour, target, horizon = table(lengths, horizon)
    reward = np.random.default_rng(1).normal(size=len(step))
    w = importance_weights(step, action, reward, episode, behaviour, target, horizon=horizon)
    cumulative, following = by_pairs(step, action, episode, behaviour, target, horizon)
    assert w.cumulative.tobytes() == cumulative.tobytes()
    assert w.n_following == following
    assert np.array_equal(w.reward[episode, step], reward)
