"""Stochastic regimes and the strategies derived from a learned regime, against exact answers.

Sources: exact policy evaluation by backward induction on the small Markov decision process of
``tests/support/small_mdp.py`` (Puterman 1994, ch. 4), and direct enumeration of a modified treatment policy's
post-intervention action (Díaz, Williams, Hoffman & Schenck 2023, JASA 118:846: the density of d(A, s) is the
sum of usual care's probabilities over the natural actions d maps to a).
"""

import warnings

import numpy as np
import pytest
from support import small_mdp as sm

from regimewise.errors import StatisticalWarning
from regimewise.evaluation.fqe import FittedQEvaluation
from regimewise.evaluation.strategies import (
    incremental_proba,
    override_proba,
    partial_adoption_proba,
    share_changed,
)
from regimewise.regime.qmodels import evaluate_policies

MDP = sm.make_mdp()
REGIME = np.array([[0, 1, 2], [1, 2, 2], [0, 1, 1]])  # a fixed deterministic regime (H, S)
# an invented Q-table (H, S, K) whose gaps decide where the override strategy switches
Q_TABLE = sm.backward_induction(MDP.transition, MDP.reward_mean)[0]


def grid_rows(values_hsk):
    """(H·S, K) rows of a table given per step and state, with the matching recommended action."""
    return values_hsk.reshape(-1, sm.N_ACTIONS), REGIME.reshape(-1)


def as_table(rows):
    return rows.reshape(sm.HORIZON, sm.N_STATES, sm.N_ACTIONS)


def strategy_tables():
    """Exact (H, S, K) probabilities of each strategy built from REGIME, usual care and Q_TABLE."""
    behaviour, rec = grid_rows(MDP.behaviour)
    q, _ = grid_rows(Q_TABLE)
    return {
        "partial_adoption_0.4": as_table(partial_adoption_proba(rec, behaviour, 0.4)),
        "override_gain_0.5": as_table(override_proba(rec, q, behaviour, 0.5)),
        "incremental_odds_3": as_table(incremental_proba(rec, behaviour, 3.0)),
    }


def test_override_density_is_the_law_of_the_modified_action():
    # source: enumeration over natural actions a' of d(a', s) = rec if Q(rec) − Q(a') > c else a'
    behaviour, rec = grid_rows(MDP.behaviour)
    q, _ = grid_rows(Q_TABLE)
    got = override_proba(rec, q, behaviour, 0.5)
    expected = np.zeros_like(behaviour)
    for i in range(behaviour.shape[0]):
        for natural in range(sm.N_ACTIONS):
            d = rec[i] if q[i, rec[i]] - q[i, natural] > 0.5 else natural
            expected[i, d] += behaviour[i, natural]
    np.testing.assert_allclose(got, expected, atol=1e-15)
    # the importance weight is 1 where the clinician's action is kept and 0 where it is overridden
    ratio = got / behaviour
    kept = (q[np.arange(len(rec)), rec][:, None] - q <= 0.5) & (np.arange(sm.N_ACTIONS) != rec[:, None])
    np.testing.assert_allclose(ratio[kept], 1.0)
    assert np.all(ratio[~kept & (np.arange(sm.N_ACTIONS) != rec[:, None])] == 0.0)


def test_partial_adoption_and_incremental_weights_are_bounded():
    # source: the definitions; π_e/p_b ≤ 1 − ε + ε/p_b and ≤ max(δ, 1) (Kennedy 2019, JASA 114:645)
    behaviour, rec = grid_rows(MDP.behaviour)
    rows = np.arange(len(rec))
    ratio = partial_adoption_proba(rec, behaviour, 0.4) / behaviour
    assert np.all(ratio <= 1 - 0.4 + 0.4 / behaviour[rows, rec][:, None] + 1e-12)
    odds = incremental_proba(rec, behaviour, 3.0)
    p, q = behaviour[rows, rec], odds[rows, rec]
    np.testing.assert_allclose(q / (1 - q), 3.0 * p / (1 - p))
    assert np.all(odds / behaviour <= 3.0 + 1e-12)
    # share changed: ε·(1 − p_b(rec)) for partial adoption (total variation of the mixture)
    assert share_changed(partial_adoption_proba(rec, behaviour, 0.4), behaviour) == pytest.approx(
        np.mean(0.4 * (1 - p))
    )


