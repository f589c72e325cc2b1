"""A readable summary of a learned regime: a shallow decision tree distilled from its recommendations.

A classification tree of depth at most 3 (Breiman et al. 1984; scikit-learn's ``DecisionTreeClassifier``) is
fitted to the learned regime's recommended actions at the observed decisions, on the raw state values, so its
splits read in clinical units. Its fidelity is the share of decisions where the tree's action equals the
regime's (in-sample, and out-of-fold with folds by patient). On more than :data:`TREE_ROWS` decisions the trees
are fitted on the decisions of a random subset of patients (drawn from the protocol seed's ``readable_tree``
stream) of about that size; the fidelity, the rules' counts and the table still cover every decision. Each leaf
becomes one rule in plain words. A table gives the most common recommendation across bins of the two states the
tree relies on most (impurity importance). Distilling a policy into a tree for interpretation follows the
model-extraction idea of Bastani, Kim & Bastani (2017).

The tree is a summary only: the learned regime (not the tree) is what was evaluated. Research use only, not
medical advice; decisions stay with licensed clinicians under local law and ethics approval.

References
----------
Breiman, L., Friedman, J., Olshen, R. & Stone, C. (1984). Classification and Regression Trees. Wadsworth.
Bastani, O., Kim, C. & Bastani, H. (2017). Interpreting blackbox models via model extraction. arXiv:1705.08504.
"""

from __future__ import annotations

import re
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from sklearn.tree import DecisionTreeClassifier

from regimewise.cautions import READABLE_TREE_NOTE
from regimewise.errors import UserInputError


@dataclass(frozen=True)
class TreeRule:
    """One leaf of the distilled tree: its conditions in words, its action, how many decisions, agreement."""

    conditions: tuple[str, ...]
    action: str
    decisions: int
    agreement: float

    @property
    def text(self) -> str:
        when = " and ".join(self.conditions) if self.conditions else "always"
        return f"if {when}: {self.action}"


@dataclass(frozen=True)
class ReadableRegime:
    """The distilled tree's rules, fidelity, state importances and the two-state table."""

    max_depth: int
    fidelity: float
    fidelity_out_of_fold: float | None
    rules: tuple[TreeRule, ...]
    importance: dict
    table: dict
    fitted_decisions: int  # decisions the tree was fitted on (all of them up to TREE_ROWS)
    note: str = READABLE_TREE_NOTE

    def to_dict(self) -> dict:
        out = asdict(self)
        out["rules"] = [dict(asdict(r), text=r.text) for r in self.rules]
        return out


# Decisions a readable tree is fitted on at most: above it, a random subset of patients (a depth-3 tree's splits
# are settled long before; fitting on every one of millions of decisions took most of the regime stage's summary
# time, bench/RESULTS.md). The demo's 24,000 decisions are far below it.
TREE_ROWS = 250_000


def group_codes(groups) -> np.ndarray:
    """Each row's group as a code 0..G-1 in the groups' sorted order: ``numpy.unique(groups, return_inverse=True)[1]``.

    Groups that are such codes already (integers with every value from 0 to their largest present) are their own
    codes, as ``numpy.unique`` would give them back: they are returned without its sort of every row, so
    :func:`distill_regime` sorts the patients once and :func:`fitting_rows` reuses its codes. Other integer or
    string identifiers are numbered by ``pandas.factorize(sort=True)``: it hashes the rows and sorts the distinct
    identifiers only (a tenth of the time of sorting every row for 1.2 million decisions of 100,000 patients), and
    the rank of each identifier among the sorted distinct ones is what ``numpy.unique`` returns. Anything else
    (floating-point identifiers, missing ones) is left to ``numpy.unique``.
    """
    groups = np.asarray(groups)
    if groups.dtype.kind == "i" and groups.ndim == 1 and groups.size and groups.min() == 0:
        if groups.max() < groups.size and np.bincount(groups).all():  # a count per possible code: at most n of them
            return groups.astype(np.intp, copy=False)
    if groups.ndim == 1 and groups.size and groups.dtype.kind in "iuUO":
        codes, uniques = pd.factorize(groups, sort=True)
        if codes.min() >= 0 and (groups.dtype.kind != "O" or all(isinstance(u, str) for u in uniques)):
            return codes.astype(np.intp, copy=False)
    return np.unique(groups, return_inverse=True)[1]


def fitting_rows(n: int, groups, max_rows: int, seed: int) -> np.ndarray:
    """Row indices (ascending) the tree is fitted on: every row up to ``max_rows``; above it, the rows of
    patients taken in a random order (``seed``) while their decisions fit in ``max_rows`` (rows drawn at random
    when ``groups`` is None)."""
    if n <= max_rows:
        return np.arange(n)
    rng = np.random.default_rng(seed)
    if groups is None:
        return np.sort(rng.choice(n, size=max_rows, replace=False))
    codes = group_codes(groups)
    order = rng.permutation(int(codes.max()) + 1)
    sizes = np.bincount(codes)[order]
    chosen = order[: max(1, int(np.searchsorted(np.cumsum(sizes), max_rows, side="right")))]
    return np.flatnonzero(np.isin(codes, chosen))


