"""Checks that span rows of the decisions table (consecutive steps, duplicates, day order, one patient per
episode), the episodes table and referential integrity, and the clean tables that pass them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from regimewise.core.features import as_level_text
from regimewise.data.distinct import TableText
from regimewise.data.findings import (
    MAX_DAY,
    MAX_FINDINGS_PER_RULE,
    FieldRule,
    Finding,
    clip_text,
    decision_rules,
    field_findings,
    findings_line,
    source_rows,
)
from regimewise.data.reading import read_table
from regimewise.errors import DataValidationError
from regimewise.protocol.loading import ProtocolFile


# ---------------------------------------------------------------------------------------------- row-spanning checks
def _sequence_findings(file: str, frame: pd.DataFrame, pf: ProtocolFile) -> list[Finding]:
    cols = pf.protocol.data.columns
    findings = []
    source = source_rows(frame)
    ep, step = frame[cols.episode_id].astype(str), frame[cols.step].astype(np.int64)
    day = step if cols.day is None else frame[cols.day]  # the decision index never goes backwards
    ep_s, step_s, day_s = ep.to_numpy(), step.to_numpy(), day.to_numpy(dtype=float)
    repeated = ep_s[1:] == ep_s[:-1]  # the same episode as the row before, in file order
    in_order = _in_episode_step_order(ep_s, step_s, repeated)  # the usual case: no sort needed
    order = np.arange(len(frame))
    if not in_order:
        order = np.lexsort((step_s, ep_s))
        ep_s, step_s, day_s = ep_s[order], step_s[order], day_s[order]
        repeated = ep_s[1:] == ep_s[:-1]
    same = np.r_[False, repeated]
    duplicate = same & np.r_[False, step_s[1:] == step_s[:-1]]
    for i in np.flatnonzero(duplicate):
        findings.append(
            Finding(
                file=file,
                row=int(source[order[i]]),
                column=cols.step,
                value=str(step_s[i]),
                rule="duplicate_decision",
                message=f"episode {ep_s[i]!r} has step {step_s[i]} twice",
                fix="keep one record per decision point",
            )
        )
    expected = np.where(same, np.r_[0, step_s[:-1]] + 1, 0)
    gap = (step_s != expected) & ~duplicate
    for i in np.flatnonzero(gap):
        findings.append(
            Finding(
                file=file,
                row=int(source[order[i]]),
                column=cols.step,
                value=str(step_s[i]),
                rule="step_sequence",
                message=f"episode {ep_s[i]!r}: expected step {expected[i]}",
                fix="steps run 0, 1, 2, ... without gaps",
            )
        )
    backwards = same & np.r_[False, day_s[1:] < day_s[:-1]]
    for i in np.flatnonzero(backwards):
        findings.append(
            Finding(
                file=file,
                row=int(source[order[i]]),
                column=cols.day,
                value=clip_text(day_s[i]),
                rule="day_order",
                message=f"episode {ep_s[i]!r}: day goes backwards at step {step_s[i]}",
                fix="days never decrease",
            )
        )
    if cols.patient_id is not None:
        patient_s = frame[cols.patient_id].astype(str).to_numpy()
        patient_s = patient_s if in_order else patient_s[order]
        switched = same & np.r_[False, patient_s[1:] != patient_s[:-1]]  # a new patient id within an episode
        for episode in np.unique(ep_s[switched]):
            row = int(source[np.flatnonzero(ep.to_numpy() == str(episode))[0]])
            findings.append(
                Finding(
                    file=file,
                    row=row,
                    column=cols.patient_id,
                    value=None,
                    rule="patient_per_episode",
                    message=f"episode {str(episode)!r} has more than one patient id",
                    fix="an episode is one patient's; give each episode a single patient id",
                )
            )
    return findings


# ---------------------------------------------------------------------------------------------- entry points
def check_decisions(pf: ProtocolFile, frame: pd.DataFrame, file: str, text: TableText | None = None) -> list[Finding]:
    """All findings for a decisions table (empty list when it is clean); ``text``, if given, is the frame's."""
    rules = decision_rules(pf)
    missing = [r.column for r in rules if r.column not in frame.columns]
    if missing:
        return [
            Finding(
                file=file,
                row=None,
                column=c,
                value=None,
                rule="missing_column",
                message=f"required column is absent{_header_hint(frame)}",
                fix="add it or map it in data.columns / states[].column",
            )
            for c in missing
        ]
    findings = field_findings(file, frame, rules, text)
    if not findings:
        findings = _sequence_findings(file, frame, pf) + level_findings(pf, frame, file)
    return findings


