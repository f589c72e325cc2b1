"""The behaviour diagnostics' faster computations give the same bits as the plain ones.

Equivalence checks with no outside reference: each reference below is the earlier code written out, and the new
code must reproduce its every bit.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import rankdata

from regimewise.usual_care.metrics import _binary_auc, brier_score, multiclass_auc


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
