"""Importance weights, their diagnostics and the estimators as computed now against the same computations as they
were written before (copied here), bit for bit: a deterministic regime weighted from its action codes, grids
filled without a scatter when every episode lasts the horizon, usual care's zeros looked for once, Kish's ESS
of a column read once, and only the estimators asked for.

These are equivalence checks with no outside reference: the replaced computations are the reference, on small
random tables (some episodes shorter than the horizon) and on a small simulated cohort."""

from __future__ import annotations

import re
import warnings

import numpy as np
import pytest
from support.tiny import REPOSITORY

from regimewise.core.arrays import check_layout, check_proba
from regimewise.core.weighting import kish_ess
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.evaluation import ope
from regimewise.evaluation.values import (
    LoggedDecisions,
    regime_estimates,
    regime_targets,
    weighted_target,
    whole_target,
)
from regimewise.protocol import load_protocol
from regimewise.regime.qmodels import target_rows


def old_weights(step, action, reward, episode, behaviour_proba, target_proba, horizon):
    """importance_weights as it was (layout checked by the caller): (cumulative, reward grid, n_following, unseen)."""
    n = step.shape[0]
    target_proba = check_proba(target_proba, n, behaviour_proba.shape[1], "target_proba")
    shape = (episode[-1] + 1, horizon)
    ratio, followed = np.ones(shape), np.ones(shape, dtype=bool)
    at = np.arange(n)
    taken_b, taken_e = behaviour_proba[at, action], target_proba[at, action]
    ratio[episode, step] = taken_e / taken_b
    followed[episode, step] = taken_e >= 1 - 1e-12
    unseen = int(np.sum(((behaviour_proba <= 0) & (target_proba > 0)).any(axis=1)))
    grid_reward = np.zeros(shape)
    grid_reward[episode, step] = reward
    return np.cumprod(ratio, axis=1), grid_reward, int(followed.all(axis=1).sum()), unseen


def old_to_grid(weights, values):
    grid = np.zeros(weights.cumulative.shape)
    grid[weights.row_episode, weights.row_step] = values
    return grid


def old_kish(w):
    return kish_ess(w) if w.sum() > 0 else 0.0


def one_hot(codes, k):
    out = np.zeros((len(codes), k))
    out[np.arange(len(codes)), codes] = 1.0
    return out


def table(rng, episodes, horizon, k, full):
    """A decision table sorted by episode and step; with ``full`` False some episodes end early."""
    lengths = np.full(episodes, horizon) if full else rng.integers(1, horizon + 1, episodes)
    episode = np.repeat(np.arange(episodes), lengths)
    step = np.concatenate([np.arange(length) for length in lengths])
    behaviour = rng.dirichlet(np.full(k, 1.0), size=len(step))
    behaviour[::37, 1] = 0.0  # usual care never takes action 1 there
    behaviour /= behaviour.sum(axis=1, keepdims=True)
    action = np.array([rng.choice(k, p=row) for row in behaviour])
    reward = rng.normal(size=len(step))
    reward[::11] = -0.0
    return step, action, reward, episode, behaviour


def same_bits(a, b) -> bool:
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return a.shape == b.shape and np.array_equal(a.view(np.int64), b.view(np.int64))


