"""Fits sharing work across a table's many fits give the numbers of fitting one at a time, bit for bit.

A bootstrap ensemble fits one table 1 + B times with other row weights, and the out-of-fold error fits it once per
fold: each action's rows are gathered once for all of them (:class:`regimewise.regime.qmodels.ActionCells`) and
[1, X] built once for the folds. Source of truth: the fits as written before, each selecting its rows from the whole
table (``separate_fit``, ``old_out_of_fold_errors`` below); equal to the last bit, not to rounding.
"""

import numpy as np
import pytest

from regimewise.core.terms import ActionSlopes
from regimewise.regime.fqi import FittedQIteration, QLearningSettings
from regimewise.regime.permitted import constrained_choice
from regimewise.regime.pessimism import PessimisticEnsemble, patient_resamples
from regimewise.regime.qmodels import (
    ActionCells,
    LinearActionModel,
    _least_squares,
    _least_squares_columns,
    fit_actions,
    out_of_fold_errors,
)


def separate_fit(design, action, y, alpha, n_actions, weight=None):
    """Each action's least squares on its own rows of positive weight, the rows gathered from the whole table and
    multiplied by the square roots of their weights: the fits as written before the action cells."""
    keep = np.ones(len(action), dtype=bool) if weight is None else weight > 0
    coef = np.full((n_actions, design.shape[1]) + np.shape(y)[1:], np.nan)
    for a in range(n_actions):
        cell = np.flatnonzero((action == a) & keep)
        if not cell.size:
            continue
        d, t = design[cell], y[cell]
        if weight is not None:
            root = np.sqrt(weight[cell])
            d *= root[:, None]
            t *= root if y.ndim == 1 else root[:, None]
        coef[a] = _least_squares(d, t, alpha) if y.ndim == 1 else _least_squares_columns(d, t, alpha)
    return coef


def table(n=900, p=6, n_actions=4, seed=0):
    rng = np.random.default_rng(seed)
    design = np.column_stack([np.ones(n), rng.normal(size=(n, p))])
    action = rng.integers(0, n_actions - 1, n)  # the last action has no rows: NaN coefficients
    y = design[:, 1:] @ rng.normal(size=p) + action + rng.normal(size=n)
    return design, action, y


@pytest.mark.parametrize("alpha", [0.0, 2.5])
def test_action_cells_give_the_fits_of_the_whole_table(alpha):
    design, action, y = table()
    rng = np.random.default_rng(1)
    cells = ActionCells.gather(design[:, 1:], action, y, 4)
    for weight in [None, rng.poisson(1.0, y.size).astype(float), rng.poisson(1.0, y.size).astype(float)]:
        expected = separate_fit(design, action, y, alpha, 4, weight)
        assert np.isnan(expected[3]).all()
        np.testing.assert_array_equal(fit_actions(design, action, y, alpha, 4, weight=weight, cells=cells), expected)
        np.testing.assert_array_equal(fit_actions(design, action, y, alpha, 4, weight=weight), expected)
    responses = np.column_stack([y, 2 * y + 1])  # several responses at once, as fitted-Q evaluation passes them
    wide = ActionCells.gather(design[:, 1:], action, responses, 4)
    weight = rng.poisson(1.0, y.size).astype(float)
    np.testing.assert_array_equal(
        fit_actions(design, action, responses, alpha, 4, weight=weight, cells=wide),
        separate_fit(design, action, responses, alpha, 4, weight),
    )


def test_a_boolean_weight_fits_the_selected_rows_alone():
    design, action, y = table(seed=2)
    keep = np.random.default_rng(3).random(y.size) < 0.7
    alone = fit_actions(design[keep], action[keep], y[keep], 0.0, 4)
    cells = ActionCells.gather(design[:, 1:], action, y, 4)
    np.testing.assert_array_equal(fit_actions(design, action, y, 0.0, 4, weight=keep, cells=cells), alone)
    np.testing.assert_array_equal(fit_actions(design, action, y, 0.0, 4, weight=keep), alone)


