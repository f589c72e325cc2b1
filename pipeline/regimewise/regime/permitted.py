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
    fitted = ~np.isnan(score)
    allowed = fitted if rule_permitted is None else fitted & np.asarray(rule_permitted, dtype=bool)
    permitted = fitted & permitted_actions(behaviour_proba, support_threshold, rule_permitted)
    none_permitted = ~permitted.any(axis=1)
    best = np.where(permitted, score, -np.inf).argmax(axis=1)
    fallback_set = np.where(allowed.any(axis=1)[:, None], allowed, fitted)
    fallback = np.where(fallback_set, behaviour_proba, -np.inf).argmax(axis=1)
    unconstrained = np.where(allowed.any(axis=1), np.where(allowed, score, -np.inf).argmax(axis=1), fallback)
    return np.where(none_permitted, fallback, best), unconstrained, none_permitted
