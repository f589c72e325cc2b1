"""The behaviour diagnostics' faster computations give the same bits as the plain ones.

Equivalence checks with no outside reference: each reference below is the earlier code written out, and the new
code must reproduce its every bit.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import rankdata

from regimewise.usual_care.diagnostics import behaviour_diagnostics_by_step
from regimewise.usual_care.metrics import (
    _auc_of_sorted,
    auc_of_class_scores,
    brier_score,
    merged_class_scores,
    multiclass_auc,
    sorted_class_scores,
)


def _binary_auc(positive, score):
    """The package's AUC of one class against the rest: its counts on the two classes' sorted scores."""
    return _auc_of_sorted(np.sort(score[positive]), np.sort(score[~positive]))


def _reference_binary_auc(positive, score):
    ranks = rankdata(score)
    n_pos = positive.sum()
    n_neg = positive.size - n_pos
    return (ranks[positive].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg)


SCORES = {
    "spread": lambda rng, n: rng.uniform(size=n),
    "ties": lambda rng, n: np.round(rng.uniform(size=n), 1),
    "signed_zeros": lambda rng, n: rng.choice([-0.0, 0.0, 0.5], size=n),
    "constant": lambda rng, n: np.full(n, 0.25),
}


@pytest.mark.parametrize("n", [2, 7, 1000, 20_001])
@pytest.mark.parametrize("scores", sorted(SCORES))
@pytest.mark.parametrize("seed", range(3))
def test_binary_auc_is_the_rank_sum_form_to_the_bit(seed, scores, n):
    rng = np.random.default_rng(seed)
    score = SCORES[scores](rng, n)
    positive = rng.uniform(size=n) < 0.3
    positive[:2] = [True, False]  # both classes present
    new, old = _binary_auc(positive, score), _reference_binary_auc(positive, score)
    assert type(new) is type(old) and np.asarray(new).tobytes() == np.asarray(old).tobytes()


def test_binary_auc_with_a_missing_score_is_undefined_as_before():
    positive = np.array([True, False, True, False])
    score = np.array([0.2, np.nan, 0.4, 0.1])
    assert np.isnan(_binary_auc(positive, score)) and np.isnan(_reference_binary_auc(positive, score))


@pytest.mark.parametrize("seed", range(4))
def test_multiclass_auc_on_column_views_is_the_rank_sum_form_to_the_bit(seed):
    rng = np.random.default_rng(seed)
    proba = rng.dirichlet([1.0, 2.0, 3.0], size=5000)
    codes = rng.integers(0, 3, size=5000)
    old = float(np.mean([_reference_binary_auc(codes == k, proba[:, k]) for k in range(3)]))
    assert multiclass_auc(codes, proba, 3) == old


def _reference_brier(codes, proba):
    outcome = np.zeros_like(proba)
    outcome[np.arange(codes.size), codes] = 1.0
    return float(np.mean(np.sum((proba - outcome) ** 2, axis=1)))


@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("n_actions", [2, 4])
@pytest.mark.parametrize("n", [1, 9, 10_000])
def test_brier_score_is_the_one_hot_form_to_the_bit(n, n_actions, order):
    rng = np.random.default_rng(n + n_actions)
    proba = np.asarray(rng.dirichlet(np.ones(n_actions), size=n), order=order)
    codes = rng.integers(0, n_actions, size=n)
    assert brier_score(codes, proba, n_actions).hex() == _reference_brier(codes, proba).hex()


@pytest.mark.parametrize("scores", sorted(SCORES))
@pytest.mark.parametrize("seed", range(3))
def test_merged_class_scores_are_the_union_sorted(seed, scores):
    rng = np.random.default_rng(seed)
    blocks, codes, proba = [], [], []
    for size in (0, 1, 50, 3000):  # an empty block and a block of one decision among them
        column = SCORES[scores](rng, 3 * size).reshape(size, 3)
        code = rng.integers(0, 3, size=size)
        blocks.append(sorted_class_scores(code, column, 3))
        codes.append(code)
        proba.append(column)
    whole = sorted_class_scores(np.concatenate(codes), np.concatenate(proba), 3)
    merged = merged_class_scores(blocks, 3)
    for k in range(3):
        for side in (0, 1):  # the same values in the same order (-0.0 and 0.0 compare equal, as the counts see them)
            assert np.array_equal(merged[k][side], whole[k][side])
    assert [a.size for a, _ in merged_class_scores([], 3)] == [0, 0, 0]


def test_auc_of_class_scores_with_a_missing_score_is_undefined():
    proba = np.array([[0.2, 0.8], [np.nan, 0.5], [0.6, 0.4]])
    assert np.isnan(auc_of_class_scores(sorted_class_scores([0, 1, 0], proba, 2)))
    assert np.isnan(multiclass_auc([0, 1, 0], proba, 2))


@pytest.mark.parametrize("seed", range(3))
def test_auc_by_step_and_overall_are_multiclass_auc_to_the_bit(seed):
    """Each step's AUC and the whole cohort's, now from sorted pieces merged across steps, against
    :func:`multiclass_auc` on the block's rows (the computation used before, itself checked to the bit against
    the rank-sum form above)."""
    rng = np.random.default_rng(seed)
    n_steps, per_step, n_actions = 5, 400, 4
    steps = np.tile(np.arange(n_steps), per_step)  # decisions by episode then step, as the records are
    proba = np.round(rng.dirichlet(np.ones(n_actions), size=steps.size), 2) + 0.01  # with ties, none zero
    proba /= proba.sum(axis=1, keepdims=True)
    codes = rng.integers(0, n_actions, size=steps.size)
    codes[steps == 1] = np.where(codes[steps == 1] == 3, 2, codes[steps == 1])  # action 3 never taken at step 1
    codes[steps == 2] = 0  # one action only at step 2: no AUC there
    labels = [f"a{k}" for k in range(n_actions)]
    out = behaviour_diagnostics_by_step(steps, codes, proba, labels, 0.05, (1, 99))
    for t in range(n_steps):
        rows = steps == t
        expected = None if t == 2 else float(multiclass_auc(codes[rows], proba[rows], n_actions))
        assert out["by_step"][str(t)]["auc"] == expected
    assert out["overall"]["auc"] == float(multiclass_auc(codes, proba, n_actions))
