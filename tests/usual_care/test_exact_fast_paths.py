"""The usual-care fits' faster passes over the records give the numbers of the straightforward formulation to the
last bit: the softmax over classes laid out class by class against scipy's log_softmax, the mixture's pass against
the records × classes formulation it replaced, and whole fits (coefficients, share, log-likelihood, probabilities)
against fits that run the replaced formulation. Two and four actions, an action never taken, one block of records
and several (the last one short)."""

import numpy as np
import pytest
from scipy.special import expit, log_softmax

from regimewise.usual_care import logit, mixture
from regimewise.usual_care.logit import MultinomialLogitBehaviour, log_softmax_by_class
from regimewise.usual_care.mixture import FloorMixtureLogitBehaviour


def _reference_log_softmax_by_class(linear):
    return log_softmax(linear.T, axis=1).T


def _reference_mixture_pass(design, params, z, endog, n_classes, derivatives=True):
    """The mixture's pass as first written: records × classes arrays, one weighted copy of the block per pair of
    classes (the formulas are in :func:`regimewise.usual_care.mixture._mixture_pass`); without ``derivatives``,
    its log-likelihood alone, as the fit asks at the trial of its last step."""
    if not derivatives:
        return _reference_mixture_pass(design, params, z, endog, n_classes)[0], None, None
    n_cols, n_other = params.shape
    size, classes, total = n_other * n_cols + 1, np.arange(n_classes), 0.0
    score, hessian = np.zeros(size), np.zeros((size, size))
    share = float(expit(z))
    dshare = share * (1.0 - share)
    for rows in logit.row_blocks(design.shape[0]):
        X = design[rows]
        taken = endog[rows]
        linear = np.zeros((taken.size, n_classes))
        linear[:, 1:] = X @ params
        s = np.exp(log_softmax(linear, axis=1))
        s_taken = s[np.arange(taken.size), taken]
        p_taken = (1.0 - share) * s_taken + share / n_classes
        total += float(np.log(p_taken).sum())
        r = (1.0 - share) * s_taken / p_taken
        residual = ((classes == taken[:, None]) - s)[:, 1:]
        g_share = (1.0 / n_classes - s_taken) / p_taken
        score[:-1] += (X.T @ (r[:, None] * residual)).T.ravel()
        score[-1] += float(g_share.sum()) * dshare
        cross = -(s_taken / (n_classes * p_taken**2))[:, None] * residual * dshare
        hessian[:-1, -1] += (X.T @ cross).T.ravel()
        hessian[-1, -1] += float((-(g_share**2) * dshare**2 + g_share * dshare * (1.0 - 2.0 * share)).sum())
        for j in range(n_other):
            for k in range(j, n_other):
                weight = r * (1.0 - r) * residual[:, j] * residual[:, k] + r * s[:, j + 1] * s[:, k + 1]
                if j == k:
                    weight -= r * s[:, j + 1]
                block = X.T @ (weight[:, None] * X)
                hessian[j * n_cols : (j + 1) * n_cols, k * n_cols : (k + 1) * n_cols] += block
                if j != k:
                    hessian[k * n_cols : (k + 1) * n_cols, j * n_cols : (j + 1) * n_cols] += block.T
    hessian[-1, :-1] = hessian[:-1, -1]
    return total, score, hessian


