"""Outcome models of the evaluation: fitted-Q evaluation of every regime to evaluate, grouped so that each group
shares one backward pass (Le, Voloshin & Yue 2019, ICML), within the cross-fitting folds where a regime was
cross-fitted.
"""

from __future__ import annotations

import functools

import numpy as np

from regimewise.core.concurrency import run_concurrently
from regimewise.errors import UserInputError
from regimewise.estimators import ESTIMATORS
from regimewise.protocol.model import Protocol
from regimewise.regime.qmodels import evaluate_policies, policy_average


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
    for group in (True, False):
        members = [i for i, f in enumerate(folded) if f == group]
        if not members:
            continue
        parts = np.unique(learned_folds) if group else [None]
        n = len(logged.step)
        q_taken, v_target = np.full((len(members), n), np.nan), np.full((len(members), n), np.nan)
        member_targets = [targets[i]["target"] for i in members]
        # every record (a slice: views, not copies), or a fold's rows
        fold_rows = [slice(None) if part is None else learned_folds == part for part in parts]
        fits = [functools.partial(_fold_models, logged, member_targets, protocol, rows) for rows in fold_rows]
        for part, rows, fitted in zip(parts, fold_rows, run_concurrently(fits, threads)):
            for j, result in enumerate(fitted):
                if isinstance(result, UserInputError):
                    out[members[j]] = _fold_error(result, part, parts) if part is not None else result
                    continue
                q_taken[j, rows], v_target[j, rows] = result
        first = logged.step == 0
        for j, i in enumerate(members):
            if out[i] is None:
                out[i] = (q_taken[j], v_target[j], float(np.mean(v_target[j][first])))
    return out


def _fold_models(logged, targets: list, protocol: Protocol, rows: np.ndarray | slice) -> list:
    """(Q̂ taken, V̂) on ``rows`` (a mask, or ``slice(None)`` for every record) for each target, fitted on those
    rows only, or the error that stopped one."""
    episode = logged.episode if isinstance(rows, slice) else np.unique(logged.episode[rows], return_inverse=True)[1]
    fitted = evaluate_policies(
        logged.X,  # the fold's rows are gathered into the pass's design, not copied out of X first
        logged.step[rows],
        logged.action[rows],
        logged.reward[rows],
        episode,
        [t[rows] for t in targets],
        horizon=protocol.horizon,
        n_actions=len(protocol.actions),
        gamma=protocol.discount,
        alpha=protocol.evaluation.fqe_ridge_alpha,
        action_labels=protocol.action_labels,
        slopes=logged.slopes,
        x_rows=None if isinstance(rows, slice) else np.flatnonzero(rows),
    )
    out = []
    taken = logged.action[rows]
    for q, t in zip(fitted, targets):
        if isinstance(q, UserInputError):
            out.append(q)
            continue
        try:
            out.append((q[np.arange(len(taken)), taken], policy_average(q, t[rows], protocol.action_labels)))
        except UserInputError as err:
            out.append(err)
    return out


def _fold_error(err: UserInputError, part, parts) -> UserInputError:
    return UserInputError(
        f"cross-fitted evaluation, fold {int(part) + 1} of {len(parts)}: {err} With few records per fold, lower "
        "evaluation.cross_fit_folds (1 turns cross-fitting off, at the price of optimism) or leave fqe, dr and wdr "
        "out of evaluation.estimators."
    )
