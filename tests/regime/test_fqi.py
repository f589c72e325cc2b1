"""Fitted-Q iteration and fitted-Q evaluation against exact answers.

Sources of truth: exact backward induction on a small Markov decision process written out in
``tests/small_mdp.py`` (Puterman 1994, ch. 4), on the empirical process counted from the same sample
(a saturated linear Q-model reproduces cell means, so the two must agree to rounding), and scikit-learn's
LinearRegression / Ridge for the regression step with continuous features.
"""

import re
import warnings

import numpy as np
import pytest
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import LinearRegression, Ridge
from support import small_mdp as sm

from regimewise.core.arrays import next_row_index
from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.evaluation.fqe import FittedQEvaluation
from regimewise.regime.fqi import FittedQIteration, QLearningSettings
from regimewise.regime.qmodels import evaluate_policies, policy_average

MDP = sm.make_mdp()
GRID_STATE = np.tile(np.arange(sm.N_STATES), sm.HORIZON)  # every (step, state) pair once
GRID_STEP = np.repeat(np.arange(sm.HORIZON), sm.N_STATES)
GRID_X = np.eye(sm.N_STATES)[GRID_STATE]
GRID_BEHAVIOUR = MDP.behaviour[GRID_STEP, GRID_STATE]


@pytest.fixture(scope="module")
def log():
    return sm.sample_episodes(MDP, 2000, seed=11)


@pytest.fixture(scope="module")
def big_log():
    return sm.sample_episodes(MDP, 20_000, seed=12)


def fit_fqi(log, **kwargs):
    random_state = kwargs.pop("random_state", None)
    model = FittedQIteration(sm.N_ACTIONS, sm.HORIZON, QLearningSettings(**kwargs), random_state=random_state)
    return model.fit(log["X"], log["step"], log["action"], log["reward"], log["episode"], log["behaviour_proba"])


def fit_fqe(log, policy_proba, gamma=1.0):
    return FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON, gamma=gamma).fit(
        log["X"], log["step"], log["action"], log["reward"], log["episode"], sm.rows_proba(policy_proba, log)
    )


def grid_q(model):
    """Fitted Q (H, S, K) at every step and state."""
    return model.q_values(GRID_X, GRID_STEP).reshape(sm.HORIZON, sm.N_STATES, sm.N_ACTIONS)


def test_next_row_index_worked_example():
    # worked by hand: episodes [0, 0 | 1 | 2, 2, 2]
    assert next_row_index(np.array([0, 0, 1, 2, 2, 2])).tolist() == [1, -1, -1, 4, 5, -1]


def test_mdp_has_a_clear_optimal_action():
    # design requirement of small_mdp.py: optimal beats second best by > 0.9 everywhere (exact induction)
    q, _, _ = sm.backward_induction(MDP.transition, MDP.reward_mean)
    ordered = np.sort(q, axis=2)
    assert (ordered[..., -1] - ordered[..., -2]).min() > 0.9


@pytest.mark.parametrize("gamma", [1.0, 0.8])
def test_saturated_fqi_equals_induction_on_empirical_mdp(log, gamma):
    # source: exact backward induction on the empirical MDP (cell means and transition frequencies)
    initial, transition, reward_mean, counts = sm.empirical_mdp(log)
    assert counts.min() > 0  # every (step, state, action) cell observed, so every empirical Q is defined
    q_exact, v_exact, policy = sm.backward_induction(transition, reward_mean, gamma=gamma)
    model = fit_fqi(log, gamma=gamma, support_threshold=0.0)
    np.testing.assert_allclose(grid_q(model), q_exact, rtol=0, atol=1e-9)
    assert model.recommend(GRID_X, GRID_STEP, GRID_BEHAVIOUR).tolist() == policy.ravel().tolist()
    first = log["step"] == 0
    in_sample = model.predicted_value(log["X"][first], log["behaviour_proba"][first])
    assert in_sample == pytest.approx(initial @ v_exact[0], abs=1e-9)