def simulate_override_value(n, seed, c):
    """Monte Carlo value of the override strategy, rolled out directly: draw the clinician's natural action from
    usual care, switch it when the gain exceeds c (independent of the density formula)."""
    rng = np.random.default_rng(seed)
    state = rng.choice(sm.N_STATES, size=n, p=MDP.initial)
    alive = np.ones(n, dtype=bool)
    total = np.zeros(n)
    for t in range(sm.HORIZON):
        cum = MDP.behaviour[t, state].cumsum(axis=1)
        natural = np.minimum((rng.random(n)[:, None] > cum).sum(axis=1), sm.N_ACTIONS - 1)
        rec = REGIME[t, state]
        gain = Q_TABLE[t, state, rec] - Q_TABLE[t, state, natural]
        action = np.where(gain > c, rec, natural)
        total += alive * MDP.reward_mean[t, state, action]
        cum = MDP.transition[t, state, action].cumsum(axis=1)
        outcome = np.minimum((rng.random(n)[:, None] > cum).sum(axis=1), sm.END)
        alive &= outcome != sm.END
        state = np.where(outcome == sm.END, 0, outcome)
    return total.mean(), total.std(ddof=1) / np.sqrt(n)


def test_override_value_by_density_equals_direct_rollout():
    # source: exact evaluation of the induced density against a direct rollout of d(natural action, state)
    _, v = sm.evaluate_policy(MDP.transition, MDP.reward_mean, strategy_tables()["override_gain_0.5"])
    mean, se = simulate_override_value(400_000, seed=7, c=0.5)
    assert abs(mean - MDP.initial @ v[0]) < 3 * se


def estimates_for(sample, proba):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StatisticalWarning)
        out, fqe_value = sm.off_policy_estimates(sample, proba)
    return {**{name: est.value for name, est in out.items()}, "FQE": fqe_value}


@pytest.mark.parametrize("name", ["partial_adoption_0.4", "override_gain_0.5", "incremental_odds_3"])
def test_estimators_recover_the_exact_value_of_a_stochastic_strategy(name):
    """100 samples of 800 episodes: each estimator's mean lies within 3 Monte Carlo standard errors of the exact
    value of the stochastic strategy (backward evaluation on the true MDP)."""
    proba = strategy_tables()[name]
    _, v_exact = sm.evaluate_policy(MDP.transition, MDP.reward_mean, proba)
    exact = MDP.initial @ v_exact[0]
    big = sm.sample_episodes(MDP, 100 * 800, seed=2025)
    values = [estimates_for(sample, proba) for sample in sm.split_samples(big, 800)]
    assert len(values) == 100
    for estimator in ("IS", "WIS", "PDIS", "PDWIS", "DR", "WDR", "FQE"):
        vals = np.array([v[estimator] for v in values])
        se = vals.std(ddof=1) / np.sqrt(vals.size)
        assert abs(vals.mean() - exact) < 3 * se, (estimator, vals.mean(), exact, se)


def test_saturated_fqe_is_exact_for_each_strategy():
    # source: exact policy evaluation on the empirical MDP of the sample (saturated one-hot states)
    log = sm.sample_episodes(MDP, 2000, seed=11)
    initial, transition, reward_mean, _ = sm.empirical_mdp(log)
    for proba in strategy_tables().values():
        _, v_exact = sm.evaluate_policy(transition, reward_mean, proba)
        target = sm.rows_proba(proba, log)
        fqe = FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON).fit(
            log["X"], log["step"], log["action"], log["reward"], log["episode"], target
        )
        first = log["step"] == 0
        assert fqe.value_estimate(log["X"][first], target[first]) == pytest.approx(initial @ v_exact[0], abs=1e-9)


