"""The bounds curve computed with the Γ-free work done once and the departing episodes left out gives the same
bits as the plain computation.

Equivalence checks with no outside reference: the reference below is the earlier code of
``regimewise.sensitivity.bounds`` written out (every episode, the weight box built for every Γ, the running sums
concatenated), and the new code must reproduce its every bit, the sign of zeros included.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from regimewise.sensitivity.bounds import bounds_curve, trajectory_weight_bounds


def _reference_box(proba_taken, follows, episode, n_episodes, confounded, adoption):
    departs = np.zeros(n_episodes, dtype=bool)
    if adoption == 1.0:
        departs = np.bincount(episode, weights=~follows, minlength=n_episodes) > 0
    kept = ~departs[episode]
    moves = kept & confounded & follows
    fixed = kept & ~moves
    fixed_factor = 1.0 - adoption + adoption * follows[fixed] / proba_taken[fixed]
    fixed_log = np.bincount(episode[fixed], weights=np.log(fixed_factor), minlength=n_episodes)
    moving_episode, moving_proba = episode[moves], proba_taken[moves]

    def product(bound):
        factor = 1.0 - adoption + adoption * bound
        moving_log = np.bincount(moving_episode, weights=np.log(factor), minlength=n_episodes)
        return np.where(departs, 0.0, np.exp(fixed_log + moving_log))

    def at(gamma):
        odds = 1.0 / moving_proba - 1.0
        return product(1.0 + odds / gamma), product(1.0 + gamma * odds)

    return at


def _reference_upper(y, a, b):
    if not np.any(b > 0):
        return math.nan
    num = np.concatenate([[0.0], np.cumsum(b * y)]) + np.concatenate([np.cumsum((a * y)[::-1])[::-1], [0.0]])
    den = np.concatenate([[0.0], np.cumsum(b)]) + np.concatenate([np.cumsum(a[::-1])[::-1], [0.0]])
    with np.errstate(invalid="ignore", divide="ignore"):
        return float(np.max(np.where(den > 0, num / den, -np.inf)))


def _reference_curve(returns, proba_taken, follows, episode, gammas, confounded, adoption):
    order = np.argsort(-returns, kind="mergesort")
    y = returns[order]
    box = _reference_box(proba_taken, follows, episode, returns.size, confounded, adoption)
    out = np.empty((len(gammas), 2))
    for i, gamma in enumerate(gammas):
        lower, upper = (bound[order] for bound in box(gamma))
        out[i, 1] = _reference_upper(y, lower, upper)
        out[i, 0] = -_reference_upper(-y[::-1], lower[::-1], upper[::-1])
    return out


def _records(rng, n_episodes, horizon, follow_share, returns):
    episode = np.repeat(np.arange(n_episodes), horizon)
    proba = rng.uniform(0.05, 1.0, size=episode.size)
    follows = rng.uniform(size=episode.size) < follow_share
    confounded = rng.uniform(size=episode.size) < 0.8
    return returns, proba, follows, episode, confounded


CASES = {
    "spread": lambda rng: rng.normal(size=400),
    "ties": lambda rng: rng.integers(-2, 3, size=400).astype(float),
    "non_positive": lambda rng: -rng.integers(0, 2, size=400).astype(float),  # bounds of exactly ±0
    "zeros": lambda rng: np.zeros(400),
}


@pytest.mark.parametrize("adoption", [1.0, 0.4])
@pytest.mark.parametrize("follow_share", [0.97, 0.8, 0.0])
@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("seed", range(3))
def test_bounds_curve_has_the_bits_of_the_plain_computation(seed, case, follow_share, adoption):
    rng = np.random.default_rng(seed)
    returns, proba, follows, episode, confounded = _records(rng, 400, 3, follow_share, CASES[case](rng))
    gammas = np.round(1.0 + 0.05 * np.arange(30), 10)
    new = bounds_curve(returns, proba, follows, episode, gammas, confounded, adoption)
    old = _reference_curve(returns, proba, follows, episode, gammas, confounded, adoption)
    assert new.tobytes() == old.tobytes()


@pytest.mark.parametrize("adoption", [1.0, 0.4])
def test_weight_bounds_have_the_bits_of_the_plain_computation(adoption):
    rng = np.random.default_rng(7)
    returns, proba, follows, episode, confounded = _records(rng, 200, 4, 0.9, rng.normal(size=200))
    for gamma in (1.0, 1.7, 6.0):
        new = trajectory_weight_bounds(proba, follows, episode, 200, gamma, confounded, adoption)
        old = _reference_box(proba, follows, episode, 200, confounded, adoption)(gamma)
        assert all(n.tobytes() == o.tobytes() for n, o in zip(new, old, strict=True))