def test_support_constrained_fqi_equals_constrained_induction(log):
    # source: backward induction on the empirical MDP restricted to actions with usual-care probability >= τ
    tau = 0.25
    _, transition, reward_mean, _ = sm.empirical_mdp(log)
    permitted = MDP.behaviour >= tau
    q_exact, _, policy = sm.backward_induction(
        transition, reward_mean, permitted=permitted, fallback=MDP.behaviour.argmax(axis=2)
    )
    model = fit_fqi(log, support_threshold=tau)
    np.testing.assert_allclose(grid_q(model), q_exact, rtol=0, atol=1e-9)
    assert model.recommend(GRID_X, GRID_STEP, GRID_BEHAVIOUR).tolist() == policy.ravel().tolist()
    # decisions changed by the filter: where the unconstrained best action of the exact Q differs
    changed_cells = q_exact.argmax(axis=2) != policy
    assert changed_cells.any()
    assert model.n_changed_by_support_ == int(changed_cells[log["step"], log["state"]].sum())


def test_fqe_equals_exact_evaluation_on_empirical_mdp(log):
    # source: exact policy evaluation on the empirical MDP, for a deterministic and a stochastic regime
    initial, transition, reward_mean, _ = sm.empirical_mdp(log)
    fixed = sm.deterministic_proba(np.array([[1, 0, 2], [2, 1, 0], [0, 0, 1]]))
    mixture = 0.3 * fixed + 0.7 * MDP.behaviour  # a stochastic regime: partial adoption of ``fixed``
    for policy_proba in (fixed, MDP.behaviour, mixture):
        for gamma in (1.0, 0.9):
            q_exact, v_exact = sm.evaluate_policy(transition, reward_mean, policy_proba, gamma=gamma)
            model = fit_fqe(log, policy_proba, gamma=gamma)
            np.testing.assert_allclose(grid_q(model), q_exact, rtol=0, atol=1e-9)
            first = log["step"] == 0
            value = model.value_estimate(log["X"][first], sm.rows_proba(policy_proba, log)[first])
            assert value == pytest.approx(initial @ v_exact[0], abs=1e-9)


def test_large_sample_recovers_the_optimal_policy(big_log):
    # source: exact backward induction on the true MDP, unconstrained and with support threshold 0.25
    _, _, optimal = sm.backward_induction(MDP.transition, MDP.reward_mean)
    model = fit_fqi(big_log, support_threshold=0.0)
    assert model.recommend(GRID_X, GRID_STEP, GRID_BEHAVIOUR).tolist() == optimal.ravel().tolist()
    permitted = MDP.behaviour >= 0.25
    _, _, constrained = sm.backward_induction(
        MDP.transition, MDP.reward_mean, permitted=permitted, fallback=MDP.behaviour.argmax(axis=2)
    )
    model = fit_fqi(big_log, support_threshold=0.25)
    assert model.recommend(GRID_X, GRID_STEP, GRID_BEHAVIOUR).tolist() == constrained.ravel().tolist()


def test_zero_threshold_changes_nothing(log):
    # τ = 0 is plain Q-learning (METHODS.md): the filter never binds
    model = fit_fqi(log, support_threshold=0.0)
    assert model.n_changed_by_support_ == 0
    assert model.n_without_permitted_action_ == 0
    q = model.q_values(log["X"], log["step"])
    np.testing.assert_array_equal(model.recommend(log["X"], log["step"], log["behaviour_proba"]), q.argmax(axis=1))


def test_threshold_above_one_reproduces_usual_care(log):
    # τ > 1 permits nothing, so the regime is usual care's most likely action (METHODS.md)
    model = fit_fqi(log, support_threshold=1.01)
    chosen = model.recommend(log["X"], log["step"], log["behaviour_proba"])
    np.testing.assert_array_equal(chosen, log["behaviour_proba"].argmax(axis=1))
    assert model.n_without_permitted_action_ == log["step"].size
    np.testing.assert_array_equal(
        model.recommend_proba(log["X"], log["step"], log["behaviour_proba"]).argmax(axis=1), chosen
    )


def _two_step_continuous(seed=3, n=300):
    rng = np.random.default_rng(seed)
    x0 = rng.normal(size=(n, 2))
    x1 = x0 + rng.normal(size=(n, 2))
    a = rng.integers(0, 2, size=(n, 2))
    r0 = x0[:, 0] * (2 * a[:, 0] - 1) + rng.normal(size=n)
    r1 = (x1[:, 1] - 0.5) * (2 * a[:, 1] - 1) + rng.normal(size=n)

    def interleave(u, v):
        return np.stack([u, v], axis=1).reshape(2 * n, *u.shape[1:])

    return {
        "X": interleave(x0, x1),
        "step": np.tile([0, 1], n),
        "action": a.ravel(),
        "reward": interleave(r0, r1),
        "episode": np.repeat(np.arange(n), 2),
        "behaviour_proba": np.full((2 * n, 2), 0.5),
        "parts": (x0, x1, a, r0, r1),
    }