@pytest.mark.parametrize("full", [True, False])
@pytest.mark.parametrize("block", [ope.WEIGHT_ROWS, 7])
def test_weights_of_codes_and_of_probabilities_are_the_old_ones(full, block, monkeypatch):
    monkeypatch.setattr(ope, "WEIGHT_ROWS", block)
    rng = np.random.default_rng(11 + full)
    horizon, k = 4, 3
    step, action, reward, episode, behaviour = table(rng, 60, horizon, k, full)
    step, action, episode = check_layout(step, action, episode, horizon, k)
    codes = rng.integers(0, k, len(step))
    follows = episode % 5 == 0
    codes[follows] = action[follows]  # some episodes follow the regime
    stochastic = rng.dirichlet(np.full(k, 1.0), size=len(step))
    for target, old_target in [(codes, one_hot(codes, k)), (one_hot(codes, k), None), (stochastic, None)]:
        old_target = target if old_target is None else old_target
        cumulative, grid_reward, following, unseen = old_weights(
            step, action, reward, episode, behaviour, old_target, horizon
        )
        assert unseen > 0  # the warning is due, and counts the same decisions
        with pytest.warns(StatisticalWarning, match=f"at {unseen} decisions"):
            new = ope.importance_weights(
                step, action, reward, episode, behaviour, target, horizon=horizon, layout_checked=True
            )
        assert same_bits(new.cumulative, cumulative) and same_bits(new.reward, grid_reward)
        assert new.n_following == following and (following > 0 or target is stochastic)
        values = rng.normal(size=len(step))
        values[::3] = -0.0
        assert same_bits(new.to_grid(values), old_to_grid(new, values))
        assert new.cumulative.flags.c_contiguous and new.reward.flags.c_contiguous


def test_usual_care_weighted_against_itself_is_still_checked_when_not_checked_before():
    rng = np.random.default_rng(2)
    step, action, reward, episode, behaviour = table(rng, 20, 3, 3, True)
    step, action, episode = check_layout(step, action, episode, 3, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StatisticalWarning)
        checked = ope.importance_weights(
            step, action, reward, episode, behaviour, behaviour, horizon=3, layout_checked=True
        )
    assert np.all(checked.cumulative == 1.0)
    bad = behaviour.copy()
    bad[4] = [0.7, 0.7, 0.0]
    with pytest.raises(UserInputError, match="behaviour_proba row 4"):  # not checked by the caller: checked here
        ope.importance_weights(step, action, reward, episode, bad, bad, horizon=3)


def test_codes_of_no_action_are_refused():
    rng = np.random.default_rng(3)
    step, action, reward, episode, behaviour = table(rng, 10, 3, 3, True)
    with pytest.raises(UserInputError, match="target_proba at row 0 is 3"):
        ope.importance_weights(step, action, reward, episode, behaviour, np.full(len(step), 3), horizon=3)
    with pytest.raises(UserInputError, match="action codes for"):
        ope.importance_weights(step, action, reward, episode, behaviour, np.zeros(len(step) - 1, dtype=int), horizon=3)


def test_kish_of_a_column_read_once_is_the_old_one():
    rng = np.random.default_rng(4)
    grid = np.cumprod(rng.random((50_000, 6)) * 2.0, axis=1)  # columns longer than numpy's buffers
    grid[:, 2] = 0.0  # no episode with a positive weight there
    grid[rng.random(50_000) < 0.3, 3] = 0.0
    grid[7, 4] = grid[8, 4] = 1e308  # the sum overflows: the figure is NaN, as kish_ess makes it
    grid[9, 5] = np.inf  # an infinite weight: kish_ess refuses it
    for j in range(grid.shape[1]):
        column = grid[:, j]
        with np.errstate(over="ignore", invalid="ignore"):
            try:
                old = old_kish(column)
            except UserInputError as err:
                with pytest.raises(UserInputError, match=re.escape(str(err))):
                    ope._kish(column)
                continue
            assert same_bits(ope._kish(column), old), j
    negative = grid[:, 0].copy()
    negative[3] = -1.0
    with pytest.raises(UserInputError, match="non-negative"):
        old_kish(negative)
    with pytest.raises(UserInputError, match="non-negative"):
        ope._kish(negative)
    nan = grid[:, 0].copy()
    nan[3] = np.nan
    assert old_kish(nan) == ope._kish(nan) == 0.0


