"""Off-policy estimators against hand-worked values, exact identities and exact values of a small MDP.

Sources of truth: values worked by hand from the published definitions (Precup, Sutton & Singh 2000 for
IS/WIS/PDIS/PDWIS; Thomas & Brunskill 2016, ICML, for DR in per-decision form and WDR), identities that
follow from those definitions, and exact policy evaluation by backward induction on ``tests/small_mdp.py``.
"""

import json
import re
import warnings

import numpy as np
import pytest
from scipy import stats
from support import small_mdp as sm

from regimewise.core.arrays import check_layout
from regimewise.core.weighting import kish_ess
from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.evaluation import ope
from regimewise.evaluation.ope import (
    evaluate_off_policy,
    importance_weights,
    per_decision_is,
    per_decision_wis,
    weighted_doubly_robust,
    weighted_trajectory_is,
)

MDP = sm.make_mdp()

# --------------------------------------------------------------------------------------------------------
# a three-episode example worked by hand (horizon 2, two actions; episode 2 ends after one step)
#   episode 0: actions (0, 0), rewards (1, 2), π_b taken (.5, .5),  π_e taken (1, 1)   -> ρ = (2, 4)
#   episode 1: actions (0, 1), rewards (0, 3), π_b taken (.5, .4),  π_e taken (1, .5)  -> ρ = (2, 2.5)
#   episode 2: action  (0,),   reward  (4,),   π_b taken (.8,),     π_e taken (1,)     -> ρ = (1.25, 1.25 carried)
HAND = {
    "step": np.array([0, 1, 0, 1, 0]),
    "action": np.array([0, 0, 0, 1, 0]),
    "reward": np.array([1.0, 2.0, 0.0, 3.0, 4.0]),
    "episode": np.array([0, 0, 1, 1, 2]),
    "behaviour_proba": np.array([[0.5, 0.5], [0.5, 0.5], [0.5, 0.5], [0.6, 0.4], [0.8, 0.2]]),
    "target_proba": np.array([[1.0, 0.0], [1.0, 0.0], [1.0, 0.0], [0.5, 0.5], [1.0, 0.0]]),
}
HAND_Q = np.array([2.5, 1.5, 0.5, 2.0, 3.0])
HAND_V = np.array([2.0, 1.0, 1.0, 2.5, 3.5])


def test_hand_worked_example():
    out = evaluate_off_policy(**HAND, horizon=2, q_taken=HAND_Q, v_target=HAND_V)
    # returns G = (3, 3, 4); final weights (4, 2.5, 1.25), sum 7.75
    assert out["IS"].value == pytest.approx(24.5 / 3)  # (4·3 + 2.5·3 + 1.25·4) / 3
    assert out["WIS"].value == pytest.approx(24.5 / 7.75)
    # per step Σρr: step 0: 2·1 + 2·0 + 1.25·4 = 7 (Σρ 5.25); step 1: 4·2 + 2.5·3 + 0 = 15.5 (Σρ 7.75)
    assert out["PDIS"].value == pytest.approx((7 + 15.5) / 3)
    assert out["PDWIS"].value == pytest.approx(7 / 5.25 + 15.5 / 7.75)
    # WDR step 0: 4/3 − 9.75/5.25 + 6.5/3 = 23/14; step 1: 2 − 11/7.75 + (2·1 + 2·2.5)/5.25 = 178/93
    assert out["WDR"].value == pytest.approx(23 / 14 + 178 / 93)
    # DR step 0: (7 − 9.75 + 6.5)/3 = 1.25; step 1: (15.5 − 11 + 7)/3 = 11.5/3
    assert out["DR"].value == pytest.approx(1.25 + 11.5 / 3)
    for est in out.values():
        assert est.ess == pytest.approx(7.75**2 / (16 + 6.25 + 1.5625))  # Kish (Σw)²/Σw²
        assert est.ess_fraction == pytest.approx(est.ess / 3)
        assert est.max_weight_share == pytest.approx(4 / 7.75)
        assert est.n_following == 2 and est.n_episodes == 3  # episode 1 leaves the regime with prob .5
        assert est.per_step_ess == pytest.approx((5.25**2 / 9.5625, 7.75**2 / 23.8125))


