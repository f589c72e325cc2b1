"""Missing state values, handled per variable as the protocol says (``data.missing``).

Policies:

- ``refuse`` (default): a missing value is a validation error.
- ``drop``: drop the decision point with the missing value and every later decision point of its episode, so the
  remaining steps stay consecutive (a complete-case analysis of the episode prefix; the dropped part is counted).
- ``carry_forward``: fill with the same episode's most recent observed value (last observation carried forward);
  a value missing at an episode's first decision cannot be filled and is still refused.
- ``indicator``: fill with the observed median of the variable and add a 0/1 column ``<state>_missing``
  (missing-indicator method; Groenwold et al., CMAJ 2012;184(11):1265-9, discuss when it is biased). The
  usual-care model and the Q-model take the column as an extra binary covariate
  (:class:`regimewise.core.features.StateScaler`), unless it is constant in the training decisions.

Counts of every action go to validation.json. Rows keep their original index, so later findings name the file's
own row numbers.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from regimewise.core.features import indicator_name
from regimewise.data.distinct import FIND, blank_text, broadcast, distinct_text
from regimewise.protocol.loading import ProtocolFile

POLICIES = ("refuse", "drop", "carry_forward", "indicator")


def _missing_mask(values: pd.Series) -> np.ndarray:
    """Missing or blank cells (blank text is checked on the distinct values only, for speed)."""
    missing = values.isna().to_numpy()
    if pd.api.types.is_numeric_dtype(values):
        return missing
    return missing | blank_mask(values)


def blank_mask(values: pd.Series, distinct=FIND) -> np.ndarray:
    """Cells holding only whitespace (a text column's distinct values are checked once each, all at once).

    ``distinct``, when given, is the column's :func:`regimewise.data.distinct.distinct_text`, already found.
    """
    if distinct is FIND:
        distinct = distinct_text(values)
    if distinct is not None:
        codes, uniques = distinct
        return broadcast(blank_text(uniques), codes, False)
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    blank = np.array([str(u).strip() == "" for u in uniques], dtype=bool)
    return np.append(blank, False)[codes]


def _episode_order(frame: pd.DataFrame, episode: str, step: str) -> np.ndarray:
    """Row positions sorted by episode, then step (unparsable steps last; validation reports them)."""
    steps = pd.to_numeric(frame[step], errors="coerce").to_numpy(dtype=float)
    return np.lexsort((np.nan_to_num(steps, nan=np.inf), frame[episode].astype(str).to_numpy()))


def apply_missing_policy(pf: ProtocolFile, frame: pd.DataFrame) -> tuple[pd.DataFrame, dict]:
    """The decisions table after the protocol's missing-data actions, and a count of each action per state."""
    p = pf.protocol
    cols = p.data.columns
    policies = {s.name: p.data.missing.get(s.name, "refuse") for s in p.states}
    counts: dict = {}
    if cols.episode_id not in frame.columns or cols.step not in frame.columns:
        return frame, counts
    if any(policy in ("carry_forward", "indicator") for policy in policies.values()):
        frame = frame.copy()  # these two fill columns in place; the caller's table stays as read
    for state in p.states:
        policy = policies[state.name]
        column = state.source_column
        if column not in frame.columns:
            continue
        missing = _missing_mask(frame[column])
        entry = {"policy": policy, "missing": int(missing.sum())}
        if policy == "drop" and missing.any():
            frame, entry["decisions_dropped"], entry["episodes_emptied"] = _drop_rest(frame, missing, cols)
        elif policy == "carry_forward" and missing.any():
            frame, entry["filled"] = _carry_forward(frame, column, cols)
        elif policy == "indicator":
            frame, entry["filled"] = _indicator(frame, column, state.name, missing)
        counts[state.name] = entry
    return frame, counts


def _drop_rest(frame: pd.DataFrame, missing: np.ndarray, cols) -> tuple[pd.DataFrame, int, int]:
    """Drop each flagged decision and all later ones in its episode."""
    order = _episode_order(frame, cols.episode_id, cols.step)
    episodes = frame[cols.episode_id].astype(str).to_numpy()[order]
    flagged = pd.Series(missing[order]).groupby(episodes, sort=False).cummax().to_numpy(dtype=bool)
    keep = np.ones(len(frame), dtype=bool)
    keep[order[flagged]] = False
    before = frame[cols.episode_id].astype(str).nunique()
    kept = frame.iloc[np.flatnonzero(keep)]
    emptied = before - kept[cols.episode_id].astype(str).nunique()
    return kept, int((~keep).sum()), int(emptied)


def _carry_forward(frame: pd.DataFrame, column: str, cols) -> tuple[pd.DataFrame, int]:
    order = _episode_order(frame, cols.episode_id, cols.step)
    ordered = frame.iloc[order]
    values = ordered[column].mask(_missing_mask(ordered[column]))
    filled = values.groupby(ordered[cols.episode_id].astype(str).to_numpy(), sort=False).ffill()
    n_filled = int(values.isna().sum() - filled.isna().sum())
    frame = frame.copy()
    frame.loc[filled.index, column] = filled
    return frame, n_filled


def _indicator(frame: pd.DataFrame, column: str, name: str, missing: np.ndarray) -> tuple[pd.DataFrame, int]:
    numbers = pd.to_numeric(frame[column].mask(missing), errors="coerce")
    fill = float(numbers.median()) if numbers.notna().any() else 0.0
    frame = frame.copy()
    frame[indicator_name(name)] = missing.astype(np.int64)
    frame[column] = frame[column].mask(missing, fill)
    return frame, int(missing.sum())