# ---------------------------------------------------------------------------------------------- categorical states
def level_counts(frame: pd.DataFrame, state) -> dict[str, int]:
    """Decisions at each declared level of a categorical state (raw column; every value is a declared level)."""
    counts = pd.Series(as_level_text(frame[state.source_column])).value_counts()
    return {level: int(counts.get(level, 0)) for level in state.levels}


def rare_levels(counts: dict[str, int], state, threshold: int) -> list[str]:
    """Levels other than the reference with some decisions, but fewer than ``threshold``."""
    return [v for v, n in counts.items() if 0 < n < threshold and v != state.reference_level]


def level_findings(pf: ProtocolFile, frame: pd.DataFrame, file: str) -> list[Finding]:
    """Categorical states whose reference level, or (``rare_levels: refuse``) another level, or (``merge``) the
    merged level, has fewer decisions than ``report.min_cell_count``: one finding each, naming level and count."""
    threshold = pf.protocol.report.min_cell_count
    findings = []
    for s in pf.protocol.states:
        if s.kind != "categorical":
            continue
        counts = level_counts(frame, s)
        rare = rare_levels(counts, s, threshold)
        problems = []
        if counts[s.reference_level] < threshold:
            problems.append(
                (
                    f"reference level {s.reference_level!r} has {counts[s.reference_level]} decision(s), fewer "
                    f"than report.min_cell_count ({threshold})",
                    f"choose a more common level as reference of {s.name}",
                )
            )
        if s.rare_levels == "refuse":
            problems += [
                (
                    f"level {v!r} has {counts[v]} decision(s), fewer than report.min_cell_count ({threshold})",
                    f"set rare_levels: merge on {s.name} to merge it into {s.other_level!r}, or combine levels",
                )
                for v in rare
            ]
        elif rare and sum(counts[v] for v in rare) < threshold:
            shown = ", ".join(repr(v) for v in rare)
            problems.append(
                (
                    f"rare level(s) {shown} merged into {s.other_level!r} have {sum(counts[v] for v in rare)} "
                    f"decision(s) together, fewer than report.min_cell_count ({threshold})",
                    f"combine them with a common level of {s.name} in the records, or lower report.min_cell_count",
                )
            )
        findings += [
            Finding(file=file, row=None, column=s.source_column, value=None, rule="rare_level", message=m, fix=f)
            for m, f in problems
        ]
    return findings


def merged_levels(frame: pd.DataFrame, pf: ProtocolFile) -> dict[str, dict]:
    """For validation.json: each categorical state's reference, counts by clean level (merged levels under
    ``other_level``), the levels merged as rare and the declared levels absent from the records."""
    out = {}
    threshold = pf.protocol.report.min_cell_count
    for s in pf.protocol.states:
        if s.kind != "categorical":
            continue
        counts = level_counts(frame, s)
        rare = rare_levels(counts, s, threshold) if s.rare_levels == "merge" else []
        kept = {v: n for v, n in counts.items() if v not in rare and n > 0}
        if rare:
            kept[s.other_level] = sum(counts[v] for v in rare)
        absent = [v for v, n in counts.items() if n == 0]
        out[s.name] = {"reference": s.reference_level, "decisions": kept, "merged": rare, "absent": absent}
    return out


def _clean_levels(frame: pd.DataFrame, state, threshold: int) -> pd.Series:
    """A categorical state's clean column: level text, rare levels replaced by ``other_level`` when merged."""
    text = pd.Series(as_level_text(frame[state.source_column]), index=frame.index)
    if state.rare_levels == "merge":
        rare = rare_levels(level_counts(frame, state), state, threshold)
        text = text.where(~text.isin(rare), state.other_level)
    return text


def _header_hint(frame: pd.DataFrame) -> str:
    return f" (the file has {frame.shape[1]} column(s))"


