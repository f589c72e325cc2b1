"""The protocol's ``comparators``: strategies a user names, such as a guideline rule, written in the grammar of the
clinical rules (structured conditions on the states, never expression strings).

A comparator is an ordered list of rules, each a list of conditions that must all hold and the action to take
then, and an ``otherwise`` action for decisions where no rule applies; the first rule that applies decides. It is
one more deterministic regime: every estimator evaluates it, the bootstrap gives it intervals, and (with a
``survival`` section) it gets a survival curve, as the fixed 'always <action>' strategies do.

At protocol load :func:`comparator_problem` checks a comparator against the protocol: its states and actions are
declared, no action breaks the intensity limit, every rule can apply (an earlier rule does not cover it) and no
rule prescribes an action a clinical rule forbids in a state where both apply. The check is exact: it evaluates
the comparator and the clinical rules on every cell of the grid the conditions' thresholds cut each state's
plausible range into (each cell's decisions are the same for every value inside it).
"""

from __future__ import annotations

import itertools
from typing import Annotated

import numpy as np
from pydantic import Field

from regimewise.protocol.sections import StateCondition
from regimewise.protocol.types import FreeText, Identifier, ShortText, Strict, level_text

_COMPARE = {"below": np.less, "at_most": np.less_equal, "above": np.greater, "at_least": np.greater_equal}
_SYMBOLS = {"below": "<", "at_most": "≤", "above": ">", "at_least": "≥", "in": "in", "not_in": "not in"}
MAX_CHECKED_CELLS = 2_000_000  # grid cells the load-time check evaluates at most
RESERVED_NAMES = ("learned", "usual_care")


def condition_holds(condition: StateCondition, values) -> np.ndarray:
    """Boolean array: where ``condition`` holds for the state values ``values`` (numbers, or a categorical
    state's levels as text)."""
    values = np.asarray(values)
    if condition.comparison in _COMPARE:
        return _COMPARE[condition.comparison](values.astype(float), condition.value)
    if values.dtype.kind in "OUST":  # a categorical state's levels (the protocol checked the listed ones)
        inside = np.isin(values.astype(str), [level_text(v) for v in condition.values])
    else:
        inside = np.isin(values.astype(float), np.asarray(condition.values, dtype=float))
    return inside if condition.comparison == "in" else ~inside


def conditions_hold(conditions, columns) -> np.ndarray:
    """Boolean array: where every condition holds; ``columns`` maps each state name to its values."""
    out = None
    for c in conditions:
        holds = condition_holds(c, columns[c.state])
        out = holds if out is None else out & holds
    return out


def condition_words(condition: StateCondition, label: str | None = None, unit: str = "") -> str:
    """'systolic blood pressure > 140 mmHg' (the state's label, in lower case, when given)."""
    name = condition.state if label is None else label[:1].lower() + label[1:]
    if condition.values is None:
        operand = f"{condition.value:g}{f' {unit}' if unit else ''}"
    else:
        operand = "{" + ", ".join(v if isinstance(v, str) else f"{v:g}" for v in condition.values) + "}"
    return f"{name} {_SYMBOLS[condition.comparison]} {operand}"


class ComparatorRule(Strict):
    """Take ``action`` at decisions where every condition holds (unless an earlier rule applied)."""

    when: Annotated[list[StateCondition], Field(min_length=1, max_length=10)] = Field(
        description="conditions that must all hold for the rule to apply"
    )
    action: Identifier = Field(description="action label taken where the rule applies")


class Comparator(Strict):
    """A strategy the protocol names (e.g. a guideline rule): ordered rules, then a default action."""

    name: Identifier = Field(description="short name of the strategy in the outputs (not learned or usual_care)")
    label: ShortText = Field(description="name shown in the report, e.g. 'Guideline rule'")
    rules: Annotated[list[ComparatorRule], Field(min_length=1, max_length=30)] = Field(
        description="checked in order at each decision; the first rule whose conditions all hold decides"
    )
    otherwise: Identifier = Field(description="action label taken where no rule applies")
    source: Annotated[FreeText, Field(max_length=300)] = Field(
        "", description="where the rule comes from (a guideline and its year), shown in the report"
    )

    @property
    def actions(self) -> tuple[str, ...]:
        return (*(r.action for r in self.rules), self.otherwise)

    def choose(self, columns, n: int) -> np.ndarray:
        """Index of the deciding rule at each of ``n`` decisions (len(rules) where ``otherwise`` decides)."""
        out = np.full(n, len(self.rules), dtype=np.int64)
        for k in reversed(range(len(self.rules))):  # the first applying rule wins: write it last
            out[conditions_hold(self.rules[k].when, columns)] = k
        return out

    def action_codes(self, columns, n: int, action_labels) -> np.ndarray:
        """The comparator's action code (position in ``action_labels``) at each of ``n`` decisions."""
        codes = np.asarray([list(action_labels).index(a) for a in self.actions], dtype=np.int64)
        return codes[self.choose(columns, n)]

    def words(self, states=()) -> str:
        """The strategy in clinical words, rule by rule (state labels and units from ``states`` when given)."""
        by_name = {s.name: s for s in states}

        def condition(c):
            state = by_name.get(c.state)
            return condition_words(c, None if state is None else state.label, "" if state is None else state.unit)

        parts = [f"{_verb(r.action)} when {' and '.join(map(condition, r.when))}" for r in self.rules]
        return "; otherwise ".join(parts) + f"; otherwise {_verb(self.otherwise)}"


def _verb(label: str) -> str:
    return label.replace("_", " ")


