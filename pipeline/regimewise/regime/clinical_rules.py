"""Clinical rules of the protocol as masks of permitted actions.

A rule forbids some actions at decisions where all its structured conditions hold (a state below, at most,
above or at least a value, or in / not in a set: numbers, or the levels of a categorical state, which takes no
other comparison). The intensity limit forbids every action whose ordinal intensity change exceeds
``max_intensity_change`` in absolute value. Nothing here evaluates text as code: each comparison is one of a fixed
set of numpy functions.

The permitted set at a decision is the intersection of these rules with the support constraint
(:func:`regimewise.regime.permitted.constrained_choice`); when it is empty the regime falls back to the most likely
rule-permitted usual-care action.

Research use only: rules restrict what a learned regime may suggest; they do not make it medical advice.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.errors import UserInputError
from regimewise.protocol.comparators import condition_holds, condition_words
from regimewise.protocol.model import Protocol
from regimewise.protocol.sections import ClinicalRule


def rule_applies(rule: ClinicalRule, frame: pd.DataFrame) -> np.ndarray:
    """Boolean array: decisions at which every condition of ``rule`` holds."""
    applies = np.ones(len(frame), dtype=bool)
    for condition in rule.when:
        if condition.state not in frame:
            raise UserInputError(
                f"clinical rule {rule.name!r} needs state column {condition.state!r}, which the table lacks; "
                "pass the protocol's state columns."
            )
        applies &= condition_holds(condition, frame[condition.state].to_numpy())
    return applies


def describe_rule(rule: ClinicalRule) -> str:
    """Plain words, e.g. 'no step_up, add_agent when potassium > 5.5'."""
    return f"no {', '.join(rule.forbid)} when {' and '.join(condition_words(c) for c in rule.when)}"


@dataclass(frozen=True)
class ClinicalRuleSet:
    """The protocol's clinical rules and intensity limit, ready to mask actions."""

    rules: tuple[ClinicalRule, ...]
    action_labels: tuple[str, ...]
    intensity_allowed: tuple[bool, ...]

    @classmethod
    def from_protocol(cls, protocol: Protocol) -> ClinicalRuleSet:
        limit = protocol.constraints.max_intensity_change
        allowed = tuple(limit is None or abs(a.intensity) <= limit for a in protocol.actions)
        return cls(tuple(protocol.constraints.clinical_rules), protocol.action_labels, allowed)

    @property
    def is_empty(self) -> bool:
        return not self.rules and all(self.intensity_allowed)

    def permitted(self, frame: pd.DataFrame) -> np.ndarray:
        """Boolean (n, K): action k is allowed by every rule and the intensity limit at each decision."""
        mask = np.tile(np.asarray(self.intensity_allowed, dtype=bool), (len(frame), 1))
        index = {label: k for k, label in enumerate(self.action_labels)}
        for rule in self.rules:
            applies = rule_applies(rule, frame)
            for label in rule.forbid:
                mask[applies, index[label]] = False
        return mask

    def violations(self, frame: pd.DataFrame, actions: np.ndarray) -> np.ndarray:
        """Boolean (n,): the given action codes break a rule or the intensity limit."""
        actions = np.asarray(actions, dtype=np.int64)
        return ~self.permitted(frame)[np.arange(len(frame)), actions]

    def counts(self, frame: pd.DataFrame) -> dict:
        """Decisions at which each rule applies (JSON-ready), and where the rules leave no action."""
        return {
            "by_rule": {r.name: int(rule_applies(r, frame).sum()) for r in self.rules},
            "decisions_with_no_rule_permitted_action": int((~self.permitted(frame).any(axis=1)).sum()),
        }

    def to_dict(self) -> dict:
        return {
            "rules": [{"name": r.name, "text": describe_rule(r), "reason": r.reason} for r in self.rules],
            "intensity_allowed": dict(zip(self.action_labels, self.intensity_allowed)),
        }