# A categorical state's dummy column, ``<state>[<level>]`` (:func:`regimewise.core.features.dummy_name`).
DUMMY = re.compile(r"^([a-z][a-z0-9_]*)\[(.+)\]$")


def _conditions(names, bounds, binary, integer) -> tuple[str, ...]:
    """One condition per state on the path, its thresholds merged: ``a < x ≤ b``; an integer state as whole
    numbers (``x ≤ 3``, ``x ≥ 4``, ``2 ≤ x ≤ 3``); a binary state as ``x = 0`` or ``x = 1``; one level of a
    categorical state as ``x = level`` or ``x ≠ level``."""
    out = []
    for f in sorted(bounds):
        low, high = bounds[f]
        name = names[f]
        level = DUMMY.match(name)
        if binary[f] and level:  # one level of a categorical state
            out.append(f"{level[1]} {'=' if low is not None else '≠'} {level[2]}")
        elif binary[f]:
            out.append(f"{name} = {1 if low is not None else 0}")
        elif integer[f]:
            lo = None if low is None else int(np.floor(low)) + 1
            hi = None if high is None else int(np.floor(high))
            out.append(_range_text(name, lo, hi, "≥", "≤", whole=True))
        else:
            out.append(_range_text(name, low, high, ">", "≤", whole=False))
    return tuple(out)


def _range_text(name, low, high, above, below, whole) -> str:
    show = (lambda v: f"{v:d}") if whole else (lambda v: f"{v:.6g}")
    if low is not None and high is not None:
        return (
            f"{show(low)} {'≤' if whole else '<'} {name} ≤ {show(high)}"
            if low != high or not whole
            else f"{name} = {low}"
        )
    if low is not None:
        return f"{name} {above} {show(low)}"
    return f"{name} {below} {show(high)}"


def leaf_predictions(tree, X) -> tuple[np.ndarray, np.ndarray]:
    """Each row's leaf of a fitted tree and what ``tree.predict(X)`` returns there (the class of the largest value
    at the leaf), read off the leaves instead of running the rows down the tree again with (n, classes)
    probabilities: one pass serves the fidelity and the leaves' agreement (:func:`distill_regime`)."""
    leaf_of = tree.apply(X)
    return leaf_of, tree.classes_.take(np.argmax(tree.tree_.value[:, 0, :], axis=1))[leaf_of]


def tree_rules(tree, state_names, binary, action_labels, X, target, leaves=None) -> tuple[TreeRule, ...]:
    """Every leaf of a fitted tree as a :class:`TreeRule` (depth-first, left branch first), each path's
    thresholds merged into one condition per state (:func:`_conditions`). ``leaves``: :func:`leaf_predictions`
    of ``X`` when the caller has them."""
    t = tree.tree_
    leaf_of, predicted = leaf_predictions(tree, X) if leaves is None else leaves
    values = np.asarray(X, dtype=float)
    integer = [bool(np.all(values[:, j] == np.round(values[:, j]))) for j in range(values.shape[1])]
    rules = []

    def walk(node, bounds):
        if t.children_left[node] == -1:
            rows = leaf_of == node
            action = int(tree.classes_[np.argmax(t.value[node][0])])
            agreement = float(np.mean(target[rows] == predicted[rows])) if rows.any() else float("nan")
            conditions = _conditions(state_names, bounds, binary, integer)
            rules.append(TreeRule(conditions, action_labels[action], int(rows.sum()), agreement))
            return
        f, thr = int(t.feature[node]), float(t.threshold[node])
        low, high = bounds.get(f, (None, None))
        walk(t.children_left[node], {**bounds, f: (low, thr if high is None else min(high, thr))})
        walk(t.children_right[node], {**bounds, f: (thr if low is None else max(low, thr), high)})

    walk(0, {})
    return tuple(rules)


def _bins(values, n_bins):
    """Bin edges: the distinct values if there are few, else quantile edges (distinct)."""
    distinct = np.unique(values)
    if distinct.size <= n_bins + 2:
        return distinct, True
    edges = np.unique(np.quantile(values, np.linspace(0, 1, n_bins + 1)))
    return edges, False


def _bin_labels(name, edges, discrete):
    if discrete:
        return [f"{name} = {v:g}" for v in edges]
    return [
        f"{name} {'≤' if i == 0 else '>'} {edges[1] if i == 0 else edges[i]:.4g}"
        + (f" and ≤ {edges[i + 1]:.4g}" if 0 < i < len(edges) - 2 else "")
        for i in range(len(edges) - 1)
    ]