@pytest.mark.parametrize("alpha", [0.0, 2.5])
def test_continuous_features_match_sklearn_two_step_q_learning(alpha):
    # source: scikit-learn LinearRegression / Ridge (unpenalised intercept) fitted per step and action,
    # stage-wise as in Murphy (2005) / Chakraborty & Moodie (2013, ch. 3), gamma = 0.9
    data = _two_step_continuous()
    x0, x1, a, r0, r1 = data["parts"]
    regression = (lambda: LinearRegression()) if alpha == 0 else (lambda: Ridge(alpha=alpha))
    last = [regression().fit(x1[a[:, 1] == k], r1[a[:, 1] == k]) for k in range(2)]
    best_next = np.max([m.predict(x1) for m in last], axis=0)
    pseudo = r0 + 0.9 * best_next
    first = [regression().fit(x0[a[:, 0] == k], pseudo[a[:, 0] == k]) for k in range(2)]
    model = FittedQIteration(2, 2, QLearningSettings(gamma=0.9, support_threshold=0.0, alpha=alpha)).fit(
        data["X"], data["step"], data["action"], data["reward"], data["episode"], data["behaviour_proba"]
    )
    for t, models, x in ((0, first, x0), (1, last, x1)):
        expected = np.column_stack([m.predict(x) for m in models])
        np.testing.assert_allclose(model.q_values(x, np.full(len(x), t)), expected, rtol=0, atol=1e-8)
        for k, m in enumerate(models):
            np.testing.assert_allclose(model.coef_[t, k], np.r_[m.intercept_, m.coef_], atol=1e-8)


@pytest.mark.parametrize("alpha", [0.0, 2.5])
def test_fitted_q_evaluation_matches_sklearn_ridge_for_a_fixed_regime(alpha):
    # source: scikit-learn LinearRegression / Ridge (unpenalised intercept) per step and action; the first-step
    # pseudo-outcome is r0 + γ·Q̂_1(x1, π(x1)) for the evaluated regime π (Le, Voloshin & Yue 2019), γ = 0.9;
    # the regime: action 1 where the second state is positive
    data = _two_step_continuous()
    x0, x1, a, r0, r1 = data["parts"]
    regression = (lambda: LinearRegression()) if alpha == 0 else (lambda: Ridge(alpha=alpha))
    pi0, pi1 = (x0[:, 1] > 0).astype(int), (x1[:, 1] > 0).astype(int)
    last = [regression().fit(x1[a[:, 1] == k], r1[a[:, 1] == k]) for k in range(2)]
    q1 = np.column_stack([m.predict(x1) for m in last])
    pseudo = r0 + 0.9 * q1[np.arange(len(x1)), pi1]
    first = [regression().fit(x0[a[:, 0] == k], pseudo[a[:, 0] == k]) for k in range(2)]
    q0 = np.column_stack([m.predict(x0) for m in first])
    target = np.eye(2)[np.column_stack([pi0, pi1]).ravel()]
    model = FittedQEvaluation(2, 2, gamma=0.9, alpha=alpha).fit(
        data["X"], data["step"], data["action"], data["reward"], data["episode"], target
    )
    np.testing.assert_allclose(model.q_values(x1, np.ones(len(x1), dtype=int)), q1, rtol=0, atol=1e-8)
    np.testing.assert_allclose(model.q_values(x0, np.zeros(len(x0), dtype=int)), q0, rtol=0, atol=1e-8)
    assert model.value_estimate(x0, np.eye(2)[pi0]) == pytest.approx(q0[np.arange(len(x0)), pi0].mean(), abs=1e-8)


@pytest.fixture(scope="module")
def without_action(log):
    """The log without the episodes that take action 2 at step 1."""
    drop = (log["step"] == 1) & (log["action"] == 2)
    keep_episodes = np.unique(log["episode"][~np.isin(log["episode"], log["episode"][drop])])
    sub = {k: v[np.isin(log["episode"], keep_episodes)] for k, v in log.items()}
    sub["episode"] = np.searchsorted(keep_episodes, sub["episode"])
    return sub