def clean_decisions(pf: ProtocolFile, frame: pd.DataFrame) -> pd.DataFrame:
    """Rename to contract names, cast types and sort by episode and step (call only on a clean table).

    The columns are built first and the frame once (one block per type); a table already in episode and step
    order, the usual case, is not sorted again.
    """
    p = pf.protocol
    cols = p.data.columns
    columns = {
        "episode_id": frame[cols.episode_id].astype(str),
        "patient_id": (frame[cols.patient_id] if cols.patient_id else frame[cols.episode_id]).astype(str),
        "step": pd.to_numeric(frame[cols.step]).astype(np.int64),
        "day": pd.to_numeric(frame[cols.step if cols.day is None else cols.day]).astype(np.int64),
    }
    for s in p.states:
        if s.kind == "categorical":
            columns[s.name] = _clean_levels(frame, s, p.report.min_cell_count)
        else:
            columns[s.name] = pd.to_numeric(frame[s.source_column]).astype(np.float64)
    columns["action"] = frame[cols.action].astype(str)
    columns["reward"] = pd.to_numeric(frame[cols.reward]).astype(np.float64)
    for s in p.states:
        if f"{s.name}_missing" in frame.columns and p.data.missing.get(s.name) == "indicator":
            columns[f"{s.name}_missing"] = frame[f"{s.name}_missing"].astype(np.int64)
    out = pd.DataFrame({name: values.to_numpy() for name, values in columns.items()}, copy=False)
    if _in_episode_step_order(out["episode_id"].to_numpy(), out["step"].to_numpy()):
        return out
    return out.sort_values(["episode_id", "step"], kind="mergesort").reset_index(drop=True)


def _in_episode_step_order(episode: np.ndarray, step: np.ndarray, same: np.ndarray | None = None) -> bool:
    """Whether rows are strictly increasing in (episode id as text, step): the order sort_values would give.
    ``same``, when the caller has it, is ``episode[1:] == episode[:-1]``."""
    if episode.size < 2:
        return True
    later = episode[1:] > episode[:-1]
    same = episode[1:] == episode[:-1] if same is None else same
    return bool(np.all(later | (same & (step[1:] > step[:-1]))))


# ---------------------------------------------------------------------------------------------- episodes table
def episode_rules(pf: ProtocolFile, frame: pd.DataFrame) -> list[FieldRule]:
    """Field rules of the episodes table; follow-up and event are checked when the table has them."""
    cols = pf.protocol.data.columns
    rules = [FieldRule(cols.episode_id, "text", fix="every episode needs its identifier")]
    if cols.patient_id is not None and cols.patient_id in frame.columns:
        rules.append(FieldRule(cols.patient_id, "text", fix="every episode needs its patient identifier"))
    if cols.followup in frame.columns:
        rules.append(FieldRule(cols.followup, "integer", 0, MAX_DAY, fix="follow-up is whole days from 0 to 36525"))
    if cols.event in frame.columns:
        rules.append(FieldRule(cols.event, "integer", 0, 1, fix="event is 1 (observed) or 0 (censored)"))
    return rules


def check_episodes(
    pf: ProtocolFile,
    frame: pd.DataFrame,
    file: str,
    decisions: pd.DataFrame,
    dropped_episodes: set[str],
    text: TableText | None = None,
) -> list[Finding]:
    """Field rules of the episodes table, then referential integrity with the (clean) decisions table; ``text``,
    if given, is the frame's :class:`regimewise.data.distinct.TableText`.

    Follow-up must reach the last decision day only for censored episodes: the event may be non-fatal, so an
    episode with an event can have decisions after it (see synthetic_cohort/README.md).
    """
    cols = pf.protocol.data.columns
    if cols.episode_id not in frame.columns:
        return [
            Finding(
                file=file,
                row=None,
                column=cols.episode_id,
                value=None,
                rule="missing_column",
                message="required column is absent",
                fix="add the episode identifier column",
            )
        ]
    findings = field_findings(file, frame, episode_rules(pf, frame), text)
    if findings:
        return findings
    last = _episode_ends(decisions)
    findings = _episode_links(file, frame, cols, last, dropped_episodes)
    return findings or _episode_consistency(file, frame, cols, last)