def _bin_index(values, edges, discrete):
    if discrete:
        return np.searchsorted(edges, values)
    return np.clip(np.searchsorted(edges[1:-1], values, side="left"), 0, len(edges) - 2)


def two_state_table(frame, recommended, first, second, action_labels, n_bins=4) -> dict:
    """Most common recommended action (with its share and count) across bins of two states."""
    axes = []
    for name in (first, second):
        values = frame[name].to_numpy(dtype=float)
        edges, discrete = _bins(values, n_bins)
        axes.append((name, _bin_labels(name, edges, discrete), _bin_index(values, edges, discrete)))
    (n1, labels1, idx1), (n2, labels2, idx2) = axes
    # every cell's count of every action in one pass over the decisions (one count per cell and action, the counts a
    # mask per cell would give) instead of one pass per cell
    n_actions = len(action_labels)
    every = np.bincount(
        (idx1 * len(labels2) + idx2) * n_actions + recommended, minlength=len(labels1) * len(labels2) * n_actions
    )
    every = every.reshape(len(labels1), len(labels2), n_actions)
    cells = []
    for i in range(len(labels1)):
        row = []
        for j in range(len(labels2)):
            counts = every[i, j]
            total = counts.sum()
            top = int(counts.argmax())
            row.append(
                {
                    "decisions": int(total),
                    "action": action_labels[top] if total else None,
                    "share": float(counts[top] / total) if total else None,
                }
            )
        cells.append(row)
    return {"rows_state": n1, "columns_state": n2, "row_bins": labels1, "column_bins": labels2, "cells": cells}


def distill_regime(
    frame,
    recommended,
    states,
    action_labels,
    *,
    max_depth=3,
    groups=None,
    n_folds=5,
    random_state=0,
    max_rows=TREE_ROWS,
    subset_seed=0,
) -> ReadableRegime:
    """Distil a regime's recommendations into a shallow tree and a two-state table.

    Parameters
    ----------
    frame : DataFrame with the state columns, one row per decision
    recommended : ndarray of int, shape (n,)
        The learned regime's action codes at those decisions.
    states : sequence of protocol StateVariable (name and kind)
    action_labels : tuple of str
    max_depth : int, default 3
    groups : ndarray, optional
        Patient of each decision, for the out-of-fold fidelity (skipped if None).
    n_folds : int, default 5
    random_state : int
    max_rows : int, default :data:`TREE_ROWS`
        Most decisions the trees are fitted on (:func:`fitting_rows`); fidelity is measured on all of them.
    subset_seed : int
        Seed of the patients drawn above ``max_rows`` (the stage passes the protocol's ``readable_tree`` stream).
    """
    if not 1 <= max_depth <= 3:
        raise UserInputError(f"max_depth must be 1, 2 or 3 for a readable tree, got {max_depth!r}.")
    names = [s.name for s in states]
    binary = [s.kind == "binary" for s in states]
    # the frame's own values when it holds exactly these columns (the regime stage's covariate frame): the same
    # numbers and layout as the copy frame[names] would give, without a second copy of the states
    X = (frame if list(frame.columns) == names else frame[names]).to_numpy(dtype=float)
    recommended = np.asarray(recommended, dtype=np.int64)
    make = lambda: DecisionTreeClassifier(max_depth=max_depth, random_state=random_state)  # noqa: E731
    codes = None if groups is None else group_codes(groups)  # patients sorted once: the fitting rows reuse them
    fit = fitting_rows(len(recommended), codes, max_rows, subset_seed)
    tree = make().fit(X[fit], recommended[fit])
    leaves = leaf_predictions(tree, X)  # the predictions of tree.predict(X), and the leaves for the rules
    fidelity = float(np.mean(leaves[1] == recommended))
    oof = None
    if groups is not None:
        fold = np.random.default_rng(random_state).permutation(int(codes.max()) + 1)[codes] % n_folds
        agree = np.zeros(len(recommended), dtype=bool)
        for f in range(n_folds):
            test = fold == f
            train = fit[fold[fit] != f]
            if test.any() and train.size:
                agree[test] = make().fit(X[train], recommended[train]).predict(X[test]) == recommended[test]
        oof = float(agree.mean())
    importance = {n: float(v) for n, v in zip(names, tree.feature_importances_)}
    order = sorted(range(len(names)), key=lambda i: (-tree.feature_importances_[i], i))
    table = (
        two_state_table(frame, recommended, names[order[0]], names[order[1]], action_labels) if len(names) > 1 else {}
    )
    rules = tree_rules(tree, names, binary, action_labels, X, recommended, leaves)
    return ReadableRegime(max_depth, fidelity, oof, rules, importance, table, int(fit.size))
