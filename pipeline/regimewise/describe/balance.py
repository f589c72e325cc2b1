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
    x = np.asarray(x, dtype=float)
    w = np.asarray(w, dtype=float)
    mean = float(np.sum(w * x) / np.sum(w))
    if binary:
        return mean, mean * (1.0 - mean)
    denominator = np.sum(w) ** 2 - np.sum(w**2)
    if denominator <= 0:
        return mean, float("nan")
    return mean, float(np.sum(w) / denominator * np.sum(w * (x - mean) ** 2))


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
    m1, v1 = _weighted_moments(x1, w1, binary)
    m0, v0 = _weighted_moments(x0, w0, binary)
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
        rows = steps == t
        states = {
            column.name: _state_balance(column.values[rows], codes[rows], weights[rows], labels, column.binary)
            for s in protocol.states
            for column in state_columns(decisions, s)
        }
        out[str(int(t))] = {
            "decisions": int(rows.sum()),
            "states": states,
            "n_flagged_unweighted": sum(
                v["max_abs_unweighted"] is not None and v["max_abs_unweighted"] >= SMD_FLAG for v in states.values()
            ),
            "n_flagged_weighted": sum(
                v["max_abs_weighted"] is not None and v["max_abs_weighted"] >= SMD_FLAG for v in states.values()
            ),
        }
    return out


def _state_balance(x, codes, weights, labels, binary):
    unweighted, weighted = {}, {}
    ref = codes == 0
    for k, label in enumerate(labels[1:], start=1):
        grp = codes == k
        unweighted[label] = smd(x[grp], x[ref], binary)
        weighted[label] = weighted_smd(x[grp], x[ref], weights[grp], weights[ref], binary)

    def largest(values):
        finite = [abs(v) for v in values.values() if v is not None]
        return max(finite) if finite else None

    return {
        "unweighted": unweighted,
        "weighted": weighted,
        "max_abs_unweighted": largest(unweighted),
        "max_abs_weighted": largest(weighted),
    }