def _episode_ends(decisions: pd.DataFrame) -> pd.DataFrame:
    """Each episode's patient and last decision day, indexed by episode id in sorted order.

    Clean decisions come sorted by episode and step: each episode is one run of rows, read without grouping.
    Decisions in another order, with missing ids or with days that are not whole numbers are grouped.
    """
    starts, _ = episode_runs(decisions)
    episodes = pd.Index(decisions["episode_id"].to_numpy()[starts], name="episode_id")
    patients = decisions["patient_id"].to_numpy()[starts]
    days = decisions["day"].to_numpy()
    runs = starts.size and days.dtype.kind in "iu" and not pd.isna(patients).any() and not episodes.hasnans
    if not (runs and episodes.is_unique and episodes.is_monotonic_increasing):
        return decisions.groupby("episode_id", sort=True).agg(_patient=("patient_id", "first"), last_day=("day", "max"))
    return pd.DataFrame({"_patient": patients, "last_day": np.maximum.reduceat(days, starts)}, index=episodes)


def _rows_found(file, source, rows, column, values, rule, message, fix) -> list[Finding]:
    """One finding per row of ``rows`` (capped per rule); ``values`` gives each row's shown value, or None."""
    return [
        Finding(
            file=file,
            row=int(source[row]),
            column=column,
            value=None if values is None else clip_text(values[row]),
            rule=rule,
            message=message(row) if callable(message) else message,
            fix=fix,
        )
        for row in rows[:MAX_FINDINGS_PER_RULE]
    ]


def _episode_links(file, frame, cols, last, dropped_episodes) -> list[Finding]:
    """Duplicated episodes, decisions whose episode is missing here, and episodes without decisions."""
    source = source_rows(frame)
    ids = frame[cols.episode_id].astype(str)
    shown = ids.to_numpy()
    findings = _rows_found(
        file,
        source,
        np.flatnonzero(ids.duplicated().to_numpy()),
        cols.episode_id,
        shown,
        "duplicate_episode",
        "episode appears twice",
        "one row per episode",
    )
    for episode in absent_from(last.index, ids)[:MAX_FINDINGS_PER_RULE]:
        findings.append(
            Finding(
                file=file,
                row=None,
                column=cols.episode_id,
                value=clip_text(episode),
                rule="episode_without_record",
                message="decisions refer to an episode absent here",
                fix="add the episode to the episodes table or remove its decisions",
            )
        )
    childless = ~ids.isin(last.index).to_numpy() & ~ids.isin(dropped_episodes).to_numpy()
    findings += _rows_found(
        file,
        source,
        np.flatnonzero(childless),
        cols.episode_id,
        shown,
        "episode_without_decisions",
        "episode has no decision in the decisions table",
        "remove the episode or add its decisions",
    )
    return findings


def absent_from(index: pd.Index, ids: pd.Series) -> list:
    """The entries of ``index`` that are not among ``ids``, sorted (``sorted(set(index) - set(ids))``): one
    hash lookup per entry instead of two sets of Python objects."""
    return sorted(set(index[~index.isin(ids)]))


