"""Standardised mean differences (Austin 2009, Stat Med; weighted: Austin & Stuart 2015) of every state between
usual care's actions, before and after inverse-probability weighting, at every decision point.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from regimewise.core.features import action_codes, dummy_name, level_values
from regimewise.core.weighting import inverse_probability_weights
from regimewise.usual_care.metrics import probability_of_taken

SMD_FLAG = 0.1  # Austin (2009): |SMD| >= 0.1 signals a meaningful imbalance (common practice)


def _weighted_moments(x, w, binary):
    """Weighted mean and variance; the variance is Austin & Stuart's (2015) unbiased weighted form."""
    w = np.asarray(w, dtype=float)
    return _moments(x, w, np.sum(w), binary, lambda: np.sum(w**2))


def _moments(x, w, total, binary, squares):
    """:func:`_weighted_moments` given the weights' sum ``total`` and a function giving the sum of their squares;
    ``w=None`` for unit weights (``total`` is then the count: multiplying by 1.0 changes no bit)."""
    x = np.asarray(x, dtype=float)
    mean = float(np.sum(x if w is None else w * x) / total)
    if binary:
        return mean, mean * (1.0 - mean)
    denominator = total**2 - squares()
    if denominator <= 0:
        return mean, float("nan")
    deviation = (x - mean) ** 2
    return mean, float(total / denominator * np.sum(deviation if w is None else w * deviation))


def weighted_smd(x1, x0, w1, w0, binary=False):
    r"""Weighted standardised mean difference of group 1 versus group 0 (Austin & Stuart 2015).

    .. math:: d = (\bar x_{1w} - \bar x_{0w}) / \sqrt{(s_{1w}^2 + s_{0w}^2) / 2},\quad
              s_w^2 = \frac{\sum w}{(\sum w)^2 - \sum w^2} \sum w (x - \bar x_w)^2

    and :math:`s_w^2 = \hat p_w (1 - \hat p_w)` for a binary variable. With all weights 1 it is the unweighted
    SMD of Austin (2009). Returns ``None`` when a group has fewer than two members; 0 when both groups are
    constant at the same value.

    Examples
    --------
    >>> round(weighted_smd([1.0, 2.0, 3.0], [0.0, 1.0, 2.0], [1, 1, 1], [1, 1, 1]), 6)
    1.0
    """
    if len(x1) < 2 or len(x0) < 2:
        return None
    return _difference(_weighted_moments(x1, w1, binary), _weighted_moments(x0, w0, binary))


def _difference(moments1, moments0):
    """The standardised difference of two groups' (mean, variance), as :func:`weighted_smd` defines it."""
    (m1, v1), (m0, v0) = moments1, moments0
    spread = np.sqrt((v1 + v0) / 2.0)
    if not np.isfinite(spread):
        return None
    if spread == 0:
        return 0.0 if m1 == m0 else None
    return float((m1 - m0) / spread)


def smd(x1, x0, binary=False):
    """Standardised mean difference (Austin 2009): :func:`weighted_smd` with unit weights.

    Examples
    --------
    >>> smd([1, 1, 0, 0], [1, 0, 0, 0], binary=True) == (0.5 - 0.25) / ((0.25 + 0.1875) / 2) ** 0.5
    True
    """
    return weighted_smd(x1, x0, np.ones(len(x1)), np.ones(len(x0)), binary)


# ---------------------------------------------------------------------------------------------- balance
@dataclass(frozen=True)
class StateColumn:
    """One described column of a state: a numeric state itself, or one level of a categorical state (0/1)."""

    state: object
    name: str
    label: str
    values: np.ndarray
    binary: bool


def state_columns(decisions, state) -> list[StateColumn]:
    """The columns describing a state: the state itself, or for a categorical state one 0/1 column per level
    present in ``decisions`` (the reference included; a level merged away as rare is absent), named
    ``<state>[<level>]``, whose mean is the level's share."""
    if state.kind != "categorical":
        values = decisions[state.name].to_numpy(dtype=float)
        return [StateColumn(state, state.name, state.label, values, state.kind == "binary")]
    text = level_values(decisions, state.name, state.coded_levels)
    columns = []
    for level in state.coded_levels:
        values = (text == level).astype(float)
        if values.any():
            columns.append(StateColumn(state, dummy_name(state.name, level), f"{state.label}: {level}", values, True))
    return columns


def balance_by_step(decisions, proba, protocol):
    """Unweighted and inverse-probability-weighted SMDs of every state at every decision point.

    At step ``t`` the states at ``t`` are compared between each non-reference action taken at ``t`` and the
    reference action, unweighted (Austin 2009) and with weights ``1 / p(action taken | state)`` from the
    usual-care model (Austin & Stuart 2015). |SMD| >= 0.1 is flagged.
    """
    labels = list(protocol.action_labels)
    codes = action_codes(decisions, protocol.action_labels)
    weights = inverse_probability_weights(probability_of_taken(proba, codes))
    steps = decisions["step"].to_numpy()
    out = {}
    for t in np.unique(steps):
        rows = np.flatnonzero(steps == t)
        groups = [_Group(rows[codes[rows] == k], weights) for k in range(len(labels))]
        states = {
            column.name: _state_balance(column.values, groups, labels, column.binary)
            for s in protocol.states
            for column in state_columns(decisions, s)
        }
        out[str(int(t))] = {
            "decisions": int(rows.size),
            "states": states,
            "n_flagged_unweighted": sum(
                v["max_abs_unweighted"] is not None and v["max_abs_unweighted"] >= SMD_FLAG for v in states.values()
            ),
            "n_flagged_weighted": sum(
                v["max_abs_weighted"] is not None and v["max_abs_weighted"] >= SMD_FLAG for v in states.values()
            ),
        }
    return out


class _Group:
    """The decisions of one action at one step (row numbers in the records' order) with their weights, and the
    sums of the weights that every state's moments reuse."""

    def __init__(self, rows, weights):
        self.rows = rows
        self.weights = weights[rows]
        self.count = np.float64(rows.size)  # the sum of unit weights
        self.total = np.sum(self.weights)
        self._squares = None

    def squares(self):
        if self._squares is None:
            self._squares = np.sum(self.weights**2)
        return self._squares

    def moments(self, values, binary):
        """The group's unweighted and weighted (mean, variance) of ``values`` (every decision's)."""
        x = values[self.rows]
        unit = _moments(x, None, self.count, binary, lambda: self.count)
        return unit, _moments(x, self.weights, self.total, binary, self.squares)


def _state_balance(values, groups, labels, binary):
    """One state's SMDs at a step between each action's group and the reference's (``groups[0]``)."""
    unweighted, weighted = {}, {}
    ref = groups[0]
    for group, label in zip(groups[1:], labels[1:], strict=True):
        if group.rows.size < 2 or ref.rows.size < 2:
            unweighted[label] = weighted[label] = None
            continue
        (unit1, weighted1), (unit0, weighted0) = group.moments(values, binary), ref.moments(values, binary)
        unweighted[label] = _difference(unit1, unit0)
        weighted[label] = _difference(weighted1, weighted0)

    def largest(values):
        finite = [abs(v) for v in values.values() if v is not None]
        return max(finite) if finite else None

    return {
        "unweighted": unweighted,
        "weighted": weighted,
        "max_abs_unweighted": largest(unweighted),
        "max_abs_weighted": largest(weighted),
    }
