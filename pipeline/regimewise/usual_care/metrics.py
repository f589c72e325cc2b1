"""Accuracy of usual-care probabilities: probability of the action taken, multi-class AUC (one-vs-rest macro
average), Brier score (Brier 1950) and reliability curves (Niculescu-Mizil & Caruana 2005).
"""

from __future__ import annotations

import numpy as np

from regimewise.core.arrays import as_actions, as_proba
from regimewise.errors import UserInputError


def probability_of_taken(proba, action):
    """Probability each decision's model gave to the action actually taken.

    Parameters
    ----------
    proba : array_like, shape (n, K)
        Action probabilities, columns in action-code order (e.g. from ``predict_proba``).
    action : array_like of int, shape (n,)
        Action codes taken.

    Returns
    -------
    ndarray, shape (n,)

    Examples
    --------
    >>> probability_of_taken([[0.2, 0.8], [0.6, 0.4]], [1, 0])
    array([0.8, 0.6])
    """
    proba = as_proba(proba)
    codes = as_actions(action, proba.shape[1], n_rows=proba.shape[0])
    return proba[np.arange(codes.size), codes]


def _auc_of_sorted(pos, neg):
    """The AUC of positives scoring ``pos`` against negatives scoring ``neg``, both sorted increasingly: the
    Mann–Whitney statistic with mid-ranks for ties.

    The positives' rank sum is counted exactly in integers (twice each mid-rank: the scores below plus the scores
    at most equal, plus one), from the sorted scores of each class: the rank sums of the positives among
    themselves add up to n₊(n₊ + 1)/2, so only the negatives below and tied need counting. The sum is a
    half-integer below 2⁵³ and so what a floating-point sum of the mid-ranks gives in any order. A missing score
    (sorted last) leaves every rank undefined: NaN.
    """
    if (pos.size and np.isnan(pos[-1])) or (neg.size and np.isnan(neg[-1])):
        return np.float64(np.nan)
    n_pos, n_neg = np.int64(pos.size), np.int64(neg.size)
    below = np.searchsorted(neg, pos, side="left").sum(dtype=np.int64)
    at_most = np.searchsorted(neg, pos, side="right").sum(dtype=np.int64)
    rank_sum = (below + at_most + n_pos * (n_pos + 1)) / 2
    return (rank_sum - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg)


def sorted_class_scores(action, proba, n_actions) -> list[tuple[np.ndarray, np.ndarray]]:
    """For each action ``k``: the scores ``proba[:, k]`` of the decisions that took ``k`` and of the others, each
    sorted increasingly (the pieces :func:`multiclass_auc` counts ranks in)."""
    proba = as_proba(proba)
    codes = as_actions(action, n_actions, n_rows=proba.shape[0])
    return [(np.sort(proba[codes == k, k]), np.sort(proba[codes != k, k])) for k in range(n_actions)]


def merged_class_scores(blocks, n_actions) -> list[tuple[np.ndarray, np.ndarray]]:
    """:func:`sorted_class_scores` of the union of disjoint blocks of decisions, from each block's.

    A stable sort of sorted runs put end to end merges them (numpy's timsort finds the runs), several times faster
    than sorting the scores afresh; the values come out in the same order, so every count is the same.
    """
    return [
        tuple(
            np.sort(np.concatenate([block[k][side] for block in blocks]), kind="stable") if blocks else np.empty(0)
            for side in (0, 1)
        )
        for k in range(n_actions)
    ]


def auc_of_class_scores(scores) -> float:
    """One-vs-rest macro AUC (:func:`multiclass_auc`) from :func:`sorted_class_scores`; NaN when fewer than two
    actions occur."""
    present = [k for k, (pos, _) in enumerate(scores) if pos.size]
    if len(present) < 2:
        return float("nan")
    return float(np.mean([_auc_of_sorted(*scores[k]) for k in present]))


def multiclass_auc(action, proba, n_actions):
    """One-vs-rest macro-averaged AUC of a usual-care model.

    For each action ``k`` that occurs, the AUC of ``proba[:, k]`` for telling decisions with action ``k`` from
    all others (the Mann–Whitney form, ties counted one half; Hanley & McNeil 1982, Radiology 143:29); the result
    is the unweighted mean over those actions ("one-vs-rest, macro average"; Provost & Domingos 2000, as used by
    scikit-learn's ``roc_auc_score(multi_class="ovr", average="macro")``). Hand & Till (2001, Machine Learning
    45:171) average over pairs instead; it is not used here. With two actions both forms equal the ordinary AUC.

    Parameters
    ----------
    action : array_like of int, shape (n,)
        Action codes taken.
    proba : array_like, shape (n, n_actions)
        Predicted probabilities, columns in action-code order.
    n_actions : int
        Number of actions.

    Returns
    -------
    float
        The AUC; ``nan`` when fewer than two actions occur (discrimination is undefined).

    Examples
    --------
    >>> multiclass_auc([0, 0, 1, 1], [[0.9, 0.1], [0.6, 0.4], [0.3, 0.7], [0.5, 0.5]], 2)
    1.0
    """
    proba = as_proba(proba)
    if proba.shape[1] != n_actions:
        raise UserInputError(f"proba has {proba.shape[1]} columns but n_actions is {n_actions}")
    return auc_of_class_scores(sorted_class_scores(action, proba, n_actions))


def brier_score(action, proba, n_actions):
    r"""Multi-category Brier score :math:`\frac1n \sum_i \sum_k (p_{ik} - 1\{a_i = k\})^2` (Brier 1950).

    0 is perfect; always predicting ``1/K`` for ``K`` equally frequent actions scores ``1 - 1/K``.

    Examples
    --------
    >>> brier_score([0, 1], [[1.0, 0.0], [0.5, 0.5]], 2)
    0.25
    """
    proba = as_proba(proba)
    codes = as_actions(action, n_actions, n_rows=proba.shape[0])
    taken = np.arange(n_actions) == codes[:, None]  # the one-hot outcome, as booleans (1.0 and 0.0 in the sum)
    return float(np.mean(np.sum((proba - taken) ** 2, axis=1)))


def reliability_curve(outcome, predicted, n_bins=10):
    """Observed frequency against mean predicted probability in equal-width bins of [0, 1].

    Bins are ``(edge_{j-1}, edge_j]`` except the first, which includes 0 (the binning of scikit-learn's
    ``calibration_curve(strategy="uniform")``); empty bins are left out.

    Returns
    -------
    dict
        ``mean_predicted``, ``observed`` and ``count`` (lists, one entry per non-empty bin).

    Examples
    --------
    >>> reliability_curve([0, 1, 1, 1], [0.1, 0.3, 0.9, 1.0], n_bins=2)["observed"]
    [0.5, 1.0]
    """
    y = np.asarray(outcome, dtype=float)
    p = np.asarray(predicted, dtype=float)
    bins = np.searchsorted(np.linspace(0.0, 1.0, n_bins + 1)[1:-1], p)
    count = np.bincount(bins, minlength=n_bins)
    keep = count > 0
    sum_p = np.bincount(bins, weights=p, minlength=n_bins)[keep]
    sum_y = np.bincount(bins, weights=y, minlength=n_bins)[keep]
    return {
        "mean_predicted": (sum_p / count[keep]).tolist(),
        "observed": (sum_y / count[keep]).tolist(),
        "count": count[keep].astype(int).tolist(),
    }
