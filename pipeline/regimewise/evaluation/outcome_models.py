"""Outcome models of the evaluation: fitted-Q evaluation of every regime to evaluate, grouped so that each group
shares one backward pass (Le, Voloshin & Yue 2019, ICML), within the cross-fitting folds where a regime was
cross-fitted.
"""

from __future__ import annotations

import functools

import numpy as np

from regimewise.core.arrays import dense_codes
from regimewise.core.concurrency import run_concurrently
from regimewise.errors import UserInputError
from regimewise.estimators import ESTIMATORS
from regimewise.protocol.model import Protocol
from regimewise.regime.qmodels import evaluate_policies


def needs_outcome_model(protocol: Protocol) -> bool:
    return any(ESTIMATORS[name].needs_q_model for name in protocol.evaluation.estimators)


def outcome_models(logged, targets: list[dict], protocol: Protocol, learned_folds=None, threads: int = 1) -> list:
    """Fitted-Q evaluation of every regime of ``targets``: per regime (Q̂ of the taken action, V̂ of the regime at
    each decision, fqe value), the :class:`UserInputError` that stopped it, or None when no estimator needs it.

    Regimes built from the cross-fitted learned regime (the learned regime and the strategies) are fitted within
    each fold of ``learned_folds`` on that fold's records, the others on all records; every group is fitted in one
    backward pass (:func:`regimewise.regime.qmodels.evaluate_policies`), which gives what one
    :class:`regimewise.evaluation.fqe.FittedQEvaluation` per regime gives. ``logged`` is a
    :class:`regimewise.evaluation.values.LoggedDecisions`. The folds' passes are independent: ``threads`` of them
    run at once (:func:`regimewise.core.concurrency.run_concurrently`; the same numbers with any number).
    """
    if not needs_outcome_model(protocol):
        return [None] * len(targets)
    folded = [learned_folds is not None and (t["name"] == "learned" or "strategy" in t) for t in targets]
    out: list = [None] * len(targets)
    first = logged.step == 0
    for group in (True, False):
        members = [i for i, f in enumerate(folded) if f == group]
        if not members:
            continue
        parts = np.unique(learned_folds) if group else [None]
        member_targets = [targets[i]["target"] for i in members]
        # every record (a slice: the whole table, read in place), or a fold's rows
        fold_rows = [slice(None) if part is None else learned_folds == part for part in parts]
        fits = [functools.partial(_fold_models, logged, member_targets, protocol, rows) for rows in fold_rows]
        fitted = run_concurrently(fits, threads)  # per fold, per member: (Q̂ taken, V̂) on the fold's rows, or error
        for j, i in enumerate(members):
            pieces = [by_fold[j] for by_fold in fitted]
            for by_fold in fitted:
                by_fold[j] = None  # each member's pieces are released once joined
            errors = [(part, p) for part, p in zip(parts, pieces) if isinstance(p, UserInputError)]
            if errors:  # the last fold that failed names the error
                part, err = errors[-1]
                out[i] = _fold_error(err, part, parts) if part is not None else err
                continue
            q_taken, v_target = _joined(pieces, fold_rows, len(logged.step))
            out[i] = (q_taken, v_target, float(np.mean(v_target[first])))
    return out


def _joined(pieces: list, fold_rows: list, n: int) -> tuple:
    """(Q̂ taken, V̂) of every record from the folds' pieces; the pieces themselves when one covers every record."""
    if len(pieces) == 1 and isinstance(fold_rows[0], slice):
        return pieces[0]
    q_taken, v_target = np.full(n, np.nan), np.full(n, np.nan)
    for (q, v), rows in zip(pieces, fold_rows):
        q_taken[rows], v_target[rows] = q, v
    return q_taken, v_target


def _fold_models(logged, targets: list, protocol: Protocol, rows: np.ndarray | slice) -> list:
    """(Q̂ taken, V̂) on ``rows`` (a mask, or ``slice(None)`` for every record) for each target, fitted on those
    rows only, or the error that stopped one. The fold's rows of X and of the targets are read in place, a step at
    a time (:func:`regimewise.regime.qmodels.evaluate_policies`), not copied out."""
    whole = isinstance(rows, slice)
    return evaluate_policies(
        logged.X,
        logged.step[rows],
        logged.action[rows],
        logged.reward[rows],
        logged.episode if whole else dense_codes(logged.episode[rows]),
        targets,
        horizon=protocol.horizon,
        n_actions=len(protocol.actions),
        gamma=protocol.discount,
        alpha=protocol.evaluation.fqe_ridge_alpha,
        action_labels=protocol.action_labels,
        slopes=logged.slopes,
        x_rows=None if whole else np.flatnonzero(rows),
    )


def _fold_error(err: UserInputError, part, parts) -> UserInputError:
    return UserInputError(
        f"cross-fitted evaluation, fold {int(part) + 1} of {len(parts)}: {err} With few records per fold, lower "
        "evaluation.cross_fit_folds (1 turns cross-fitting off, at the price of optimism) or leave fqe, dr and wdr "
        "out of evaluation.estimators."
    )
