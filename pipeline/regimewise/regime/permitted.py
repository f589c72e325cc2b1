"""The permitted-action rule, in one place: an action may be chosen where its score is defined, the protocol's
clinical rules allow it, and usual care gave it at least the support threshold's probability (batch-constrained
filtering, Fujimoto, Meger & Precup 2019).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from regimewise.protocol import Protocol
from regimewise.regime.clinical_rules import ClinicalRuleSet


def permitted_actions(behaviour_proba, support_threshold, rule_permitted=None) -> np.ndarray:
    """(n, K) mask of the actions the rule permits: the clinical rules allow it (``rule_permitted``, all True if
    None) and usual care's probability is at least ``support_threshold``."""
    proba = np.asarray(behaviour_proba, dtype=float)
    supported = proba >= support_threshold
    return supported if rule_permitted is None else supported & np.asarray(rule_permitted, dtype=bool)


def protocol_permitted(protocol: Protocol, decisions: pd.DataFrame, behaviour_proba) -> np.ndarray:
    """The permitted actions at each decision under the protocol's clinical rules and support threshold."""
    rules = ClinicalRuleSet.from_protocol(protocol).permitted(decisions)
    return permitted_actions(behaviour_proba, protocol.constraints.support_threshold, rules)


def constrained_choice(score, behaviour_proba, support_threshold, rule_permitted=None):
    """Best permitted action per row, the best action ignoring the support constraint, and fallback rows.

    An action is permitted if its score (Q, or a pessimistic Q) is defined, the clinical rules allow it
    (``rule_permitted``, all True if None) and usual care gives it probability >= the support threshold
    (batch-constrained filtering, Fujimoto, Meger & Precup 2019). Without a permitted action, the choice is
    usual care's most likely action among the defined, rule-permitted ones (among the defined ones if the
    rules leave none).

    Returns
    -------
    choice, unconstrained, none_permitted : ndarray, shape (n,)
        ``unconstrained`` is the best defined, rule-permitted action without the support constraint (the
        fallback where the rules leave no defined action).
    """
    return _choices(score, behaviour_proba, support_threshold, rule_permitted, True)


def permitted_choice(score, behaviour_proba, support_threshold, rule_permitted=None) -> np.ndarray:
    """The choice of :func:`constrained_choice` alone (the best permitted action, or the fallback), without the
    unconstrained best action it also finds: the backward induction asks for the choice at every step."""
    return _choices(score, behaviour_proba, support_threshold, rule_permitted, False)[0]


def _choices(score, behaviour_proba, support_threshold, rule_permitted, with_unconstrained):
    """:func:`constrained_choice` (``unconstrained`` None unless ``with_unconstrained``).

    The fallback (usual care's most likely action) is found at the rows without a permitted action only: every
    other row takes its best permitted action. Rows without a defined, rule-permitted action have no permitted
    one either, so those rows are also all the rows whose unconstrained action is the fallback. Each row's
    argmax sees the same row of scores or probabilities as over the whole table, so the choices are the same.
    """
    fitted = ~np.isnan(score)
    allowed = fitted if rule_permitted is None else fitted & np.asarray(rule_permitted, dtype=bool)
    permitted = allowed & permitted_actions(behaviour_proba, support_threshold)
    none_permitted = ~permitted.any(axis=1)
    choice = np.where(permitted, score, -np.inf).argmax(axis=1)
    unconstrained = np.where(allowed, score, -np.inf).argmax(axis=1) if with_unconstrained else None
    rows = np.flatnonzero(none_permitted)
    if rows.size:
        allowed_here = allowed[rows]
        any_allowed = allowed_here.any(axis=1)
        fallback_set = np.where(any_allowed[:, None], allowed_here, fitted[rows])
        fallback = np.where(fallback_set, np.asarray(behaviour_proba)[rows], -np.inf).argmax(axis=1)
        choice[rows] = fallback
        if with_unconstrained:
            unconstrained[rows] = np.where(any_allowed, unconstrained[rows], fallback)
    return choice, unconstrained, none_permitted
