"""Learning modes, Q-models, clinical-rule masks and pessimism of fitted-Q iteration, against exact answers.

Sources of truth: exact backward induction on the small Markov decision process of ``tests/small_mdp.py`` and on
the empirical process counted from a sample (Puterman 1994, ch. 4; a saturated Q-model reproduces cell means,
so fitted-Q iteration must equal induction on the empirical process to rounding); scikit-learn's Ridge,
LinearRegression, cross_val_predict and HistGradientBoostingRegressor for the regression steps.
"""

import warnings

import numpy as np
import pytest
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.linear_model import LinearRegression, Ridge
from sklearn.model_selection import PredefinedSplit, cross_val_predict
from support import small_mdp as sm

from regimewise.core.folds import patient_folds
from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.evaluation.fqe import FittedQEvaluation
from regimewise.regime import pessimism, qmodels
from regimewise.regime.fqi import FittedQIteration, QLearningSettings
from regimewise.regime.permitted import constrained_choice
from regimewise.regime.pessimism import PessimisticEnsemble, patient_bootstrap_weights, patient_resamples
from regimewise.regime.qmodels import (
    LinearActionModel,
    choose_ridge_alpha,
    out_of_fold_errors,
)

MDP = sm.make_mdp()
GRID_STEP = np.repeat(np.arange(sm.HORIZON), sm.N_STATES)
GRID_STATE = np.tile(np.arange(sm.N_STATES), sm.HORIZON)
GRID_BEHAVIOUR = MDP.behaviour[GRID_STEP, GRID_STATE]
# saturated features: one indicator per (step, state) cell, so a pooled model is as flexible as per-step ones
SATURATED = np.eye(sm.HORIZON * sm.N_STATES)
GRID_SAT = SATURATED[GRID_STEP * sm.N_STATES + GRID_STATE]
# a clinical rule on the small process, written out by hand: action 2 is forbidden in state 1, action 1 in state 2
RULES = np.ones((sm.N_STATES, sm.N_ACTIONS), dtype=bool)
RULES[1, 2] = RULES[2, 1] = False


@pytest.fixture(scope="module")
def log():
    data = sm.sample_episodes(MDP, 2000, seed=11)
    data["sat"] = SATURATED[data["step"] * sm.N_STATES + data["state"]]
    data["rules"] = RULES[data["state"]]
    return data


def fit(log, X="sat", rules=None, **kwargs):
    random_state = kwargs.pop("random_state", None)
    model = FittedQIteration(sm.N_ACTIONS, sm.HORIZON, QLearningSettings(**kwargs), random_state=random_state)
    return model.fit(
        log[X],
        log["step"],
        log["action"],
        log["reward"],
        log["episode"],
        log["behaviour_proba"],
        rule_permitted=None if rules is None else log["rules"],
    )


def grid_q(model):
    return model.q_values(GRID_SAT, GRID_STEP).reshape(sm.HORIZON, sm.N_STATES, sm.N_ACTIONS)


def grid_policy(model, rules=False):
    permitted = RULES[GRID_STATE] if rules else None
    return model.recommend(GRID_SAT, GRID_STEP, GRID_BEHAVIOUR, permitted).reshape(sm.HORIZON, sm.N_STATES)


def rule_fallback():
    """Usual care's most likely action among the rule-permitted ones, per step and state."""
    return np.where(RULES[None], MDP.behaviour, -np.inf).argmax(axis=2)