# ---------------------------------------------------------------------------------------------- load-time check
def comparator_problem(index: int, comparator: Comparator, states, actions, constraints) -> str | None:
    """One line naming the first problem of ``comparators[index]`` against the protocol, or None."""
    where = f"comparators[{index}]"
    if comparator.name in RESERVED_NAMES or comparator.name.startswith("always_"):
        return f"{where}.name: {comparator.name!r} is the name of a built-in regime; choose another name"
    labels = [a.label for a in actions]
    kinds = {s.name: s for s in states}
    for k, rule in enumerate(comparator.rules):
        for j, c in enumerate(rule.when):
            if c.state not in kinds:
                path = f"{where}.rules[{k}].when[{j}].state"
                return f"{path}: {c.state!r} is not a declared state; use one of {', '.join(kinds)}"
            problem = _kind_problem(f"{where}.rules[{k}].when[{j}]", c, kinds[c.state])
            if problem:
                return problem
    paths = [*(f"{where}.rules[{k}].action" for k in range(len(comparator.rules))), f"{where}.otherwise"]
    limit = constraints.max_intensity_change
    for path, label in zip(paths, comparator.actions):
        if label not in labels:
            return f"{path}: {label!r} is not a declared action; use one of {', '.join(labels)}"
        intensity = actions[labels.index(label)].intensity
        if limit is not None and intensity is not None and abs(intensity) > limit:
            return (
                f"{path}: {label!r} changes intensity by {intensity}, beyond constraints.max_intensity_change ({limit})"
            )
    return _grid_problem(where, comparator, kinds, labels, constraints.clinical_rules)


def _shown(value) -> str:
    return value if isinstance(value, str) else f"{value:g}"


def _kind_problem(path: str, condition, state) -> str | None:
    """A condition on a categorical state is ``in`` / ``not_in`` some of its levels; on a numeric state it compares
    numbers (the same rule as for the clinical rules)."""
    if state.kind != "categorical":
        if condition.values is not None and any(isinstance(v, str) for v in condition.values):
            return f"{path}.values: {state.name!r} is a {state.kind} state and compares numbers, not text"
        return None
    if condition.comparison not in ("in", "not_in"):
        return (
            f"{path}.comparison: {condition.comparison!r} needs an ordered number, but {state.name!r} is "
            "categorical; write comparison: in (or not_in) with values: [its levels]"
        )
    unknown = [v for v in map(level_text, condition.values) if v not in state.coded_levels]
    if unknown:
        return f"{path}.values: {unknown[0]!r} is not one of the levels of {state.name!r} {list(state.coded_levels)}"
    return None


def _cuts(name: str, conditions) -> set[float]:
    out = set()
    for c in conditions:
        if c.state == name and not (c.values is not None and any(isinstance(v, str) for v in c.values)):
            out |= {float(c.value)} if c.values is None else set(map(float, c.values))
    return out


def _representatives(state, cuts: set[float]) -> np.ndarray:
    """One value of each cell the cut points divide the state's plausible range into (whole numbers only for an
    integer or binary state; every level of a categorical state)."""
    if state.kind == "categorical":
        return np.asarray(state.coded_levels, dtype=object)
    low, high = map(float, state.plausible_range)
    points = sorted({low, high, *(x for x in cuts if low <= x <= high)})
    gaps = [(a + b) / 2 for a, b in zip(points, points[1:])]
    if state.kind == "continuous":
        return np.asarray(sorted({*points, *gaps}))
    whole = {float(x) for x in points if float(x).is_integer()}
    for a, b in zip(points, points[1:]):
        inside = np.floor(a) + 1
        if inside < b:
            whole.add(float(inside))
    if low > np.floor(low) and np.ceil(low) <= high:
        whole.add(float(np.ceil(low)))
    return np.asarray(sorted(whole))


def _grid_problem(where, comparator: Comparator, kinds, labels, clinical_rules) -> str | None:
    conditions = [c for r in comparator.rules for c in r.when] + [c for r in clinical_rules for c in r.when]
    names = list(dict.fromkeys(c.state for c in conditions))
    axes = [_representatives(kinds[n], _cuts(n, conditions)) for n in names]
    if np.prod([len(a) for a in axes], dtype=float) > MAX_CHECKED_CELLS:
        return (
            f"{where}: its conditions and the clinical rules cut the states into more than {MAX_CHECKED_CELLS:,} "
            "cells, too many to check; use fewer thresholds"
        )
    cells = list(itertools.product(*axes))
    columns = {
        n: np.asarray([cell[i] for cell in cells], dtype=object if kinds[n].kind == "categorical" else float)
        for i, n in enumerate(names)
    }
    n = len(cells)
    chosen = comparator.choose(columns, n)
    for k in range(len(comparator.rules)):
        if not np.any(chosen == k):
            return (
                f"{where}.rules[{k}]: never applies (its conditions cannot hold together within the states' "
                "plausible ranges, or earlier rules cover every state where they hold); correct or remove it"
            )
    actions = np.asarray(comparator.actions)[chosen]
    for rule in clinical_rules:
        clash = conditions_hold(rule.when, columns) & np.isin(actions, rule.forbid)
        if np.any(clash):
            row = int(np.flatnonzero(clash)[0])
            k = int(chosen[row])
            path = f"{where}.otherwise" if k == len(comparator.rules) else f"{where}.rules[{k}]"
            example = ", ".join(f"{c.state} {_shown(columns[c.state][row])}" for c in rule.when)
            return (
                f"{path}: prescribes {actions[row]} where clinical rule {rule.name!r} forbids it (e.g. {example}); "
                "add a condition that excludes those states or a rule before it"
            )
    return None