def test_shared_slopes_have_no_cells_and_fit_as_before():
    design, action, y = table(seed=4)
    shared = LinearActionModel(4, 1.0, ActionSlopes(True, (1,)))
    assert shared.cells(design[:, 1:], action, y) is None
    assert isinstance(LinearActionModel(4).cells(design[:, 1:], action, y), ActionCells)


def test_ensemble_replicates_are_the_fits_of_their_weights():
    design, action, y = table(seed=5)
    X = design[:, 1:]
    groups = np.repeat(np.arange(300), 3)
    resamples = patient_resamples(groups, 5, seed=6)
    weights = resamples.rows(np.arange(y.size))
    ensemble = PessimisticEnsemble(lambda: LinearActionModel(4), resamples, k=1.0).fit(X, action, y, np.arange(y.size))
    np.testing.assert_array_equal(ensemble.full_.coef_, separate_fit(design, action, y, 0.0, 4))
    for model, w in zip(ensemble.replicates_, weights):
        np.testing.assert_array_equal(model.coef_, separate_fit(design, action, y, 0.0, 4, w))


def old_out_of_fold_errors(make_model, X, action, y, folds):
    """Each fold's model fitted on ``X[~test]`` as a table of its own: the errors as computed before."""
    error = np.full(y.shape[0], np.nan)
    for f in np.unique(folds):
        test = folds == f
        if test.all():
            continue
        model = make_model().fit(X[~test], action[~test], y[~test], None)
        q = model.predict(X[test])[np.arange(test.sum()), action[test]]
        error[test] = (q - y[test]) ** 2
    return error


@pytest.mark.parametrize("slopes", [ActionSlopes(), ActionSlopes(True, (1, 2))])
def test_out_of_fold_errors_equal_fitting_each_fold_alone(slopes):
    design, action, y = table(seed=8)
    X = design[:, 1:]
    folds = np.random.default_rng(9).integers(0, 5, y.size)
    make = lambda: LinearActionModel(4, 0.5, slopes)  # noqa: E731
    np.testing.assert_array_equal(
        out_of_fold_errors(make, X, action, y, folds), old_out_of_fold_errors(make, X, action, y, folds)
    )


@pytest.mark.parametrize("pessimism", [None, 1.5])
def test_q_values_and_scores_are_each_step_models_on_their_rows(pessimism):
    """recommend_with_q (one prediction per step for both) and a single step's rows passed without a copy give what
    each step model predicts and scores on its own rows, taken out of the table one step at a time."""
    rng = np.random.default_rng(12)
    episodes, horizon = 200, 3
    step = np.tile(np.arange(horizon), episodes)
    X = rng.normal(size=(step.size, 3))
    action = rng.integers(0, 3, step.size)
    proba = rng.dirichlet(np.ones(3), size=step.size)
    rules = rng.random((step.size, 3)) < 0.8
    settings = QLearningSettings(support_threshold=0.1, pessimism=pessimism, ensemble_size=6)
    model = FittedQIteration(3, horizon, settings, random_state=4).fit(
        X, step, action, rng.normal(size=step.size), np.repeat(np.arange(episodes), horizon), proba
    )
    q_ref, score_ref = np.full((step.size, 3), np.nan), np.full((step.size, 3), np.nan)
    for t in range(horizon):
        rows = step == t
        step_model = model.models_[t]
        q_ref[rows] = step_model.predict(X[rows])
        score_ref[rows] = step_model.score(X[rows]) if pessimism else step_model.predict(X[rows])
    choice_ref = constrained_choice(score_ref, proba, 0.1, rules)[0]
    codes, q = model.recommend_with_q(X, step, proba, rules)
    np.testing.assert_array_equal(q, q_ref)
    np.testing.assert_array_equal(codes, choice_ref)
    np.testing.assert_array_equal(model.scores(X, step), score_ref)
    at = np.flatnonzero(step == 1)
    codes, q = model.recommend_with_q(X[at], step[at], proba[at], rules[at])
    np.testing.assert_array_equal(q, q_ref[at])
    np.testing.assert_array_equal(codes, choice_ref[at])
    np.testing.assert_array_equal(model.recommend(X[at], step[at], proba[at], rules[at]), choice_ref[at])