@pytest.mark.parametrize("mode", ["backward", "pooled"])
@pytest.mark.parametrize("gamma", [1.0, 0.8])
def test_both_modes_equal_exact_induction_with_saturated_features(log, mode, gamma):
    # source: exact backward induction on the empirical MDP (Puterman 1994, ch. 4)
    _, transition, reward_mean, counts = sm.empirical_mdp(log)
    assert counts.min() > 0
    q_exact, _, policy = sm.backward_induction(transition, reward_mean, gamma=gamma)
    model = fit(log, gamma=gamma, support_threshold=0.0, mode=mode)
    np.testing.assert_allclose(grid_q(model), q_exact, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(grid_policy(model), policy)
    assert model.converged_
    if mode == "pooled":  # a finite horizon of 3 settles after 3 fits: targets of step 2, 1, then 0 are final
        assert model.n_iterations_ == sm.HORIZON


@pytest.mark.parametrize("mode", ["backward", "pooled"])
def test_rules_and_support_equal_constrained_induction(log, mode):
    # source: exact induction restricted to rule-permitted actions with usual-care probability >= τ, with the
    # fallback "most likely rule-permitted usual-care action" where nothing is permitted
    tau = 0.25
    _, transition, reward_mean, _ = sm.empirical_mdp(log)
    permitted = RULES[None] & (MDP.behaviour >= tau)
    assert (~permitted.any(axis=2)).any()  # the fallback is exercised somewhere
    q_exact, _, policy = sm.backward_induction(transition, reward_mean, permitted=permitted, fallback=rule_fallback())
    model = fit(log, rules=True, support_threshold=tau, mode=mode)
    np.testing.assert_allclose(grid_q(model), q_exact, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(grid_policy(model, rules=True), policy)
    empty = ~permitted[log["step"], log["state"]].any(axis=1)
    assert model.n_without_permitted_action_ == int(empty.sum())


@pytest.mark.parametrize("mode", ["backward", "pooled"])
def test_zero_threshold_changes_nothing(log, mode):
    # τ = 0 is plain Q-learning (METHODS.md): the support filter never binds
    model = fit(log, support_threshold=0.0, mode=mode)
    assert model.n_changed_by_support_ == 0 and model.n_without_permitted_action_ == 0
    q = model.q_values(log["sat"], log["step"])
    np.testing.assert_array_equal(model.recommend(log["sat"], log["step"], log["behaviour_proba"]), q.argmax(axis=1))


@pytest.mark.parametrize("mode", ["backward", "pooled"])
def test_very_high_threshold_gives_usual_cares_most_likely_action(log, mode):
    # τ > 1 permits nothing: the regime is usual care's most likely action (with rules: most likely permitted one)
    model = fit(log, support_threshold=1.01, mode=mode)
    chosen = model.recommend(log["sat"], log["step"], log["behaviour_proba"])
    np.testing.assert_array_equal(chosen, log["behaviour_proba"].argmax(axis=1))
    ruled = fit(log, rules=True, support_threshold=1.01, mode=mode)
    chosen = ruled.recommend(log["sat"], log["step"], log["behaviour_proba"], log["rules"])
    np.testing.assert_array_equal(chosen, rule_fallback()[log["step"], log["state"]])


@pytest.mark.parametrize("mode", ["backward", "pooled"])
def test_pessimism_with_k_zero_equals_the_plain_regime(log, mode):
    # k = 0: the ensemble is fitted (20 bootstrap models) but the ranking is the full-sample Q, exactly
    plain = fit(log, X="X", support_threshold=0.1, mode=mode, rules=True)
    zero = fit(log, X="X", support_threshold=0.1, mode=mode, rules=True, pessimism=0.0, ensemble_size=5, random_state=3)
    args = (log["X"], log["step"], log["behaviour_proba"], log["rules"])
    np.testing.assert_array_equal(zero.recommend(*args), plain.recommend(*args))
    np.testing.assert_array_equal(zero.q_values(log["X"], log["step"]), plain.q_values(log["X"], log["step"]))


def test_pessimism_penalises_uncertain_actions(log):
    # the score is Q minus k bootstrap SDs: never above Q, and strictly below where the spread is positive
    model = fit(log, X="X", support_threshold=0.0, pessimism=2.0, ensemble_size=8, random_state=5)
    q, score = model.q_values(log["X"], log["step"]), model.scores(log["X"], log["step"])
    assert np.all(score <= q) and np.mean(score < q) > 0.99


@pytest.mark.parametrize(("mode", "pessimism"), [("backward", None), ("backward", 1.0), ("pooled", None)])
def test_record_choice_is_the_recommendation_at_the_records(log, mode, pessimism):
    # exact: the fit keeps its choices at the training decisions, which the regime stage reads instead of
    # calling recommend on the same table again; both must be the same codes
    model = fit(log, rules=True, mode=mode, pessimism=pessimism, ensemble_size=5, random_state=3)
    expected = model.recommend(log["sat"], log["step"], log["behaviour_proba"], log["rules"])
    np.testing.assert_array_equal(model.record_choice_, expected)


def test_bootstrap_spread_matches_sklearn_refits():
    # source: scikit-learn LinearRegression with sample_weight = bootstrap multiplicities, refitted by hand
    rng = np.random.default_rng(2)
    X = rng.normal(size=(120, 2))
    action = rng.integers(0, 2, 120)
    y = X[:, 0] * (1 + action) + rng.normal(size=120)
    groups = np.repeat(np.arange(40), 3)
    weights = patient_bootstrap_weights(groups, 6, seed=9)
    assert np.all(weights.reshape(6, 40, 3).std(axis=2) == 0)  # a patient's rows move together
    np.testing.assert_array_equal(weights.reshape(6, 40, 3)[..., 0].sum(axis=1), 40)  # n patients per resample
    resamples = patient_resamples(groups, 6, seed=9)  # the same draws, kept per patient
    ens = PessimisticEnsemble(lambda: LinearActionModel(2), resamples, k=1.5).fit(X, action, y, np.arange(120))
    manual = np.stack(
        [
            np.column_stack(
                [
                    LinearRegression().fit(X[action == a], y[action == a], sample_weight=w[action == a]).predict(X)
                    for a in range(2)
                ]
            )
            for w in weights
        ]
    )
    np.testing.assert_allclose(ens.spread(X), manual.std(axis=0, ddof=1), atol=1e-9)
    full = np.column_stack([LinearRegression().fit(X[action == a], y[action == a]).predict(X) for a in range(2)])
    np.testing.assert_allclose(ens.score(X), full - 1.5 * manual.std(axis=0, ddof=1), atol=1e-9)


def _one_action_data(seed=4, n=200):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    y = X @ np.array([1.0, -0.5, 0.0]) + rng.normal(size=n)
    return X, np.zeros(n, dtype=np.int64), y, patient_folds(np.arange(n) // 2, 4, seed=1)


def test_out_of_fold_error_matches_sklearn_cross_val_predict():
    # source: scikit-learn cross_val_predict with the same predefined folds
    X, action, y, folds = _one_action_data()
    ours = out_of_fold_errors(lambda: LinearActionModel(1, 0.0), X, action, y, folds)
    theirs = cross_val_predict(LinearRegression(), X, y, cv=PredefinedSplit(folds))
    np.testing.assert_allclose(ours, (theirs - y) ** 2, atol=1e-10)


def test_ridge_penalty_by_cross_validation_matches_sklearn():
    # source: scikit-learn Ridge (unpenalised intercept) out-of-fold predictions for each candidate penalty
    X, action, y, folds = _one_action_data()
    X = np.column_stack([X, X[:, :2] + 0.01 * np.random.default_rng(0).normal(size=(X.shape[0], 2))])  # collinear
    grid = [0.0, 0.3, 3.0, 30.0, 300.0]
    expected = [np.mean((cross_val_predict(Ridge(alpha=a), X, y, cv=PredefinedSplit(folds)) - y) ** 2) for a in grid]
    assert choose_ridge_alpha(1, grid, X, action, y, folds) == grid[int(np.argmin(expected))]
    assert patient_folds(np.arange(200) // 2, 4, seed=1).reshape(100, 2).std(axis=1).max() == 0  # folds by patient


def test_cv_penalty_is_used_per_step(log):
    model = fit(log, X="X", alpha="cv", alpha_grid=(0.0, 1.0, 100.0), support_threshold=0.0, oof_error=True)
    assert len(model.alpha_) == sm.HORIZON and set(model.alpha_) <= {0.0, 1.0, 100.0}
    assert sorted(model.oof_mse_) == [0, 1, 2] and all(v > 0 for v in model.oof_mse_.values())


def test_gradient_boosting_q_model_matches_sklearn_on_one_step():
    # source: scikit-learn HistGradientBoostingRegressor on [state, one-hot action], early stopping off
    rng = np.random.default_rng(8)
    X = rng.normal(size=(400, 2))
    action = rng.integers(0, 3, 400)
    y = np.where(action == 1, X[:, 0], -X[:, 1]) + 0.1 * rng.normal(size=400)
    params = {"max_iter": 30, "max_leaf_nodes": 7, "min_samples_leaf": 10}
    model = FittedQIteration(
        3,
        1,
        QLearningSettings(support_threshold=0.0, q_model="gradient_boosting", boosting_params=params),
        random_state=1,
    ).fit(X, np.zeros(400), action, y, np.arange(400), np.full((400, 3), 1 / 3))
    reference = HistGradientBoostingRegressor(early_stopping=False, random_state=model._model_seed, **params)
    reference.fit(np.hstack([X, np.eye(3)[action]]), y)
    expected = np.column_stack([reference.predict(np.hstack([X, np.tile(np.eye(3)[a], (400, 1))])) for a in range(3)])
    np.testing.assert_allclose(model.q_values(X, np.zeros(400, dtype=int)), expected, atol=1e-12)


def test_pooled_mode_warns_when_not_converged(log):
    with pytest.warns(StatisticalWarning, match="stopped after 1 iterations"):
        model = fit(log, support_threshold=0.0, mode="pooled", max_iterations=1)
    assert not model.converged_


def test_constrained_choice_worked_example():
    # worked by hand: row 0 best permitted is 1; row 1 nothing permitted -> most likely rule-permitted (2);
    # row 2 the rules forbid everything -> most likely fitted action (0), also as the "unconstrained" choice
    score = np.array([[5.0, 3.0, 1.0], [5.0, 3.0, 1.0], [1.0, 2.0, np.nan]])
    proba = np.array([[0.5, 0.4, 0.1], [0.7, 0.29, 0.01], [0.6, 0.3, 0.1]])
    rules = np.array([[False, True, True], [False, False, True], [False, False, False]])
    choice, unconstrained, none = constrained_choice(score, proba, 0.05, rules)
    assert choice.tolist() == [1, 2, 0] and none.tolist() == [False, True, True]
    assert unconstrained.tolist() == [1, 2, 0]


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"mode": "sideways"}, "mode"),
        ({"q_model": "forest"}, "q_model"),
        ({"alpha": "auto"}, "alpha"),
        ({"pessimism": -1.0}, "pessimism"),
        ({"alpha": "cv", "q_model": "gradient_boosting"}, "linear Q-model"),
    ],
)
def test_bad_settings_are_refused(log, kwargs, message):
    with pytest.raises(UserInputError, match=message):
        fit(log, **kwargs)


