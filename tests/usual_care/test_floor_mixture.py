"""The usual-care model with an even floor (a multinomial logit mixed with a share spread evenly over the actions),
checked against scipy's numerical derivatives and general-purpose optimiser, statsmodels' plain logit, and data
simulated from the model with known parameters."""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.optimize import approx_fprime, minimize
from scipy.special import softmax
from scipy.stats import chi2

from regimewise.errors import UserInputError
from regimewise.protocol import load_protocol
from regimewise.usual_care.logit import MultinomialLogitBehaviour
from regimewise.usual_care.mixture import FloorMixtureLogitBehaviour, _mixture_pass, boundary_p_value

BETA = np.array([[-0.5, 0.3], [1.5, -1.0], [0.0, 2.0]])  # intercepts, then two covariates; classes 1 and 2


def _simulate(n, share, seed):
    """Actions from the mixture (1 - share) softmax(x'β) + share / 3 over three actions, class 0 the reference."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    linear = np.column_stack([np.zeros(n), BETA[0] + X @ BETA[1:]])
    proba = (1.0 - share) * softmax(linear, axis=1) + share / 3.0
    action = (rng.random(n)[:, None] > np.cumsum(proba, axis=1)).sum(axis=1)
    return X, action, proba


def _negative_log_likelihood(theta, X, action):
    """The mixture's likelihood written out independently of the package, for scipy's optimiser."""
    beta = theta[:-1].reshape(3, 2)
    share = 1.0 / (1.0 + np.exp(-theta[-1]))
    linear = np.column_stack([np.zeros(len(X)), beta[0] + X @ beta[1:]])
    proba = (1.0 - share) * softmax(linear, axis=1) + share / 3.0
    return -np.log(proba[np.arange(len(X)), action]).sum()


def test_score_and_hessian_match_numerical_derivatives():
    # Reference: central differences of the log-likelihood and of the score by scipy.optimize.approx_fprime.
    rng = np.random.default_rng(1)
    design = np.column_stack([np.ones(400), rng.normal(size=(400, 3))])
    endog = rng.integers(0, 3, 400)
    params, z = rng.normal(size=(4, 2)) * 0.5, -1.2
    _, score, hessian = _mixture_pass(design, params, z, endog, 3)
    theta = np.append(params.T.ravel(), z)

    def unpack(v):
        return v[:-1].reshape(2, 4).T, v[-1]

    numeric_score = approx_fprime(theta, lambda v: _mixture_pass(design, *unpack(v), endog, 3)[0], 1e-6)
    np.testing.assert_allclose(score, numeric_score, rtol=1e-5, atol=1e-4)
    numeric_hessian = np.array(
        [approx_fprime(theta, lambda v, i=i: _mixture_pass(design, *unpack(v), endog, 3)[1][i], 1e-6) for i in range(9)]
    )
    np.testing.assert_allclose(hessian, numeric_hessian, rtol=1e-5, atol=1e-4)


def test_maximum_matches_scipy_optimiser():
    # Reference: the same likelihood, written independently, maximised by scipy's BFGS from the truth.
    X, action, _ = _simulate(3000, 0.15, seed=2)
    model = FloorMixtureLogitBehaviour().fit(X, action, n_actions=3)
    start = np.append(BETA.ravel(), np.log(0.15 / 0.85))
    reference = minimize(_negative_log_likelihood, start, args=(X, action), method="BFGS", options={"gtol": 1e-8})
    assert reference.success
    assert model.converged_
    np.testing.assert_allclose(model.llf_, -reference.fun, rtol=1e-9)
    np.testing.assert_allclose(model.params_, reference.x[:-1].reshape(3, 2), atol=2e-4)
    np.testing.assert_allclose(model.share_, 1.0 / (1.0 + np.exp(-reference.x[-1])), atol=2e-5)


def test_recovers_the_share_and_probabilities_of_simulated_data():
    # Known truth: 40,000 draws from the model with share 0.2. Tolerances are ours (about 4 standard errors).
    X, action, proba = _simulate(40_000, 0.2, seed=3)
    model = FloorMixtureLogitBehaviour().fit(X, action, n_actions=3)
    assert abs(model.share_ - 0.2) < 0.03
    assert model.floor_ == pytest.approx(model.share_ / 3)
    assert np.abs(model.predict_proba(X) - proba).mean() < 0.01
    plain = MultinomialLogitBehaviour().fit(X, action, n_actions=3)
    assert np.abs(model.predict_proba(X) - proba).mean() < np.abs(plain.predict_proba(X) - proba).mean()
    assert model.p_value_ < 1e-10


def test_without_a_floor_it_stays_near_the_plain_logit():
    # Reference: statsmodels' MNLogit on data with no floor (share 0). The share 0 is nested, so the mixture's
    # log-likelihood is at least the plain logit's, and the boundary test rarely rejects.
    X, action, _ = _simulate(4000, 0.0, seed=4)
    model = FloorMixtureLogitBehaviour().fit(X, action, n_actions=3)
    reference = sm.MNLogit(action, sm.add_constant(X)).fit(disp=0)
    assert model.logit_llf_ == pytest.approx(reference.llf, rel=1e-9)
    assert model.llf_ >= model.logit_llf_
    assert model.share_ < 0.03
    np.testing.assert_allclose(model.params_, reference.params, atol=0.15)
    assert model.p_value_ > 0.01


def test_boundary_p_value_against_chi_squared():
    # Self & Liang 1987, case 1: the 50:50 mixture of chi2(0) and chi2(1); its 5% critical value is chi2(1)'s 10%
    # point, 2.7055 (scipy.stats.chi2.ppf(0.9, 1)).
    assert boundary_p_value(chi2.ppf(0.9, 1)) == pytest.approx(0.05)
    assert boundary_p_value(3.8415) == pytest.approx(0.5 * chi2.sf(3.8415, 1))
    assert boundary_p_value(0.0) == 1.0


def test_actions_never_taken_keep_probability_zero():
    X, action, _ = _simulate(2000, 0.2, seed=5)
    action = np.where(action == 1, 0, action)  # action 1 never taken; four actions in the protocol
    model = FloorMixtureLogitBehaviour().fit(X, action, n_actions=4)
    proba = model.predict_proba(X)
    assert proba.shape == (2000, 4)
    assert np.all(proba[:, [1, 3]] == 0.0)
    np.testing.assert_allclose(proba.sum(axis=1), 1.0)
    assert proba[:, [0, 2]].min() >= model.floor_ > 0
    assert model.floor_ == pytest.approx(model.share_ / 2)  # spread over the two actions taken


def test_one_action_only_and_bad_input():
    X = np.random.default_rng(6).normal(size=(50, 2))
    model = FloorMixtureLogitBehaviour().fit(X, np.full(50, 2), n_actions=3)
    np.testing.assert_array_equal(model.predict_proba(X), np.tile([0.0, 0.0, 1.0], (50, 1)))
    assert model.share_ == 0.0
    with pytest.raises(UserInputError, match="missing or infinite"):
        FloorMixtureLogitBehaviour().fit(np.full((10, 2), np.nan), np.zeros(10, dtype=int), n_actions=2)


def test_protocol_refuses_the_floor_with_boosting():
    from support.tiny import REPOSITORY

    spec = load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol.behaviour_model
    settings = {**spec.model_dump(), "kind": "gradient_boosting", "folds": 2, "floor_mixture": True, "terms": []}
    with pytest.raises(ValueError, match="floor_mixture applies to the multinomial_logit"):
        type(spec).model_validate(settings)


def test_a_warm_start_from_another_sample_finds_the_same_maximum_in_fewer_iterations():
    # Reference: the same fit from the usual start (0), and statsmodels' MNLogit (Newton from 0), for the plain
    # logit. Two samples of one population, as the training records of two cross-fitting folds are; the plain
    # log-likelihood is concave, so it has one maximum. The mixture always starts from its own plain logit.
    X_a, action_a, _ = _simulate(4000, 0.15, seed=11)
    X_b, action_b, _ = _simulate(4000, 0.15, seed=12)
    first = FloorMixtureLogitBehaviour().fit(X_a, action_a, n_actions=3)
    cold = FloorMixtureLogitBehaviour().fit(X_b, action_b, n_actions=3)
    warm = FloorMixtureLogitBehaviour().fit(X_b, action_b, n_actions=3, start=first)
    np.testing.assert_allclose(warm.logit_params_, cold.logit_params_, rtol=1e-10, atol=1e-12)
    reference = sm.MNLogit(action_b, sm.add_constant(X_b)).fit(method="newton", disp=0)
    np.testing.assert_allclose(warm.logit_params_, reference.params, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(warm.params_, cold.params_, rtol=1e-9, atol=1e-11)
    assert warm.share_ == pytest.approx(cold.share_, rel=1e-9)
    assert warm.llf_ == pytest.approx(cold.llf_, rel=1e-12)
    assert warm.converged_ and warm.n_iter_ == cold.n_iter_

    plain_first = MultinomialLogitBehaviour().fit(X_a, action_a, n_actions=3)
    plain_cold = MultinomialLogitBehaviour().fit(X_b, action_b, n_actions=3)
    plain_warm = MultinomialLogitBehaviour().fit(X_b, action_b, n_actions=3, start=plain_first)
    np.testing.assert_allclose(plain_warm.params_, plain_cold.params_, rtol=1e-10, atol=1e-12)
    assert plain_warm.n_iter_ < plain_cold.n_iter_


def test_a_start_that_saw_other_actions_or_columns_is_not_used():
    X, action, _ = _simulate(2000, 0.1, seed=13)
    cold = MultinomialLogitBehaviour().fit(X, action, n_actions=3)
    two_actions = FloorMixtureLogitBehaviour().fit(X, np.minimum(action, 1), n_actions=3)
    one_column = FloorMixtureLogitBehaviour().fit(X[:, :1], action, n_actions=3)
    for start in (two_actions, one_column):
        again = MultinomialLogitBehaviour().fit(X, action, n_actions=3, start=start)
        np.testing.assert_array_equal(again.params_, cold.params_)  # the usual start, the same iterations
        assert again.n_iter_ == cold.n_iter_


def test_the_last_newton_step_skips_only_derivatives_nobody_reads():
    # Source of truth: Newton's method as it ran before, every trial point with its score and Hessian, written out
    # here; the fit now forms only the log-likelihood at the trial of a step no larger than the tolerance
    from regimewise.usual_care.mixture import _Z_BOUNDS, _Z_START, _newton_mixture

    X, action, _ = _simulate(3000, 0.15, seed=21)
    design = np.column_stack([np.ones(len(X)), X])
    start = MultinomialLogitBehaviour().fit(X, action, n_actions=3).params_
    assert _mixture_pass(design, start, -1.0, action, 3, derivatives=False) == (
        _mixture_pass(design, start, -1.0, action, 3)[0],
        None,
        None,
    )

    def before(params, z, maxiter=100, tol=1e-8):
        n_cols, n_other = params.shape
        theta = np.append(params.T.ravel(), z)

        def unpack(v):
            return v[:-1].reshape(n_other, n_cols).T, float(np.clip(v[-1], *_Z_BOUNDS))

        llf, score, hessian = _mixture_pass(design, *unpack(theta), action, 3)
        for iteration in range(1, maxiter + 1):
            information = -hessian
            try:
                np.linalg.cholesky(information)
                step = np.linalg.solve(information, score)
            except np.linalg.LinAlgError:
                step = score / np.maximum(np.abs(np.diag(information)), 1.0)
            for _ in range(60):
                trial = theta + step
                trial[-1] = np.clip(trial[-1], *_Z_BOUNDS)
                new_llf, new_score, new_hessian = _mixture_pass(design, *unpack(trial), action, 3)
                if np.isfinite(new_llf) and new_llf >= llf - 1e-12 * abs(llf):
                    break
                step = step / 2.0
            else:
                return *unpack(theta), llf, False, iteration
            moved = np.max(np.abs(trial - theta))
            theta, llf, score, hessian = trial, new_llf, new_score, new_hessian
            if moved <= tol:
                return *unpack(theta), llf, True, iteration
        return *unpack(theta), llf, False, maxiter

    expected = before(start, _Z_START)
    got = _newton_mixture(design, action, 3, start, _Z_START, 100)
    assert expected[2:] == got[2:] and expected[1] == got[1]  # log-likelihood, convergence, iterations; share
    assert expected[0].tobytes() == got[0].tobytes()