def test_action_missing_at_a_step_is_never_recommended(without_action):
    # an action without rows at a step has no Q there: marked, warned about, never chosen
    sub = without_action
    with pytest.warns(StatisticalWarning, match="step 1 action code 2"):
        model = fit_fqi(sub, support_threshold=0.0)
    assert not model.fitted_actions_[1, 2] and model.fitted_actions_.sum() == sm.HORIZON * sm.N_ACTIONS - 1
    q = model.q_values(GRID_X, GRID_STEP)
    assert np.isnan(q[GRID_STEP == 1, 2]).all() and not np.isnan(q[GRID_STEP != 1]).any()
    favour_missing = np.tile([0.0, 0.0, 1.0], (GRID_X.shape[0], 1))  # usual care would take action 2
    assert not np.any(model.recommend(GRID_X, GRID_STEP, favour_missing)[GRID_STEP == 1] == 2)
    with pytest.raises(UserInputError, match="never occurs"):
        FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON).fit(
            sub["X"], sub["step"], sub["action"], sub["reward"], sub["episode"], np.full((len(sub["step"]), 3), 1 / 3)
        )


LABELS = ("hold", "step_up", "add_agent")  # made-up labels of the small MDP's three action codes


def _names_the_label_only(message):
    """The message names action code 2 by its label 'add_agent', never by the bare code."""
    assert "action 'add_agent'" in message, message
    assert not re.search(r"action (code )?2\b", message), message


def test_messages_name_the_missing_action_by_its_label(without_action):
    sub = without_action
    table = (sub["X"], sub["step"], sub["action"], sub["reward"], sub["episode"])
    uniform = np.full((len(sub["step"]), 3), 1 / 3)
    settings = QLearningSettings(support_threshold=0.0)
    with pytest.warns(StatisticalWarning, match="no decisions with") as caught:
        FittedQIteration(sm.N_ACTIONS, sm.HORIZON, settings, action_labels=LABELS).fit(*table, uniform)
    _names_the_label_only(" ".join(str(w.message) for w in caught))
    avoid = np.tile([0.5, 0.5, 0.0], (len(sub["step"]), 1))  # a regime that never takes the missing action
    with pytest.warns(StatisticalWarning, match="no decisions with") as caught:
        FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON, action_labels=LABELS).fit(*table, avoid)
    _names_the_label_only(" ".join(str(w.message) for w in caught))
    with pytest.raises(UserInputError, match="never occurs") as err:
        FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON, action_labels=LABELS).fit(*table, uniform)
    _names_the_label_only(str(err.value))
    (batched,) = evaluate_policies(
        *table, [uniform], horizon=sm.HORIZON, n_actions=sm.N_ACTIONS, gamma=1.0, alpha=0.0, action_labels=LABELS
    )
    assert isinstance(batched, UserInputError)
    _names_the_label_only(str(batched))
    q = np.array([[1.0, 2.0, np.nan]])
    with pytest.raises(UserInputError, match="never occurs") as err:
        policy_average(q, np.array([[0.5, 0.0, 0.5]]), LABELS)
    _names_the_label_only(str(err.value))
    assert policy_average(q, np.array([[0.5, 0.5, 0.0]]), LABELS)[0] == 1.5  # by hand: .5·1 + .5·2


def test_action_labels_must_match_the_actions(log):
    with pytest.raises(UserInputError, match="action_labels has 2 labels for 3 actions"):
        FittedQEvaluation(sm.N_ACTIONS, sm.HORIZON, action_labels=LABELS[:2]).fit(
            log["X"], log["step"], log["action"], log["reward"], log["episode"], log["behaviour_proba"]
        )


def test_unfitted_model_raises():
    with pytest.raises(NotFittedError):
        FittedQIteration(2, 2).recommend(np.zeros((1, 1)), [0], [[0.5, 0.5]])
    with pytest.raises(NotFittedError):
        FittedQEvaluation(2, 2).value_estimate(np.zeros((1, 1)), [[0.5, 0.5]])


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda d: d.update(step=d["step"][::-1].copy()), "step at row"),
        (lambda d: d.update(episode=d["episode"] + 1), "episode codes"),
        (lambda d: d["X"].__setitem__((3, 0), np.nan), "X has a missing"),
        (lambda d: d.update(behaviour_proba=d["behaviour_proba"][:, :2]), "shape"),
        (lambda d: d.update(action=d["action"] + 5), "action at row"),
        (lambda d: d.update(reward=d["reward"][:-1]), "reward"),
    ],
)
def test_bad_input_is_refused_with_a_clear_message(log, change, message):
    data = {k: v[:30].copy() for k, v in log.items()}
    change(data)
    with pytest.raises(UserInputError, match=message):
        fit_fqi(data)


def test_fitted_model_is_silent_on_complete_data(log):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit_fqi(log)