def test_only_the_estimators_asked_for_are_computed_with_the_same_numbers():
    rng = np.random.default_rng(5)
    step, action, reward, episode, behaviour = table(rng, 80, 4, 3, False)
    target = rng.dirichlet(np.full(3, 1.0), size=len(step))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StatisticalWarning)
        weights = ope.importance_weights(step, action, reward, episode, behaviour, target, horizon=4)
    q, v = rng.normal(size=len(step)), rng.normal(size=len(step))
    every = ope.estimates_from_weights(weights, 0.9, q, v)
    for names in [{"pdwis"}, {"pdwis", "wdr"}, {"is", "dr"}, set(ope.COMPUTE)]:
        some = ope.estimates_from_weights(weights, 0.9, q, v, names=names)
        labels = {ope.ESTIMATORS[name].label for name in names}
        assert set(some) == labels
        for label in labels:
            assert some[label] == every[label] or (str(some[label]) == str(every[label]))  # NaN != NaN
    q[3] = np.nan  # a doubly robust estimator refuses these values: so does the computation without one
    with pytest.raises(UserInputError, match="q_taken has a missing"):
        ope.estimates_from_weights(weights, 0.9, q, v)
    with pytest.raises(UserInputError, match="q_taken has a missing"):
        ope.estimates_from_weights(weights, 0.9, q, v, names={"pdwis"})


@pytest.fixture(scope="module")
def cohort():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    decisions = clean_decisions(pf, simulate_cohort(200, seed=9).decisions)
    rng = np.random.default_rng(9)
    k = len(pf.protocol.actions)
    proba = rng.dirichlet(np.full(k, 2.0), size=len(decisions))
    return decisions, proba, pf.protocol


def test_a_regime_of_codes_gets_the_estimates_of_its_one_hot_probabilities(cohort):
    decisions, proba, protocol = cohort
    logged = LoggedDecisions.from_frame(decisions, proba, protocol)
    k = proba.shape[1]
    targets = list(regime_targets(decisions, logged.behaviour_proba, None, protocol, by_rows=True, part="fixed"))
    assert sum(isinstance(t["target"], np.ndarray) and t["target"].ndim == 1 for t in targets) >= 2
    for t in targets:
        codes = t["target"]
        if codes.ndim != 1:
            continue
        assert weighted_target(codes, logged.behaviour_proba) is codes
        fitted = (np.linspace(0, 1, len(codes)), np.linspace(1, 2, len(codes)), 0.5)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", StatisticalWarning)
            new = regime_estimates(logged, codes, protocol, True, fitted=fitted, changed=True)
            old = regime_estimates(
                logged, one_hot(codes.astype(np.int64), k), protocol, True, fitted=fitted, changed=True
            )
        assert repr(new) == repr(old), t["name"]
    wrapped = np.full(len(decisions), -1)  # not an action's code: weighted from its (n, K) probabilities
    assert weighted_target(wrapped, logged.behaviour_proba).shape == (len(decisions), k)


def old_whole_target(target, behaviour_proba):
    """whole_target as it was: the (n, K) probabilities in row-major layout."""
    n, k = behaviour_proba.shape
    out = np.empty((n, k))
    for start in range(0, n, 1000):
        rows = slice(start, start + 1000)
        out[rows] = target_rows(target, rows, k)
    return out


def test_strategies_built_whole_by_columns_get_the_estimates_of_the_row_major_ones(cohort):
    decisions, proba, protocol = cohort
    logged = LoggedDecisions.from_frame(decisions, proba, protocol)
    k = proba.shape[1]
    rng = np.random.default_rng(10)
    recommended, learned_q = rng.integers(0, k, len(decisions)), rng.normal(scale=2.0, size=(len(decisions), k))
    targets = regime_targets(decisions, logged.behaviour_proba, recommended, protocol, learned_q, by_rows=True)
    strategies = [t for t in targets if "strategy" in t]
    assert {t["strategy"].family for t in strategies} == {"partial_adoption", "override_gain", "incremental_odds"}
    fitted = (np.linspace(0, 1, len(decisions)), np.linspace(1, 2, len(decisions)), 0.5)
    for t in strategies:
        whole, old = whole_target(t["target"], logged.behaviour_proba), old_whole_target(t["target"], proba)
        assert whole.flags.f_contiguous and old.flags.c_contiguous and np.array_equal(whole, old)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", StatisticalWarning)
            new = regime_estimates(logged, t["target"], protocol, False, fitted=fitted, changed=True)
            before = regime_estimates(logged, old, protocol, False, fitted=fitted, changed=True)
        assert repr(new) == repr(before), t["name"]
