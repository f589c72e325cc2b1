"""The cohort table and covariate balance: baseline by first action, SMDs, weighted SMDs, small-cell rules.

References
----------
Austin (2009), Balance diagnostics for comparing the distribution of baseline covariates between treatment
groups in propensity-score matched samples, Stat Med 28:3083 (standardised mean difference; |SMD| >= 0.1
flagged). Austin & Stuart (2015), Moving towards best practice when using inverse probability of treatment
weighting (IPTW) using the propensity score to estimate causal treatment effects in observational studies,
Stat Med 34:3661 (weighted means and variances). Cell suppression with complementary cells and an interval
audit by linear programming: Cox (1980), Suppression methodology and statistical disclosure control, JASA
75:377; Willenborg & de Waal (2001), Elements of Statistical Disclosure Control, ch. 6.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import linprog

from .behaviour import probability_of_taken
from .errors import UserInputError
from .features import action_codes
from .weighting import inverse_probability_weights

__all__ = [
    "SMD_FLAG",
    "balance_by_step",
    "cohort_table",
    "determined_cells",
    "smd",
    "suppress_cells",
    "weighted_smd",
]

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


# ---------------------------------------------------------------------------------------------- suppression
def determined_cells(table, suppressed):
    """Suppressed cells whose value the published cells and the table's totals pin down exactly.

    ``table`` holds non-negative counts with its totals in the last row and last column. For each suppressed
    cell, linear programming finds its smallest and largest value consistent with the published cells,
    non-negativity and the additivity of rows and columns (an interval audit; Willenborg & de Waal 2001,
    section 6.3). A cell whose interval has width 0 can be recovered.

    Returns
    -------
    ndarray of bool, same shape as ``table``
    """
    values = np.asarray(table, dtype=float)
    mask = np.asarray(suppressed, dtype=bool)
    rows, cols = values.shape
    unknown = np.flatnonzero(mask.ravel())
    determined = np.zeros(values.shape, dtype=bool)
    if unknown.size == 0:
        return determined
    index = {cell: j for j, cell in enumerate(unknown)}
    a_eq, b_eq = [], []
    # A table of one row (or column) has no totals row (column): its lines are the other direction only.
    lines = [[(r, c) for c in range(cols - 1)] + [(r, cols - 1)] for r in range(rows)] if cols > 1 else []
    lines += [[(r, c) for r in range(rows - 1)] + [(rows - 1, c)] for c in range(cols)] if rows > 1 else []
    for line in lines:
        coef, rhs = np.zeros(unknown.size), 0.0
        for position, (r, c) in enumerate(line):
            sign = -1.0 if position == len(line) - 1 else 1.0  # parts minus total = 0
            flat = r * cols + c
            if flat in index:
                coef[index[flat]] += sign
            else:
                rhs -= sign * values[r, c]
        if np.any(coef):
            a_eq.append(coef)
            b_eq.append(rhs)
    for flat, j in index.items():
        objective = np.zeros(unknown.size)
        objective[j] = 1.0
        low = linprog(objective, A_eq=a_eq, b_eq=b_eq, bounds=(0, None), method="highs")
        high = linprog(-objective, A_eq=a_eq, b_eq=b_eq, bounds=(0, None), method="highs")
        if not (low.success and high.success):  # unbounded above (every total of its lines hidden): not pinned
            continue
        determined.flat[flat] = bool(-high.fun - low.fun < 0.5)  # counts are integers
    return determined


def suppress_cells(table, threshold, preset=None):
    """Primary and complementary cell suppression for a count table with totals in its last row and column.

    Primary: counts from 1 to ``threshold - 1`` (common practice in public-use health data, no source for the
    default 11). Complementary: while a row or column holds exactly one suppressed cell, the smallest positive
    published cell of that line is suppressed too; then an interval audit (:func:`determined_cells`) checks
    that no suppressed cell can be recovered from the published cells and totals, and suppresses the smallest
    positive published cell in the row of any that can, until none can.

    Parameters
    ----------
    table : array_like of int, shape (R + 1, C + 1)
        Counts; the last row and column are the totals.
    threshold : int
    preset : array_like of bool, optional
        Cells already suppressed (e.g. in another table sharing a margin).

    Returns
    -------
    ndarray of bool
    """
    values = np.asarray(table, dtype=float)
    if values.ndim != 2 or np.any(values < 0):
        raise UserInputError("suppress_cells needs a 2-D table of non-negative counts with totals last")
    mask = (values > 0) & (values < threshold)
    if preset is not None:
        mask |= np.asarray(preset, dtype=bool)
    while True:
        mask = _line_rule(values, mask)
        determined = determined_cells(values, mask)
        if not determined.any():
            return mask
        before = mask.copy()
        r, c = np.argwhere(determined)[0]
        if not _suppress_smallest(values[r], mask[r]):
            mask[r] = True
        if np.array_equal(mask, before):  # the whole row is already hidden: hide the column too
            mask[:, c] = True
        if np.array_equal(mask, before):  # nothing left to hide around that cell
            return mask


def _line_rule(values, mask):
    """Until no line changes: a line with exactly one suppressed cell gets a second one (or, with no positive
    published cell left, is suppressed whole). A line of one cell cannot get a second one and is left as is."""
    changed = True
    while changed:
        changed = False
        for lines_values, lines_mask in ((values, mask), (values.T, mask.T)):
            for line_values, line_mask in zip(lines_values, lines_mask):
                if line_mask.sum() == 1 and line_mask.size > 1:
                    if not _suppress_smallest(line_values, line_mask):
                        line_mask[:] = True
                    changed = True
    return mask


def _suppress_smallest(line_values, line_mask):
    """Suppress the smallest positive published cell of a line (a view); False if there is none."""
    candidates = np.flatnonzero(~line_mask & (line_values > 0))
    if candidates.size == 0:
        return False
    line_mask[candidates[np.argmin(line_values[candidates])]] = True
    return True


# ---------------------------------------------------------------------------------------------- cohort table
def _count_text(n, suppressed, total=None):
    if suppressed:
        return "suppressed"
    if total is None:
        return f"{int(n):,}"
    return f"{int(n):,} ({100.0 * n / total:.1f}%)" if total > 0 else f"{int(n):,}"


def cohort_table(decisions, protocol):
    """Baseline (step-0) characteristics overall and by first action, with SMDs and small-cell suppression.

    Every non-reference action is compared with the reference action (the protocol's first). Group sizes and
    binary counts go through :func:`suppress_cells` (threshold ``report.min_cell_count``); a primary
    suppressed cell shows as ``<threshold``, a complementary one as ``suppressed``. Means and SMDs of a group
    whose size is suppressed are not shown.
    """
    threshold = protocol.report.min_cell_count
    labels = list(protocol.action_labels)
    baseline = decisions[decisions["step"] == 0]
    codes = action_codes(baseline, protocol.action_labels)
    sizes = np.bincount(codes, minlength=len(labels))
    size_table = np.append(sizes, sizes.sum())[None, :]
    size_mask = suppress_cells(size_table, threshold)[0]
    groups = ["overall", *labels]
    shown = {labels[k]: not size_mask[k] and sizes[k] >= 2 for k in range(len(labels))}
    reference = labels[0]
    rows = [_state_row(baseline, s, codes, labels, sizes, size_mask, shown, threshold) for s in protocol.states]
    size_text = [_primary_or(sizes[k], size_mask[k], threshold) for k in range(len(labels))]
    return {
        "groups": groups,
        "reference_action": reference,
        "min_cell_count": threshold,
        "n": dict(zip(groups, [_primary_or(sizes.sum(), size_mask[-1], threshold), *size_text])),
        "rows": rows,
        "smd_flag": SMD_FLAG,
        "n_flagged": int(sum(row["flag"] for row in rows)),
    }


def _primary_or(n, suppressed, threshold):
    if 0 < n < threshold:
        return f"<{threshold}"
    return _count_text(n, suppressed)


def _state_row(baseline, state, codes, labels, sizes, size_mask, shown, threshold):
    x = baseline[state.name].to_numpy(dtype=float)
    binary = state.kind == "binary"
    reference = labels[0]
    contrasts = {}
    for k, label in enumerate(labels[1:], start=1):
        ok = shown[label] and shown[reference]
        contrasts[label] = smd(x[codes == k], x[codes == 0], binary) if ok else None
    cells = _binary_cells(x, codes, sizes, size_mask, threshold) if binary else _continuous_cells(x, codes, shown)
    finite = [abs(v) for v in contrasts.values() if v is not None]
    return {
        "state": state.name,
        "label": state.label,
        "kind": state.kind,
        "unit": state.unit,
        "cells": dict(zip(["overall", *labels], cells)),
        "smd": contrasts,
        "max_abs_smd": max(finite) if finite else None,
        "flag": bool(finite and max(finite) >= SMD_FLAG),
    }


def _continuous_cells(x, codes, shown):
    cells = [f"{x.mean():.1f} ({x.std(ddof=1):.1f})" if x.size > 1 else "—"]
    for k, ok in enumerate(shown.values()):
        group = x[codes == k]
        cells.append(f"{group.mean():.1f} ({group.std(ddof=1):.1f})" if ok else "—")
    return cells


def _binary_cells(x, codes, sizes, size_mask, threshold):
    """'n (%)' per group for a 0/1 state; the table audited has rows with, without and the group sizes."""
    with_ = np.bincount(codes, weights=x, minlength=sizes.size).astype(int)
    table = np.vstack([with_, sizes - with_, sizes])
    table = np.column_stack([table, table.sum(axis=1)])
    preset = np.zeros(table.shape, dtype=bool)
    preset[-1] = size_mask
    mask = suppress_cells(table, threshold, preset=preset)
    hidden = mask[0] | mask[1]
    cells = []
    for j in [table.shape[1] - 1, *range(sizes.size)]:
        n, total = table[0, j], table[2, j]
        primary = 0 < n < threshold or 0 < total - n < threshold
        cells.append(f"<{threshold}" if primary and 0 < n < threshold else _count_text(n, hidden[j], total))
    return cells


# ---------------------------------------------------------------------------------------------- balance
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
            s.name: _state_balance(decisions[s.name].to_numpy(dtype=float)[rows], codes[rows], weights[rows],
                                   labels, s.kind == "binary")  # fmt: skip
            for s in protocol.states
        }
        out[str(int(t))] = {
            "decisions": int(rows.sum()),
            "states": states,
            "n_flagged_unweighted": sum(v["max_abs_unweighted"] is not None and v["max_abs_unweighted"] >= SMD_FLAG
                                        for v in states.values()),  # fmt: skip
            "n_flagged_weighted": sum(v["max_abs_weighted"] is not None and v["max_abs_weighted"] >= SMD_FLAG
                                      for v in states.values()),  # fmt: skip
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

    return {"unweighted": unweighted, "weighted": weighted, "max_abs_unweighted": largest(unweighted),
            "max_abs_weighted": largest(weighted)}  # fmt: skip


def balance_figure(balance, state_labels) -> str:
    """Balance plot: largest |SMD| of each state before (hollow) and after (filled) weighting, per step."""
    from .overlap import _panel_grid
    from .report import _svg

    steps = sorted(balance, key=int)
    fig, axes = _panel_grid(len(steps))
    names = list(state_labels)
    ys = np.arange(len(names))[::-1]
    for ax, step in zip(axes, steps):
        states = balance[step]["states"]
        before = [states[n]["max_abs_unweighted"] for n in names]
        after = [states[n]["max_abs_weighted"] for n in names]
        ax.plot([np.nan if v is None else v for v in before], ys, "o", markerfacecolor="none", color="C0",
                markersize=4, label="unweighted")  # fmt: skip
        ax.plot([np.nan if v is None else v for v in after], ys, "o", color="C1", markersize=3, label="weighted")
        ax.axvline(SMD_FLAG, color="0.6", linestyle=":", linewidth=0.8)
        ax.set_yticks(ys, [state_labels[n] for n in names], fontsize=7)
        ax.set_title(f"decision point {step}")
    fig.supxlabel("largest |standardised mean difference| against the reference action")
    fig.axes[0].legend(frameon=False, fontsize=7)
    return _svg(fig)


# ---------------------------------------------------------------------------------------------- report helpers
def usual_care_summary(behaviour, cohort) -> dict:
    """The usual-care, overlap and balance numbers that summary.json carries (documented in the README)."""
    out = {
        "kind": behaviour["model"]["kind"],
        "brier": behaviour["brier"],
        "folds": behaviour["cross_fitting"]["folds"],
        "probability_floor": behaviour["probability_floor"],
        "inverse_probability_weights_truncated": behaviour["inverse_probability_weights_truncated"],
        "by_step": {
            step: {"auc": d["auc"], "brier": d["brier"], "ess": d["weights"]["before_truncation"]["ess"],
                   "ess_truncated": d["weights"]["after_truncation"]["ess"],
                   "share_taken_below_support": d["share_taken_below_support"]}
            for step, d in behaviour["by_step"].items()
        },
    }  # fmt: skip
    if cohort is not None:
        for step, d in cohort["overlap_by_step"].items():
            balance = cohort["balance_by_step"][step]
            out["by_step"][step].update(
                overlap=d["verdict"],
                share_recommended_below_support=d["share_recommended_below_support"],
                states_imbalanced_unweighted=balance["n_flagged_unweighted"],
                states_imbalanced_weighted=balance["n_flagged_weighted"],
            )
        out["overlap_rule"] = next(iter(cohort["overlap_by_step"].values()))["rule"]
        out["baseline_states_imbalanced"] = cohort["baseline"]["n_flagged"]
    return out


def section_figures(protocol, behaviour, cohort) -> dict:
    """Inline SVG figures of the usual-care and cohort sections (empty strings where there are no data)."""
    from .overlap import overlap_figure, reliability_figure

    labels = {s.name: s.label for s in protocol.states}
    return {
        "reliability": reliability_figure(behaviour["by_step"], protocol.action_labels),
        "overlap": "" if cohort is None else overlap_figure(cohort["overlap_by_step"]),
        "balance": "" if cohort is None else balance_figure(cohort["balance_by_step"], labels),
    }