def episode_ends_of(frame: pd.DataFrame, cols, last: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """The decisions' patient (object) and last day (float, NaN for an episode without decisions) of each row of
    the episodes table ``frame``, from :func:`_episode_ends`'s ``last``.

    In the usual case the table lists the decisions' episodes in their order: ``last`` is then read as it is,
    without the join by episode id (a hash of every id) that any other table needs."""
    ids = frame[cols.episode_id].astype(str).to_numpy()
    joinable = "_patient" not in frame.columns and "last_day" not in frame.columns  # else the join refuses them
    if joinable and len(ids) == len(last) and np.array_equal(ids, last.index.to_numpy()):
        return last["_patient"].to_numpy(), last["last_day"].to_numpy(dtype=float)
    joined = frame.assign(_id=ids).join(last, on="_id")
    return joined["_patient"].to_numpy(), joined["last_day"].to_numpy(dtype=float)


def _episode_consistency(file, frame, cols, last) -> list[Finding]:
    """The same patient in both tables, and censored follow-up reaching the last decision (when the records have
    real days; the decision index standing in for the day says nothing about follow-up)."""
    source = source_rows(frame)
    patient, last_day = episode_ends_of(frame, cols, last)
    present = ~np.isnan(last_day)
    findings = []
    if cols.patient_id is not None and cols.patient_id in frame.columns:
        differs = present & (frame[cols.patient_id].astype(str).to_numpy() != patient)
        findings += _rows_found(
            file,
            source,
            np.flatnonzero(differs),
            cols.patient_id,
            None,
            "patient_mismatch",
            "patient id differs from the decisions table's",
            "give the episode the same patient id in both tables",
        )
    if cols.day is not None and cols.followup in frame.columns and cols.event in frame.columns:
        follow = pd.to_numeric(frame[cols.followup]).to_numpy(dtype=float)
        censored = pd.to_numeric(frame[cols.event]).to_numpy(dtype=float) == 0
        short = np.flatnonzero(present & censored & (follow < last_day))
        findings += _rows_found(
            file,
            source,
            short,
            cols.followup,
            follow,
            "followup_before_last_decision",
            lambda row: f"censored episode ends before its last decision (day {int(last_day[row])})",
            "a censored episode is followed up at least until its last decision; correct follow-up or event",
        )
    return findings


def episode_runs(decisions: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """First row and number of decisions of each episode in clean decisions (sorted by episode and step)."""
    episode = decisions["episode_id"].to_numpy()
    starts = np.flatnonzero(np.r_[True, episode[1:] != episode[:-1]]) if episode.size else np.zeros(0, dtype=np.int64)
    return starts, np.diff(np.r_[starts, episode.size])


def clean_episodes(
    pf: ProtocolFile, frame: pd.DataFrame | None, decisions: pd.DataFrame, dropped_episodes: set[str]
) -> pd.DataFrame:
    """The episodes table: decision counts per episode, joined with the protocol's episodes file when given.

    The count of each episode's decisions in the clean records is its ``n_decisions``: a column of that name in the
    episodes file (a count of the user's own, or a validated episodes table given again as records) is replaced by
    it, as the decisions' patient replaces the file's; otherwise the two would meet in the join as
    ``n_decisions_x`` and ``n_decisions_y`` and neither would keep the name."""
    starts, lengths = episode_runs(decisions)
    counts = pd.DataFrame(
        {
            "episode_id": decisions["episode_id"].to_numpy()[starts],
            "patient_id": decisions["patient_id"].to_numpy()[starts],
            "n_decisions": lengths,
        }
    )
    if frame is None:
        return counts
    cols = pf.protocol.data.columns
    frame = frame.rename(columns={cols.episode_id: "episode_id", cols.followup: "followup_days", cols.event: "event"})
    frame["episode_id"] = frame["episode_id"].astype(str)
    frame = frame[~frame["episode_id"].isin(dropped_episodes)]
    frame = frame.drop(columns=[c for c in ("patient_id", cols.patient_id, "n_decisions") if c in frame.columns])
    text = [c for c in frame.columns if c != "episode_id" and not pd.api.types.is_numeric_dtype(frame[c])]
    frame = frame.drop(columns=text)  # free text never travels into the results
    merged = counts.merge(frame, on="episode_id", how="left", validate=one_to_one(counts, frame, "episode_id"))
    return merged.sort_values("episode_id", kind="mergesort").reset_index(drop=True)


def one_to_one(left: pd.DataFrame, right: pd.DataFrame, key: str) -> str | None:
    """``merge``'s ``validate`` for a join that must be one-to-one: None when both key columns are unique (checked
    here, at less cost than merge's own check), else ``"one_to_one"`` so that merge raises its error."""
    unique = left[key].is_unique and right[key].is_unique
    return None if unique else "one_to_one"


def episodes_table(pf: ProtocolFile, decisions: pd.DataFrame) -> pd.DataFrame:
    """The episodes table for clean decisions (kept for callers; reads and checks the protocol's episodes file)."""
    frame = None
    if pf.episodes_path is not None:
        frame = read_table(pf.episodes_path, "episodes", pf.protocol.data.delimiter)
        raise_if(check_episodes(pf, frame, pf.episodes_path.name, decisions, set()))
    return clean_episodes(pf, frame, decisions, set())


# ---------------------------------------------------------------------------------------------- whole run
def raise_if(findings: list[Finding]) -> None:
    if findings:
        raise DataValidationError(findings_line(findings), findings)
