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

from regimewise.core.features import action_codes
from regimewise.describe.balance import SMD_FLAG, smd, state_columns
from regimewise.describe.suppression import suppress_cells


# ---------------------------------------------------------------------------------------------- cohort table
def _count_text(n, suppressed, total=None):
    if suppressed:
        return "suppressed"
    if total is None:
        return f"{int(n):,}"
    return f"{int(n):,} ({100.0 * n / total:.1f}%)" if total > 0 else f"{int(n):,}"


def cohort_table(decisions, protocol, episodes=None):
    """Baseline (step-0) characteristics overall and by first action, with SMDs and small-cell suppression.

    A categorical state gives one row per level (every level, the reference included): its count and share in
    each group, compared between groups as a binary state, never as a mean of codes.

    Every non-reference action is compared with the reference action (the protocol's first). Group sizes and
    binary counts go through :func:`suppress_cells` (threshold ``report.min_cell_count``); a primary
    suppressed cell shows as ``<threshold``, a complementary one as ``suppressed``. Means and SMDs of a group
    whose size is suppressed are not shown. With an episodes table holding follow-up and events, two more rows
    give the follow-up in days (median and interquartile range) and the events (count and %).
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
    rows = [
        _state_row(baseline, column, codes, labels, sizes, size_mask, shown, threshold)
        for s in protocol.states
        for column in state_columns(baseline, s)
    ]
    rows += outcome_rows(baseline, episodes, codes, labels, sizes, size_mask, shown, threshold)
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


def outcome_rows(baseline, episodes, codes, labels, sizes, size_mask, shown, threshold) -> list[dict]:
    """Follow-up (median and IQR, days) and events (count and %) by first action, when the episodes have them."""
    if episodes is None or not {"followup_days", "event"} <= set(episodes.columns):
        return []
    joined = baseline[["episode_id"]].merge(episodes, on="episode_id", how="left", validate="one_to_one")
    follow = joined["followup_days"].to_numpy(dtype=float)
    groups = [np.ones(len(follow), dtype=bool), *[codes == k for k in range(len(labels))]]
    names = ["overall", *labels]
    cells = {
        name: _median_iqr(follow[rows]) if name == "overall" or shown[name] else "—"
        for name, rows in zip(names, groups, strict=True)
    }
    events = _binary_cells(joined["event"].to_numpy(dtype=float), codes, sizes, size_mask, threshold)
    no_smd = {a: None for a in labels[1:]}
    return [
        {
            "state": "followup_days",
            "label": "Follow-up, median (IQR)",
            "kind": "outcome",
            "unit": "days",
            "cells": cells,
            "smd": no_smd,
            "max_abs_smd": None,
            "flag": False,
        },
        {
            "state": "event",
            "label": "Events during follow-up",
            "kind": "outcome",
            "unit": None,
            "cells": dict(zip(names, events, strict=True)),
            "smd": no_smd,
            "max_abs_smd": None,
            "flag": False,
        },
    ]


def _median_iqr(values) -> str:
    if values.size == 0:
        return "—"
    q1, median, q3 = np.percentile(values, [25, 50, 75])
    return f"{median:,.0f} ({q1:,.0f}–{q3:,.0f})"


def _primary_or(n, suppressed, threshold):
    if 0 < n < threshold:
        return f"<{threshold}"
    return _count_text(n, suppressed)


def _state_row(baseline, column, codes, labels, sizes, size_mask, shown, threshold):
    state, x = column.state, column.values
    binary = column.binary
    reference = labels[0]
    contrasts = {}
    for k, label in enumerate(labels[1:], start=1):
        ok = shown[label] and shown[reference]
        contrasts[label] = smd(x[codes == k], x[codes == 0], binary) if ok else None
    cells = _binary_cells(x, codes, sizes, size_mask, threshold) if binary else _continuous_cells(x, codes, shown)
    finite = [abs(v) for v in contrasts.values() if v is not None]
    return {
        "state": column.name,
        "label": column.label,
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