def test_bad_rule_mask_is_refused(log):
    with pytest.raises(UserInputError, match="rule_permitted"):
        FittedQIteration(3, 3).fit(
            log["X"],
            log["step"],
            log["action"],
            log["reward"],
            log["episode"],
            log["behaviour_proba"],
            rule_permitted=np.ones((3, 3), dtype=bool),
        )


def test_new_learner_is_silent_on_complete_data(log):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fit(log, X="X", mode="pooled", rules=True)


def test_spread_in_blocks_equals_one_pass(monkeypatch):
    # exact computation: numpy.nanstd over every replicate's predictions at once, against the blocked spread,
    # also with an action missing from some resamples (NaN draws)
    rng = np.random.default_rng(6)
    X = rng.normal(size=(500, 3))
    action = rng.integers(0, 3, 500)
    action[:2] = 2  # action 2 only on the first patient's rows: absent from most resamples
    action[2:][action[2:] == 2] = 1
    y = X[:, 0] + action + rng.normal(size=500)
    resamples = patient_resamples(np.repeat(np.arange(250), 2), 10, seed=3)
    ens = PessimisticEnsemble(lambda: LinearActionModel(3), resamples, k=1.0).fit(X, action, y, np.arange(500))
    draws = np.stack([m.predict(X) for m in ens.replicates_])
    defined = (~np.isnan(draws)).sum(axis=0)
    with np.errstate(invalid="ignore"):
        expected = np.where(defined >= 2, np.nanstd(np.where(defined >= 2, draws, 0.0), axis=0, ddof=1), 0.0)
    monkeypatch.setattr(pessimism, "SPREAD_BLOCK_ROWS", 64)
    np.testing.assert_array_equal(ens.spread(X), expected)
    np.testing.assert_array_equal(ens.spread(X[:, :]), ens.spread(X[::-1])[::-1])


def test_q_values_in_row_blocks_equal_one_pass(monkeypatch):
    # exact computation: the per-row einsum over coef_[step] on all rows at once, against the blocked q_values
    rng = np.random.default_rng(8)
    n_episodes, horizon = 60, 3
    X = rng.normal(size=(n_episodes * horizon, 2))
    step = np.tile(np.arange(horizon), n_episodes)
    episode = np.repeat(np.arange(n_episodes), horizon)
    action = rng.integers(0, 2, step.size)
    reward = X[:, 0] * action + rng.normal(size=step.size)
    fqe = FittedQEvaluation(2, horizon, alpha=1.0).fit(X, step, action, reward, episode, np.full((step.size, 2), 0.5))
    design = np.hstack([np.ones((step.size, 1)), X])
    expected = np.einsum("nkp,np->nk", fqe.coef_[step], design)
    monkeypatch.setattr(qmodels, "Q_BLOCK_ROWS", 7)
    np.testing.assert_array_equal(fqe.q_values(X, step), expected)
