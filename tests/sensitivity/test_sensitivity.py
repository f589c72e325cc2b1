"""Confounding-sensitivity computations checked against published values and an independent linear program."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import linprog

from regimewise.sensitivity.bounds import (
    bounds_curve,
    inverse_probability_bounds,
    regime_value_bounds,
    tipping_point,
    trajectory_weight_bounds,
    weighted_mean_bounds,
)
from regimewise.sensitivity.evalues import e_value, e_value_interval


def brute_force_bounds(y, a, b):
    """Charnes–Cooper transform of max/min Σ w y / Σ w over a <= w <= b, solved by scipy's linprog (HiGHS).

    Variables (z, t) with z = t·w and t = 1/Σw: optimise y·z subject to Σz = 1, a·t <= z <= b·t, t >= 0.
    """
    n = len(y)
    eye = np.eye(n)
    a_ub = np.vstack([np.hstack([eye, -b[:, None]]), np.hstack([-eye, a[:, None]])])
    b_ub = np.zeros(2 * n)
    a_eq = np.hstack([np.ones(n), [0.0]])[None, :]
    out = []
    for sign in (1.0, -1.0):  # minimise y·z, then maximise it
        c = np.hstack([sign * y, [0.0]])
        res = linprog(c, A_ub=a_ub, b_ub=b_ub, A_eq=a_eq, b_eq=[1.0], bounds=[(0, None)] * (n + 1), method="highs")
        assert res.status == 0
        out.append(sign * res.fun)
    return out[0], out[1]


@pytest.mark.parametrize("seed", range(12))
def test_sorting_bounds_equal_the_linear_program(seed):
    # Independent reference: the linear-fractional program solved as a linear program (Charnes & Cooper 1962).
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 13))
    y = rng.normal(size=n)
    a = rng.uniform(0.0, 2.0, size=n)
    b = a + rng.uniform(0.0, 3.0, size=n)
    bounds = weighted_mean_bounds(y, a, b)
    lp_low, lp_high = brute_force_bounds(y, a, b)
    assert bounds.lower == pytest.approx(lp_low, abs=1e-8)
    assert bounds.upper == pytest.approx(lp_high, abs=1e-8)


def _following_episodes(rng, n_episodes=40, horizon=3):
    episode = np.repeat(np.arange(n_episodes), horizon)
    proba = rng.uniform(0.1, 0.9, size=episode.size)
    follows = rng.uniform(size=episode.size) < 0.7
    returns = rng.normal(size=n_episodes)
    return returns, proba, follows, episode


def _factor_products(proba, follows, episode, n_episodes, gamma, confounded, adoption):
    """Each episode's weight bounds written out decision by decision: the Tan (2006) bounds of 1/e where
    confounding is allowed, 1/e elsewhere; factor 1 − ε + ε·1[follows]·bound; product per episode; 0 for an
    episode that departs from a deterministic regime."""
    low, high = [], []
    for i in range(n_episodes):
        at = episode == i
        if adoption == 1.0 and not follows[at].all():
            low.append(0.0), high.append(0.0)
            continue
        odds = 1.0 / proba[at] - 1.0
        point = 1.0 / proba[at]
        bounds = (
            np.where(confounded[at], 1.0 + odds / gamma, point),
            np.where(confounded[at], 1.0 + gamma * odds, point),
        )
        low_i, high_i = (np.prod(1.0 - adoption + adoption * follows[at] * b) for b in bounds)
        low.append(low_i), high.append(high_i)
    return np.array(low), np.array(high)


@pytest.mark.parametrize("adoption", [1.0, 0.3])
@pytest.mark.parametrize("seed", range(4))
def test_curve_over_gammas_equals_the_bounds_written_out(seed, adoption):
    # References: the weight bounds written out decision by decision (above, an exact computation), and the sharp
    # bounds of the weighted mean over that box from the linear program (Charnes & Cooper 1962), at each Γ.
    rng = np.random.default_rng(seed)
    returns, proba, follows, episode = _following_episodes(rng, n_episodes=30, horizon=4)
    confounded = rng.uniform(size=episode.size) < 0.8
    gammas = [1.0, 1.3, 2.0, 4.5]
    curve = bounds_curve(returns, proba, follows, episode, gammas, confounded, adoption)
    for row, gamma in zip(curve, gammas, strict=True):
        w_low, w_high = _factor_products(proba, follows, episode, returns.size, gamma, confounded, adoption)
        np.testing.assert_allclose(
            trajectory_weight_bounds(proba, follows, episode, returns.size, gamma, confounded, adoption),
            (w_low, w_high),
            rtol=1e-12,
        )
        np.testing.assert_allclose(row, brute_force_bounds(returns, w_low, w_high), atol=1e-8)


def test_gamma_one_gives_the_weighted_importance_sampling_estimate():
    # At Γ = 1 the box collapses to the estimated weights, so both bounds equal WIS (METHODS.md identity).
    rng = np.random.default_rng(3)
    returns, proba, follows, episode = _following_episodes(rng)
    w = np.ones(returns.size)
    np.multiply.at(w, episode, 1.0 / proba)
    w[np.bincount(episode, weights=~follows, minlength=returns.size) > 0] = 0.0
    wis = np.sum(w * returns) / np.sum(w)
    bounds = regime_value_bounds(returns, proba, follows, episode, gamma=1.0)
    assert bounds.lower == pytest.approx(wis, abs=1e-12)
    assert bounds.upper == pytest.approx(wis, abs=1e-12)


def test_bounds_widen_monotonically_in_gamma():
    rng = np.random.default_rng(4)
    returns, proba, follows, episode = _following_episodes(rng)
    previous = regime_value_bounds(returns, proba, follows, episode, gamma=1.0)
    for gamma in (1.1, 1.3, 1.6, 2.0, 3.0, 5.0):
        current = regime_value_bounds(returns, proba, follows, episode, gamma=gamma)
        assert current.lower <= previous.lower + 1e-12
        assert current.upper >= previous.upper - 1e-12
        previous = current


def test_inverse_probability_bounds_are_the_odds_ratio_bounds():
    # Derivation check: the true probability p' whose odds differ from those of e by the factor Γ^(±1) has
    # 1/p' equal to the bounds of Tan (2006) as written in METHODS.md.
    e, gamma = np.array([0.2, 0.5, 0.9]), 2.5
    lower, upper = inverse_probability_bounds(e, gamma)
    odds = e / (1 - e)
    for factor, bound in ((gamma, lower), (1 / gamma, upper)):
        p_true = factor * odds / (1 + factor * odds)
        np.testing.assert_allclose(1 / p_true, bound, rtol=1e-12)


def test_unconfounded_decisions_keep_their_weight():
    proba = np.array([0.5, 0.25])
    follows = np.array([True, True])
    episode = np.array([0, 0])
    lower, upper = trajectory_weight_bounds(proba, follows, episode, 1, gamma=2.0, confounded=np.array([True, False]))
    # decision 0 confounded: [1 + 1/2, 1 + 2] = [1.5, 3]; decision 1 keeps 1/0.25 = 4
    assert lower[0] == pytest.approx(6.0) and upper[0] == pytest.approx(12.0)


def test_e_values_match_published_worked_examples():
    # VanderWeele & Ding (2017), Ann Intern Med 167:268: RR 3.9 -> E-value 7.26.
    assert e_value(3.9) == pytest.approx(7.26, abs=0.005)
    # Ding & VanderWeele (2016), Epidemiology: RR 10.73 -> 20.95; its lower limit 8.02 -> 15.52.
    assert e_value(10.73) == pytest.approx(20.95, abs=0.005)
    assert e_value_interval(8.02, 14.34) == pytest.approx(15.52, abs=0.005)  # upper limit arbitrary: unused
    # Protective effects use 1/RR; an interval including 1 has E-value 1 (same source).
    assert e_value(1 / 3.9) == pytest.approx(e_value(3.9))
    assert e_value_interval(0.8, 1.2) == 1.0


def test_tipping_point_is_where_the_lower_limit_crosses_zero():
    precision = 0.001
    crossing = tipping_point(lambda g: 2.0 - g, gamma_max=10, precision=precision)
    assert 2.0 <= crossing <= 2.0 + precision
    assert tipping_point(lambda g: -1.0) == 1.0
    assert tipping_point(lambda g: 5.0, gamma_max=4.0) is None


def test_tipping_point_of_the_summary_is_where_the_interval_reaches_zero():
    # Replicate curves built by hand: lower bounds falling linearly in Γ, so the 2.5% quantile of the replicates'
    # lower bounds crosses zero at a known Γ; the summary's Γ* must sit at the first grid point past it.
    from support.tiny import REPOSITORY

    from regimewise.protocol import load_protocol
    from regimewise.sensitivity.analysis import summarise_sensitivity
    from regimewise.sensitivity.bounds import analysis_gammas

    protocol = load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol
    gammas = analysis_gammas(protocol.sensitivity)
    replicates = [
        {
            "bounded": np.column_stack([shift + 3.0 - 2.0 * (gammas - 1.0), shift + 3.0 + gammas]).tolist(),
            "usual_care": 0.0,
        }
        for shift in np.linspace(-0.5, 0.5, 41)
    ]
    point = {
        "bounded": np.column_stack([3.0 - 2.0 * (gammas - 1.0), 3.0 + gammas]),
        "usual_care": 0.0,
        "returns_sd": 1.0,
        "ess": 500.0,
        "n_episodes": 1000,
    }
    out = summarise_sensitivity(point, replicates, protocol, None)
    low = np.asarray(out["curve"]["low"])
    star, precision = out["tipping_point"], protocol.sensitivity.precision
    index = int(np.searchsorted(gammas, star - 1e-12))
    assert low[index] <= 0 < low[index - 1]  # first grid point whose interval includes zero
    # exact zero of the limit; the 2.5% quantile at position (R + 1)α (Davison & Hinkley 1997, §5.2)
    crossing = 1.0 + (3.0 + np.quantile(np.linspace(-0.5, 0.5, 41), 0.025, method="weibull")) / 2.0
    assert abs(star - crossing) <= precision + 1e-9  # bisection on the Γ grid: within one grid step
    assert f"{star:.2f}" in out["sentence"]


# ---------------------------------------------------------------------------------------------- partial adoption
def test_partial_adoption_at_gamma_one_is_its_weighted_importance_sampling_estimate():
    # At Γ = 1 the box collapses to the estimated weights Π (1 − ε + ε·1[follows]/e) (the mixture's density ratio,
    # evaluation/strategies.py), so both bounds equal the strategy's WIS, here computed by the evaluation room's
    # estimator from the strategy's action probabilities: an independent code path.
    from regimewise.evaluation.ope import evaluate_off_policy
    from regimewise.evaluation.strategies import partial_adoption_proba

    rng = np.random.default_rng(11)
    n_episodes, horizon, epsilon = 50, 3, 0.3
    episode = np.repeat(np.arange(n_episodes), horizon)
    step = np.tile(np.arange(horizon), n_episodes)
    behaviour = rng.dirichlet(np.ones(3) * 2.0, size=episode.size)
    action = np.array([rng.choice(3, p=p) for p in behaviour])
    recommended = rng.integers(0, 3, size=episode.size)
    reward = np.zeros(episode.size)
    reward[step == horizon - 1] = rng.normal(size=n_episodes)
    target = partial_adoption_proba(recommended, behaviour, epsilon)
    wis = evaluate_off_policy(step, action, reward, episode, behaviour, target, horizon=horizon, gamma=1.0)["WIS"]
    taken = behaviour[np.arange(episode.size), action]
    bounds = regime_value_bounds(
        reward[step == horizon - 1], taken, recommended == action, episode, gamma=1.0, adoption=epsilon
    )
    assert bounds.lower == pytest.approx(wis.value, abs=1e-10)
    assert bounds.upper == pytest.approx(wis.value, abs=1e-10)


@pytest.mark.parametrize("epsilon", [0.2, 0.6, 1.0])
def test_partial_adoption_weight_bounds_are_attained_on_the_odds_ratio_boundary(epsilon):
    # Derivation check: each decision's true probability p' has odds within a factor Γ of those of e (Tan 2006);
    # the weight 1 − ε + ε·1[follows]/p' is monotone in p', so an episode's extreme weights come from every p' at
    # one end. Random admissible p' never leave the box, and the two ends reproduce its corners.
    rng = np.random.default_rng(5)
    e = rng.uniform(0.1, 0.9, size=6)
    follows = np.array([True, True, False, True, False, True])
    episode = np.array([0, 0, 0, 1, 1, 1])
    gamma = 2.0
    lower, upper = trajectory_weight_bounds(e, follows, episode, 2, gamma, adoption=epsilon)
    odds = e / (1 - e)

    def weights(factor):
        p_true = factor * odds / (1 + factor * odds)
        per_decision = 1 - epsilon + epsilon * follows / p_true
        return np.array([per_decision[:3].prod(), per_decision[3:].prod()])

    np.testing.assert_allclose(weights(1 / gamma), upper, rtol=1e-12)  # smaller odds: larger inverse probability
    np.testing.assert_allclose(weights(gamma), lower, rtol=1e-12)
    for _ in range(200):
        w = weights(np.exp(rng.uniform(-np.log(gamma), np.log(gamma), size=6)))
        assert np.all(w >= lower - 1e-12) and np.all(w <= upper + 1e-12)