def test_batched_evaluation_equals_one_fitted_q_evaluation_per_regime():
    # source: FittedQEvaluation (itself checked against exact evaluation above and scikit-learn Ridge in test_fqi.py):
    # Q̂ of the action taken and V̂ of the regime at every decision, regime by regime
    log = sm.sample_episodes(MDP, 600, seed=12)
    X = np.hstack([log["X"], np.random.default_rng(0).standard_normal((log["X"].shape[0], 2))])
    tables = list(strategy_tables().values()) + [sm.deterministic_proba(REGIME)]
    targets = [sm.rows_proba(t, log) for t in tables]
    batched = evaluate_policies(
        X, log["step"], log["action"], log["reward"], log["episode"], targets,
        horizon=sm.HORIZON, n_actions=sm.N_ACTIONS, gamma=0.9, alpha=0.5,
    )  # fmt: skip
    for (taken, value), target in zip(batched, targets):
        single = FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON, gamma=0.9, alpha=0.5).fit(
            X, log["step"], log["action"], log["reward"], log["episode"], target
        )
        expected_taken, expected_value = single.taken_and_target_values(X, log["step"], log["action"], target)
        np.testing.assert_allclose(taken, expected_taken, rtol=0, atol=1e-10)
        np.testing.assert_allclose(value, expected_value, rtol=0, atol=1e-10)


def test_a_fold_given_by_its_rows_equals_the_fold_copied_out():
    # source: the same function on X[rows] and the targets' rows copied out; FittedQEvaluation, the test above's
    # reference, on the fold's copy agrees too
    log = sm.sample_episodes(MDP, 600, seed=13)
    X = np.hstack([log["X"], np.random.default_rng(1).standard_normal((log["X"].shape[0], 2))])
    fold = np.isin(log["episode"], np.flatnonzero(np.random.default_rng(2).random(600) < 0.5))
    episode = np.unique(log["episode"][fold], return_inverse=True)[1]
    targets = [sm.rows_proba(t, log) for t in strategy_tables().values()]
    common = dict(horizon=sm.HORIZON, n_actions=sm.N_ACTIONS, gamma=0.9, alpha=0.5)
    arrays = (log["step"][fold], log["action"][fold], log["reward"][fold], episode)
    by_rows = evaluate_policies(X, *arrays, targets, x_rows=np.flatnonzero(fold), **common)
    copied = evaluate_policies(X[fold], *arrays, [t[fold] for t in targets], **common)
    for rows_result, copy_result, target in zip(by_rows, copied, targets):
        for got, copy in zip(rows_result, copy_result):
            assert np.array_equal(got, copy)
        single = FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON, gamma=0.9, alpha=0.5).fit(X[fold], *arrays, target[fold])
        expected = single.taken_and_target_values(X[fold], arrays[0], arrays[1], target[fold])
        np.testing.assert_allclose(rows_result, expected, rtol=0, atol=1e-10)


def test_a_deterministic_regime_given_by_its_codes_equals_its_one_hot_probabilities():
    # source: the same function given the regime's one-hot (n, K) probabilities; both bit for bit, on all rows
    # and on a fold's rows read in place
    log = sm.sample_episodes(MDP, 400, seed=14)
    codes = REGIME[log["step"], log["state"]]
    one_hot = sm.rows_proba(sm.deterministic_proba(REGIME), log)
    table = (log["X"], log["step"], log["action"], log["reward"], log["episode"])
    common = dict(horizon=sm.HORIZON, n_actions=sm.N_ACTIONS, gamma=0.9, alpha=0.5)
    by_codes = evaluate_policies(*table, [codes, one_hot], **common)
    assert all(np.array_equal(a, b) for a, b in zip(*by_codes))
    fold = log["episode"] % 3 == 0
    episode = np.unique(log["episode"][fold], return_inverse=True)[1]
    arrays = (log["step"][fold], log["action"][fold], log["reward"][fold], episode)
    in_fold = evaluate_policies(log["X"], *arrays, [codes, one_hot], x_rows=np.flatnonzero(fold), **common)
    assert all(np.array_equal(a, b) for a, b in zip(*in_fold))
    (copied,) = evaluate_policies(log["X"][fold], *arrays, [one_hot[fold]], **common)
    assert all(np.array_equal(a, b) for a, b in zip(in_fold[0], copied))