def test_the_weight_diagnostics_are_computed_once_per_weights_and_equal_kishs_formula_per_column(monkeypatch):
    # every estimator reports the same ESS figures of the same weights: they are computed once (at 1M episodes
    # x 12 the six estimators' repeated computation was a fifth of the evaluate stage), each exactly as
    # core.weighting.kish_ess computes it on that column alone (Kish 1965, as the hand-worked example above)
    rng = np.random.default_rng(3)
    n, h = 400, 3
    episode, step = np.repeat(np.arange(n // h + 1), h)[:n], np.tile(np.arange(h), n // h + 1)[:n]
    behaviour = rng.dirichlet([2.0, 2.0, 2.0], size=n)
    target = rng.dirichlet([1.0, 1.0, 1.0], size=n)
    action = np.array([rng.choice(3, p=row) for row in behaviour])
    weights = ope.importance_weights(step, action, rng.normal(size=n), episode, behaviour, target, horizon=h)
    calls = []
    real = ope._kish
    monkeypatch.setattr(ope, "_kish", lambda w: calls.append(1) or real(w))
    out = ope.estimates_from_weights(weights, 1.0, rng.normal(size=n), rng.normal(size=n))
    assert len(out) == 6 and len(calls) == 1 + h  # the final weights and each step's, once
    columns = [np.ascontiguousarray(c) for c in weights.cumulative.T]
    for est in out.values():
        assert est.per_step_ess == tuple(kish_ess(c) for c in columns)  # bit for bit
        assert est.ess == kish_ess(columns[-1])


def test_closed_form_standard_errors_of_the_hand_worked_example():
    out = evaluate_off_policy(**HAND, horizon=2, q_taken=np.zeros(5), v_target=np.zeros(5))
    # IS and PDIS are means of per-episode terms: their SE is the standard error of the mean (scipy.stats.sem)
    assert out["IS"].se == pytest.approx(stats.sem([4 * 3, 2.5 * 3, 1.25 * 4]))  # ρ_H · G
    assert out["PDIS"].se == pytest.approx(stats.sem([2 * 1 + 4 * 2, 2 * 0 + 2.5 * 3, 1.25 * 4]))  # Σ_t ρ_t r_t
    assert out["DR"].se == pytest.approx(out["PDIS"].se)  # Q ≡ 0: DR is PDIS (Thomas & Brunskill 2016)
    # WIS by the ratio linearisation, by hand: V = 24.5/7.75, SE² = Σ ρ²(G − V)² / (Σρ)²
    v = 24.5 / 7.75
    expected = np.sqrt(16 * (3 - v) ** 2 + 6.25 * (3 - v) ** 2 + 1.5625 * (4 - v) ** 2) / 7.75
    assert out["WIS"].se == pytest.approx(expected)
    assert np.isnan(out["PDWIS"].se) and np.isnan(out["WDR"].se)  # no closed form here: use the bootstrap


def test_hand_worked_example_discounted():
    # γ = 0.9: discounted returns (1 + .9·2, 0 + .9·3, 4) = (2.8, 2.7, 4)
    out = evaluate_off_policy(**HAND, horizon=2, gamma=0.9)
    assert out["IS"].value == pytest.approx((4 * 2.8 + 2.5 * 2.7 + 1.25 * 4) / 3)
    assert out["PDWIS"].value == pytest.approx(7 / 5.25 + 0.9 * 15.5 / 7.75)


def test_weights_are_padded_as_absorbing():
    w = importance_weights(**{k: v for k, v in HAND.items()}, horizon=3)
    np.testing.assert_allclose(w.cumulative, [[2, 4, 4], [2, 2.5, 2.5], [1.25, 1.25, 1.25]])
    np.testing.assert_allclose(w.reward, [[1, 2, 0], [0, 3, 0], [4, 0, 0]])


# --------------------------------------------------------------------------------------------------------
# identities (METHODS.md, "Identities a test can assert")


@pytest.fixture(scope="module")
def log():
    return sm.sample_episodes(MDP, 500, seed=21)


def weights_for(log, target_proba):
    return importance_weights(
        log["step"],
        log["action"],
        log["reward"],
        log["episode"],
        log["behaviour_proba"],
        target_proba,
        horizon=sm.HORIZON,
    )


def episode_returns(log, gamma=1.0):
    return np.bincount(log["episode"], weights=log["reward"] * gamma ** log["step"])


@pytest.mark.parametrize("gamma", [1.0, 0.7])
def test_target_equal_to_usual_care_gives_unit_weights(log, gamma):
    out = evaluate_off_policy(
        log["step"],
        log["action"],
        log["reward"],
        log["episode"],
        log["behaviour_proba"],
        log["behaviour_proba"],
        horizon=sm.HORIZON,
        gamma=gamma,
    )
    mean_return = episode_returns(log, gamma).mean()
    n = log["episode"][-1] + 1
    for est in out.values():
        assert est.value == pytest.approx(mean_return, abs=1e-12)
        assert est.ess == pytest.approx(n) and est.ess_fraction == pytest.approx(1.0)
        assert est.per_step_ess == pytest.approx((n,) * sm.HORIZON)
        assert est.max_weight_share == pytest.approx(1 / n)
    assert np.all(weights_for(log, log["behaviour_proba"]).cumulative == 1.0)


def random_policy_rows(log, seed):
    proba = np.random.default_rng(seed).dirichlet(np.ones(sm.N_ACTIONS), size=(sm.HORIZON, sm.N_STATES))
    return sm.rows_proba(proba, log)


def test_doubly_robust_with_zero_q_is_per_decision_is(log):
    # Thomas & Brunskill (2016): with Q̂ ≡ 0 the control variate vanishes
    target = random_policy_rows(log, seed=1)
    zeros = np.zeros(log["step"].size)
    out = evaluate_off_policy(
        log["step"],
        log["action"],
        log["reward"],
        log["episode"],
        log["behaviour_proba"],
        target,
        horizon=sm.HORIZON,
        gamma=0.9,
        q_taken=zeros,
        v_target=zeros,
    )
    assert out["WDR"].value == pytest.approx(out["PDWIS"].value, abs=1e-12)
    assert out["DR"].value == pytest.approx(out["PDIS"].value, abs=1e-12)


def test_weighted_is_stays_in_the_range_of_returns(log):
    # WIS is a convex combination of the returns (Precup et al. 2000), whatever their signs
    returns = episode_returns(log)
    assert returns.min() < 0 < returns.max()
    for seed in range(20):
        value = weighted_trajectory_is(weights_for(log, random_policy_rows(log, seed))).value
        assert returns.min() <= value <= returns.max()


def test_per_decision_wis_can_leave_the_range_of_returns():
    # worked by hand: both returns are 1, but step 0 weights favour episode 0 (reward at step 0) and step 1
    # weights favour episode 1 (reward at step 1): PDWIS = (1.8·1)/2 + (0.4·1)/0.4 = 1.9, WIS = 1
    data = {
        "step": np.array([0, 1, 0, 1]),
        "action": np.array([0, 1, 0, 0]),
        "reward": np.array([1.0, 0.0, 0.0, 1.0]),
        "episode": np.array([0, 0, 1, 1]),
        "behaviour_proba": np.full((4, 2), 0.5),
        "target_proba": np.array([[0.9, 0.1], [1.0, 0.0], [0.1, 0.9], [1.0, 0.0]]),
    }
    w = importance_weights(**data, horizon=2)
    assert per_decision_wis(w).value == pytest.approx(1.9)
    assert weighted_trajectory_is(w).value == pytest.approx(1.0)


def test_per_decision_wis_bounds(log):
    # each step's term is a weighted mean of that step's rewards (zero once an episode has ended);
    # with rewards only at the last step and no early ends it equals WIS, hence lies in the range of returns
    for seed in range(10):
        w = weights_for(log, random_policy_rows(log, seed))
        value = per_decision_wis(w).value
        assert w.reward.min(axis=0).sum() <= value <= w.reward.max(axis=0).sum()
    full = np.flatnonzero(np.bincount(log["episode"]) == sm.HORIZON)
    rows = np.isin(log["episode"], full)
    last_only = {k: v[rows] for k, v in log.items()}
    last_only["episode"] = np.searchsorted(full, last_only["episode"])
    last_only["reward"] = np.where(last_only["step"] == sm.HORIZON - 1, last_only["reward"], 0.0)
    target = random_policy_rows(last_only, seed=5)
    w = weights_for(last_only, target)
    assert per_decision_wis(w).value == pytest.approx(weighted_trajectory_is(w).value, abs=1e-12)


# --------------------------------------------------------------------------------------------------------
# unbiasedness / consistency against the exact value of a fixed regime


def test_estimators_recover_the_exact_value_of_a_fixed_regime():
    """150 samples of 800 episodes: each estimator's mean is within 3 Monte Carlo standard errors of the
    exact value (backward evaluation on the true MDP).

    IS and PDIS are unbiased; DR is nearly so (Q̂ fitted on the same sample); WIS, PDWIS, WDR and FQE are
    consistent with a bias of order 1/n. The bias shrinks like 1/n while the standard error of the mean
    depends only on the total number of episodes, so fewer, larger samples keep it negligible: at 400
    episodes per sample a 6000-sample run put the bias of WIS and PDWIS near -0.01 (0.6-0.7 standard errors
    of a 300-sample mean), whereas at 800 episodes a 3000-sample run (seed 5) found every estimator's mean
    within 0.01 of the exact value, at most a third of the standard error of the 150-sample mean used here.
    About 21% of episodes follow the regime throughout.
    """
    regime = np.array([[0, 1, 2], [1, 2, 2], [0, 1, 1]])
    proba = sm.deterministic_proba(regime)
    _, v_exact = sm.evaluate_policy(MDP.transition, MDP.reward_mean, proba)
    exact = MDP.initial @ v_exact[0]
    big = sm.sample_episodes(MDP, 150 * 800, seed=2024)
    values = {name: [] for name in ("IS", "WIS", "PDIS", "PDWIS", "DR", "WDR", "FQE")}
    ses = {name: [] for name in ("IS", "WIS", "PDIS", "DR")}
    for sample in sm.split_samples(big, 800):
        out, fqe_value = sm.off_policy_estimates(sample, proba)
        values["FQE"].append(fqe_value)
        for name, est in out.items():
            values[name].append(est.value)
            if name in ses:
                ses[name].append(est.se)
    assert len(values["IS"]) == 150
    for name, vals in values.items():
        vals = np.asarray(vals)
        se = vals.std(ddof=1) / np.sqrt(vals.size)
        assert abs(vals.mean() - exact) < 3 * se, (name, vals.mean(), exact, se)
    # closed-form standard errors match the spread over repeated samples: the sd of 150 values is known to
    # about 1/sqrt(2·149) ≈ 6%, so 20% is more than 3 of its standard errors
    for name, se_values in ses.items():
        assert np.mean(se_values) == pytest.approx(np.std(values[name], ddof=1), rel=0.2), name


# --------------------------------------------------------------------------------------------------------
# results and errors


def test_result_is_json_ready():
    est = evaluate_off_policy(**HAND, horizon=2)["WIS"]
    text = json.dumps(est.to_dict(), allow_nan=False)
    back = json.loads(text)
    assert back["estimator"] == "WIS" and back["n_following"] == 2
    assert isinstance(back["per_step_ess"], list) and len(back["per_step_ess"]) == 2


def test_no_positive_weight_gives_nan_with_a_warning():
    never = HAND["target_proba"][:, ::-1].copy()  # the regime never takes the observed first actions
    with pytest.warns(StatisticalWarning, match="no episode has a positive"):
        out = evaluate_off_policy(**{**HAND, "target_proba": never}, horizon=2)
    assert np.isnan(out["WIS"].value) and np.isnan(out["PDWIS"].value)
    assert out["IS"].value == 0.0 and out["WIS"].ess == 0.0
    assert json.loads(json.dumps(out["WIS"].to_dict(), allow_nan=False))["value"] is None


@pytest.mark.parametrize(
    "change, message",
    [
        ({"behaviour_proba": np.array([[0.5, 0.5], [0.5, 0.5], [0.5, 0.5], [1.0, 0.0], [0.8, 0.2]])}, "is 0"),
        ({"reward": np.array([1.0, np.nan, 0.0, 3.0, 4.0])}, "missing"),
        ({"target_proba": np.ones((5, 3)) / 3}, "shape"),
        ({"target_proba": np.array([[1.0, 0.0]] * 4 + [[0.7, 0.7]])}, "not a probability"),
        ({"step": np.array([0, 2, 0, 1, 0])}, "step at row 1"),
        ({"reward": np.ones(4)}, "reward has 4"),
    ],
)
def test_bad_input_is_refused_with_a_clear_message(change, message):
    with pytest.raises(UserInputError, match=message):
        evaluate_off_policy(**{**HAND, **change}, horizon=2)


def test_a_taken_action_usual_care_cannot_take_is_named_by_its_label():
    # row 3 takes action code 1, which usual care gives probability 0 there
    behaviour = HAND["behaviour_proba"].copy()
    behaviour[3] = [1.0, 0.0]
    with pytest.raises(UserInputError, match="is 0") as err:
        evaluate_off_policy(**{**HAND, "behaviour_proba": behaviour}, horizon=2, action_labels=("hold", "step_up"))
    message = str(err.value)
    assert "taken action 'step_up'" in message and not re.search(r"action (code )?1\b", message), message
    with pytest.raises(UserInputError, match="taken action code 1 is 0"):  # without labels: the code, said so
        importance_weights(**{**HAND, "behaviour_proba": behaviour}, horizon=2)


def test_regime_outside_usual_care_support_is_flagged():
    behaviour = HAND["behaviour_proba"].copy()
    behaviour[0] = [1.0, 0.0]  # usual care never takes action 1 here
    target = HAND["target_proba"].copy()
    target[0] = [0.5, 0.5]
    with pytest.warns(StatisticalWarning, match="never takes"):
        importance_weights(**{**HAND, "behaviour_proba": behaviour, "target_proba": target}, horizon=2)


def test_wdr_needs_one_value_per_decision():
    w = importance_weights(**HAND, horizon=2)
    with pytest.raises(UserInputError, match="one value per decision"):
        weighted_doubly_robust(w, HAND_Q[:-1], HAND_V[:-1])


def test_complete_overlap_is_silent(log):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        per_decision_is(weights_for(log, random_policy_rows(log, seed=3)))


def test_a_layout_checked_once_gives_the_same_weights(log):
    # source: the same function checking the layout itself; a table checked once by check_layout (as
    # LoggedDecisions.from_frame does for all regimes) and passed with layout_checked gives identical weights
    target = sm.rows_proba(sm.deterministic_proba(np.zeros((sm.HORIZON, sm.N_STATES), dtype=int)), log)
    target = 0.5 * target + 0.5 * log["behaviour_proba"]
    table = (log["step"], log["action"], log["reward"], log["episode"])
    checked = check_layout(log["step"], log["action"], log["episode"], sm.HORIZON, sm.N_ACTIONS)
    common = dict(horizon=sm.HORIZON)
    again = importance_weights(*table, log["behaviour_proba"], target, **common)
    once = importance_weights(
        checked[0], checked[1], log["reward"], checked[2], log["behaviour_proba"], target, layout_checked=True, **common
    )
    assert np.array_equal(once.cumulative, again.cumulative) and np.array_equal(once.reward, again.reward)
    assert once.n_following == again.n_following and (once.cumulative != 1).any()


def test_weights_read_in_blocks_name_the_same_row_and_count_every_block(monkeypatch):
    # source: the hand-worked example read whole; in blocks of 2 rows the weights are identical, the refused row
    # is the table's row 3 (the second block's second row) and the warning counts the decisions of every block
    whole = importance_weights(**HAND, horizon=2)
    monkeypatch.setattr(ope, "WEIGHT_ROWS", 2)
    blocks = importance_weights(**HAND, horizon=2)
    assert np.array_equal(blocks.cumulative, whole.cumulative) and blocks.n_following == whole.n_following
    behaviour = HAND["behaviour_proba"].copy()
    behaviour[3] = [1.0, 0.0]
    with pytest.raises(UserInputError, match="row 3: usual care's probability"):
        importance_weights(**{**HAND, "behaviour_proba": behaviour}, horizon=2)
    behaviour = HAND["behaviour_proba"].copy()
    behaviour[[0, 2, 4]] = [1.0, 0.0]  # usual care never takes action 1 at rows 0, 2 and 4 (three blocks)
    target = HAND["target_proba"].copy()
    target[[0, 2, 4]] = [0.5, 0.5]
    with pytest.warns(StatisticalWarning, match="at 3 decisions"):
        importance_weights(**{**HAND, "behaviour_proba": behaviour, "target_proba": target}, horizon=2)