def _records(n, n_actions, absent, seed):
    """Covariates and actions from a multinomial logit with a 10% even floor; action ``absent`` never taken."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3)) * [1.0, 2.0, 0.5] + [0.0, 1.0, -3.0]
    beta = rng.normal(scale=0.8, size=(4, n_actions))
    linear = beta[0] + X @ beta[1:]
    if absent is not None:
        linear[:, absent] = -np.inf
    proba = np.exp(log_softmax(linear, axis=1))
    action = (rng.random(n)[:, None] > np.cumsum(proba, axis=1)).sum(axis=1)
    even = rng.random(n) < 0.1
    present = np.setdiff1d(np.arange(n_actions), [] if absent is None else [absent])
    action = np.where(even, rng.choice(present, n), action)
    return X, np.minimum(action, n_actions - 1)


@pytest.mark.parametrize("n_classes", range(2, 10))
def test_log_softmax_by_class_is_scipys_to_the_bit(n_classes):
    # Reference: scipy.special.log_softmax over the classes of each record, including saturated and infinite rows.
    rng = np.random.default_rng(n_classes)
    linear = rng.normal(scale=30.0, size=(n_classes, 1001))
    linear[0] = 0.0
    for record, value in enumerate([-np.inf, np.inf, 800.0, -800.0, 1e-300]):
        linear[1 + record % (n_classes - 1), record] = value
    with np.errstate(all="ignore"):
        np.testing.assert_array_equal(log_softmax_by_class(linear), _reference_log_softmax_by_class(linear))


@pytest.mark.parametrize("n_actions", [2, 4])
@pytest.mark.parametrize("block_rows", [97, 65_536])  # several blocks, the last one short; one block
def test_mixture_pass_is_the_records_by_classes_pass_to_the_bit(n_actions, block_rows, monkeypatch):
    monkeypatch.setattr(logit, "BLOCK_ROWS", block_rows)
    X, action = _records(1000, n_actions, None, seed=n_actions)
    design = np.column_stack([np.ones(len(X)), X])
    params = np.random.default_rng(0).normal(scale=0.5, size=(4, n_actions - 1))
    with np.errstate(over="ignore", under="ignore", divide="ignore"):
        ours = mixture._mixture_pass(design, params, -1.7, action, n_actions)
        reference = _reference_mixture_pass(design, params, -1.7, action, n_actions)
    assert ours[0] == reference[0]
    np.testing.assert_array_equal(ours[1], reference[1])
    np.testing.assert_array_equal(ours[2], reference[2])


@pytest.mark.parametrize(
    ("n_actions", "absent", "block_rows"),
    [(2, None, 65_536), (2, None, 150), (4, None, 65_536), (4, None, 150), (4, 2, 150), (5, 0, 65_536)],
)
def test_fits_are_the_replaced_formulation_to_the_bit(n_actions, absent, block_rows, monkeypatch):
    # Reference: the same fits with scipy's log_softmax and the records × classes mixture pass swapped back in.
    monkeypatch.setattr(logit, "BLOCK_ROWS", block_rows)
    X, action = _records(1200, n_actions, absent, seed=8 + n_actions)
    fits = {}
    for version in ("ours", "reference"):
        if version == "reference":
            monkeypatch.setattr(logit, "log_softmax_by_class", _reference_log_softmax_by_class)
            monkeypatch.setattr(mixture, "_mixture_pass", _reference_mixture_pass)
        plain = MultinomialLogitBehaviour().fit(X, action, n_actions)
        floor = FloorMixtureLogitBehaviour().fit(X, action, n_actions)
        fits[version] = (plain, floor)
    for ours, reference in zip(fits["ours"], fits["reference"]):
        np.testing.assert_array_equal(ours.params_, reference.params_)
        assert ours.llf_ == reference.llf_ and ours.n_iter_ == reference.n_iter_
        np.testing.assert_array_equal(ours.predict_proba(X), reference.predict_proba(X))
    assert fits["ours"][1].share_ == fits["reference"][1].share_ > 0.0


@pytest.mark.parametrize("fill_rows", [7, 4096])
def test_scaled_design_filled_by_rows_is_column_by_column_to_the_bit(fill_rows, monkeypatch):
    # Reference: every varying column centred and scaled on its own, as the design was first filled.
    monkeypatch.setattr(logit, "FILL_ROWS", fill_rows)
    values = np.random.default_rng(5).normal(size=(1001, 4)) * [3.0, 1.0, 1.0, 1e-3] + [10.0, 0.0, 0.0, 7.0]
    values[:, 1] = 2.5  # a constant column, left out
    mean, scale = logit.standardise(values)
    reference = [np.ones(len(values))] + [(values[:, j] - mean[j]) / scale[j] for j in (0, 2, 3)]
    np.testing.assert_array_equal(logit.scaled_design(values, mean, scale), np.column_stack(reference))


@pytest.mark.parametrize("n_rows", [1, 7, 8192, 8193, 100_003])
def test_standardise_on_column_copies_is_numpys_on_the_columns_to_the_bit(n_rows):
    # Reference: numpy's mean and standard deviation of every (strided) column of the matrix itself.
    rng = np.random.default_rng(n_rows)
    values = rng.normal(size=(n_rows, 5)) * [1e-3, 1.0, 50.0, 1e4, 1.0] + [0.0, -7.0, 1e3, 3e6, 0.0]
    values[:, 4] = 1.5
    mean, scale = logit.standardise(values)
    np.testing.assert_array_equal(mean, [values[:, j].mean() for j in range(5)])
    np.testing.assert_array_equal(scale, [values[:, j].std() for j in range(4)] + [0.0])
