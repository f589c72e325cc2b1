"""Small-cell suppression: counts 1 to min_cell_count − 1 hidden (primary), and further cells hidden where a
primary one could be recovered from totals (complementary), checked by linear programming (common practice in
public-use health data, no single source).
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import linprog

from regimewise.errors import UserInputError


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
