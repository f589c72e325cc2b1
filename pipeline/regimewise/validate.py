"""Validate the decision records against the data contract and the protocol.

Field rules (types, ranges, labels, missing values) are declared once per column as :class:`FieldRule`. From
them come both a vectorised pandas check, which finds the failing rows of a large table quickly, and a pydantic
row model, which turns each failing row into precise error objects. Rules that span rows (consecutive steps,
duplicated decisions, day order, one patient per episode) are vectorised only.

Before the field rules run, the de-identification guard (:mod:`regimewise.deidentify`) refuses identifier-like
columns and values, and the protocol's missing-data policy (:mod:`regimewise.missing`) is applied. After them
come the episodes table and referential integrity between the two tables.

Every finding names the file, the 1-based data row, the column, a value (masked when it looks like an
identifier) and the rule. All findings go to ``validation_errors.csv`` (capped per rule, with totals), written
by :func:`write_error_report`; the exception message is one line naming the first.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, ValidationError, create_model

from .deidentify import find_identifiers, mask, shown_value
from .errors import DataValidationError
from .io import read_table, write_text
from .missing import apply_missing_policy, blank_mask
from .protocol import ProtocolFile

MAX_VALUE_CHARS = 40
MAX_TEXT_CHARS = 200
MAX_FINDINGS_PER_RULE = 100
MAX_ABS_NUMBER = 1e9
MAX_DAY = 36525
ERROR_COLUMNS = ("rule", "file", "row", "column", "value", "problem", "how_to_fix")


class Finding(BaseModel):
    """One row-level problem in an input table."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    file: str
    row: int | None = Field(description="1-based data row (the header is not counted); null for whole-table rules")
    column: str | None
    value: str | None = Field(description="as shown to the user: shortened, and masked if identifier-like")
    rule: str
    message: str
    fix: str = ""

    def one_line(self) -> str:
        where = [f"{self.file}"]
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column is not None:
            where.append(f"column {self.column!r}")
        value = "" if self.value is None else f" (value {self.value!r})"
        fix = f"; {self.fix}" if self.fix else ""
        return f"{', '.join(where)}: {self.message}{value}{fix} [rule {self.rule}]"


@dataclass(frozen=True)
class FieldRule:
    """What one column must hold: a number (optionally whole, within bounds) or one of a set of labels."""

    column: str
    kind: Literal["number", "integer", "label", "text"]
    low: float | None = None
    high: float | None = None
    labels: tuple[str, ...] = ()
    fix: str = ""

    def annotation(self):
        """The pydantic type of this field."""
        if self.kind == "label":
            return Literal[self.labels]  # type: ignore[valid-type]
        if self.kind == "text":
            return Annotated[str, Field(min_length=1)]
        base = int if self.kind == "integer" else float
        return Annotated[base, Field(ge=self.low, le=self.high, allow_inf_nan=False, strict=False)]


@dataclass(frozen=True)
class ValidationResult:
    """Clean tables and the counts that go to validation.json."""

    decisions: pd.DataFrame
    episodes: pd.DataFrame
    summary: dict


# ---------------------------------------------------------------------------------------------- rules
def decision_rules(pf: ProtocolFile) -> list[FieldRule]:
    """The field rules of the decisions table, in contract order."""
    p = pf.protocol
    cols = p.data.columns
    rules = [FieldRule(cols.episode_id, "text", fix="every decision needs its episode identifier")]
    if cols.patient_id is not None:
        rules.append(FieldRule(cols.patient_id, "text", fix="every decision needs its patient identifier"))
    rules += [
        FieldRule(cols.step, "integer", 0, p.horizon - 1, fix=f"steps are 0, 1, 2, ... below the horizon {p.horizon}"),
        FieldRule(cols.day, "integer", 0, MAX_DAY,
                  fix="day is whole days since the episode's index date, from 0 to 36525 (100 years)"),
    ]
    for s in p.states:
        low, high = s.plausible_range
        kind = "number" if s.kind == "continuous" else "integer"
        rules.append(
            FieldRule(s.source_column, kind, low, high, fix=f"correct the record or widen plausible_range of {s.name}")
        )
    rules += [
        FieldRule(cols.action, "label", labels=p.action_labels, fix=f"actions must be one of {list(p.action_labels)}"),
        FieldRule(cols.reward, "number", -MAX_ABS_NUMBER, MAX_ABS_NUMBER,
                  fix="reward must be a finite number between -1e9 and 1e9 for every decision"),
    ]
    return rules


def row_model(rules: list[FieldRule]) -> type[BaseModel]:
    """A pydantic model of one decision row, built from the field rules (fields keyed by position)."""
    fields: dict[str, Any] = {f"c{i}": (rule.annotation(), ...) for i, rule in enumerate(rules)}
    return create_model("DecisionRow", __config__=ConfigDict(extra="forbid"), **fields)


# ---------------------------------------------------------------------------------------------- field checks
def _failing_rows(frame: pd.DataFrame, rule: FieldRule) -> np.ndarray:
    """Boolean mask of rows whose value breaks the field rule (vectorised)."""
    raw = frame[rule.column]
    if rule.kind == "text":
        return raw.isna().to_numpy() | blank_mask(raw)
    if rule.kind == "label":
        return ~raw.isin(rule.labels).to_numpy()
    numbers = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(numbers)
    if rule.kind == "integer":
        bad |= np.isfinite(numbers) & (np.floor(numbers) != numbers)
    if rule.low is not None:
        bad |= numbers < rule.low
    if rule.high is not None:
        bad |= numbers > rule.high
    return bad


def _short(value) -> str | None:
    """A value as it may be shown: None if missing, masked if identifier-like, else at most 40 characters."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return None
    text = shown_value(value)
    return text if len(text) <= MAX_VALUE_CHARS else text[: MAX_VALUE_CHARS - 3] + "..."


def _source_rows(frame: pd.DataFrame) -> np.ndarray:
    """1-based data row in the file of each row (the index is the file's 0-based row number)."""
    return frame.index.to_numpy(dtype=np.int64) + 1


def _row_findings(file: str, frame: pd.DataFrame, rules: list[FieldRule], rows: np.ndarray) -> list[Finding]:
    """Run the pydantic row model on the failing rows and turn its errors into findings."""
    model = row_model(rules)
    source = _source_rows(frame)
    findings = []
    for row in rows:
        record = {f"c{i}": _python_value(frame[rule.column].iat[row]) for i, rule in enumerate(rules)}
        try:
            model.model_validate(record)
        except ValidationError as err:
            for problem in err.errors(include_url=False):
                index = int(str(problem["loc"][0])[1:])
                rule = rules[index]
                missing = record[f"c{index}"] is None
                findings.append(
                    Finding(
                        file=file,
                        row=int(source[row]),
                        column=rule.column,
                        value=_short(record[f"c{index}"]),
                        rule="missing_value" if missing else _rule_name(rule),
                        message="value is missing" if missing else _plain(problem["msg"]),  # pydantic's msg never echoes the value
                        fix=rule.fix,
                    )
                )
    return findings


def _python_value(value):
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return None
    if isinstance(value, np.generic):
        return value.item()
    return value


def _rule_name(rule: FieldRule) -> str:
    return {"label": "action_label", "text": "identifier_text", "integer": "whole_number"}.get(rule.kind, "number")


def _plain(msg: str) -> str:
    return " ".join(msg.split()).rstrip(".")


def field_findings(file: str, frame: pd.DataFrame, rules: list[FieldRule]) -> list[Finding]:
    """Vectorised check of every field rule; the pydantic model explains at most a capped number of rows per rule."""
    chosen = np.zeros(len(frame), dtype=bool)
    for rule in rules:
        bad = np.flatnonzero(_failing_rows(frame, rule))
        chosen[bad[:MAX_FINDINGS_PER_RULE]] = True
    return _row_findings(file, frame, rules, np.flatnonzero(chosen))


# ---------------------------------------------------------------------------------------------- table-wide checks
def identifier_findings(file: str, frame: pd.DataFrame, pf: ProtocolFile) -> list[Finding]:
    """Identifier-like column names and values (Safe Harbor categories); values are always masked."""
    acknowledged = [a.column for a in pf.protocol.data.acknowledged_columns]
    source = _source_rows(frame)
    findings = []
    for hit in find_identifiers(frame, acknowledged):
        if hit.row is None:
            findings.append(Finding(
                file=file, row=None, column=hit.column, value=None, rule="identifier_column",
                message=f"column name looks like a direct identifier ({hit.category})",
                fix="remove the column from the extract, or list it in data.acknowledged_columns with a justification",
            ))  # fmt: skip
        elif hit.category == "age over 89":
            findings.append(Finding(
                file=file, row=int(source[hit.row]), column=hit.column, value=mask("x" * hit.length),
                rule="age_over_89", message="age above 89 is an identifier under Safe Harbor",
                fix="group every age above 89 into the single category '90+' (or cap at 89 with the study's approval)",
            ))  # fmt: skip
        else:
            findings.append(Finding(
                file=file, row=int(source[hit.row]), column=hit.column, value=mask("x" * hit.length),
                rule="identifier_value", message=f"value looks like a direct identifier ({hit.category})",
                fix="remove or replace identifiers in the extract before analysis",
            ))  # fmt: skip
    return findings


def long_text_findings(file: str, frame: pd.DataFrame) -> list[Finding]:
    """Text cells longer than MAX_TEXT_CHARS (free text does not belong in an analysis extract)."""
    findings = []
    source = _source_rows(frame)
    for column in frame.columns:
        values = frame[column]
        if not pd.api.types.is_object_dtype(values):
            continue
        lengths = values.astype("string").str.len().fillna(0).to_numpy()
        for row in np.flatnonzero(lengths > MAX_TEXT_CHARS)[:MAX_FINDINGS_PER_RULE]:
            findings.append(Finding(
                file=file, row=int(source[row]), column=str(column), value=mask(values.iat[row]), rule="long_text",
                message=f"text of {int(lengths[row])} characters (at most {MAX_TEXT_CHARS})",
                fix="remove free text from the extract; codes and numbers only",
            ))  # fmt: skip
    return findings


# ---------------------------------------------------------------------------------------------- row-spanning checks
def _sequence_findings(file: str, frame: pd.DataFrame, pf: ProtocolFile) -> list[Finding]:
    cols = pf.protocol.data.columns
    findings = []
    source = _source_rows(frame)
    ep, step, day = frame[cols.episode_id].astype(str), frame[cols.step].astype(np.int64), frame[cols.day]
    in_order = _in_episode_step_order(ep.to_numpy(), step.to_numpy())  # the usual case: no sort needed
    order = np.arange(len(frame)) if in_order else np.lexsort((step.to_numpy(), ep.to_numpy()))
    ep_s, step_s, day_s = ep.to_numpy()[order], step.to_numpy()[order], day.to_numpy(dtype=float)[order]
    same = np.r_[False, ep_s[1:] == ep_s[:-1]]
    duplicate = same & np.r_[False, step_s[1:] == step_s[:-1]]
    for i in np.flatnonzero(duplicate):
        findings.append(
            Finding(file=file, row=int(source[order[i]]), column=cols.step, value=str(step_s[i]),
                    rule="duplicate_decision", message=f"episode {ep_s[i]!r} has step {step_s[i]} twice",
                    fix="keep one record per decision point")
        )
    expected = np.where(same, np.r_[0, step_s[:-1]] + 1, 0)
    gap = (step_s != expected) & ~duplicate
    for i in np.flatnonzero(gap):
        findings.append(
            Finding(file=file, row=int(source[order[i]]), column=cols.step, value=str(step_s[i]),
                    rule="step_sequence", message=f"episode {ep_s[i]!r}: expected step {expected[i]}",
                    fix="steps run 0, 1, 2, ... without gaps")
        )
    backwards = same & np.r_[False, day_s[1:] < day_s[:-1]]
    for i in np.flatnonzero(backwards):
        findings.append(
            Finding(file=file, row=int(source[order[i]]), column=cols.day, value=_short(day_s[i]), rule="day_order",
                    message=f"episode {ep_s[i]!r}: day goes backwards at step {step_s[i]}", fix="days never decrease")
        )
    if cols.patient_id is not None:
        patient_s = frame[cols.patient_id].astype(str).to_numpy()[order]
        switched = same & np.r_[False, patient_s[1:] != patient_s[:-1]]  # a new patient id within an episode
        for episode in np.unique(ep_s[switched]):
            row = int(source[np.flatnonzero(ep.to_numpy() == str(episode))[0]])
            findings.append(
                Finding(file=file, row=row, column=cols.patient_id, value=None, rule="patient_per_episode",
                        message=f"episode {str(episode)!r} has more than one patient id",
                        fix="an episode is one patient's; give each episode a single patient id")
            )
    return findings


# ---------------------------------------------------------------------------------------------- entry points
def check_decisions(pf: ProtocolFile, frame: pd.DataFrame, file: str) -> list[Finding]:
    """All findings for a decisions table (empty list when it is clean)."""
    rules = decision_rules(pf)
    missing = [r.column for r in rules if r.column not in frame.columns]
    if missing:
        return [
            Finding(file=file, row=None, column=c, value=None, rule="missing_column",
                    message=f"required column is absent{_header_hint(frame)}",
                    fix="add it or map it in data.columns / states[].column")
            for c in missing
        ]
    findings = field_findings(file, frame, rules)
    if not findings:
        findings = _sequence_findings(file, frame, pf)
    return findings


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
        "day": pd.to_numeric(frame[cols.day]).astype(np.int64),
    }
    for s in p.states:
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


def _in_episode_step_order(episode: np.ndarray, step: np.ndarray) -> bool:
    """Whether rows are strictly increasing in (episode id as text, step): the order sort_values would give."""
    if episode.size < 2:
        return True
    later = episode[1:] > episode[:-1]
    same = episode[1:] == episode[:-1]
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


def check_episodes(pf: ProtocolFile, frame: pd.DataFrame, file: str, decisions: pd.DataFrame,
                   dropped_episodes: set[str]) -> list[Finding]:  # fmt: skip
    """Field rules of the episodes table, then referential integrity with the (clean) decisions table.

    Follow-up must reach the last decision day only for censored episodes: the event may be non-fatal, so an
    episode with an event can have decisions after it (see synthetic_cohort/README.md).
    """
    cols = pf.protocol.data.columns
    if cols.episode_id not in frame.columns:
        return [Finding(file=file, row=None, column=cols.episode_id, value=None, rule="missing_column",
                        message="required column is absent", fix="add the episode identifier column")]
    findings = field_findings(file, frame, episode_rules(pf, frame))
    if findings:
        return findings
    source = _source_rows(frame)
    ids = frame[cols.episode_id].astype(str)
    for row in np.flatnonzero(ids.duplicated().to_numpy())[:MAX_FINDINGS_PER_RULE]:
        findings.append(Finding(file=file, row=int(source[row]), column=cols.episode_id, value=_short(ids.iat[row]),
                                rule="duplicate_episode", message="episode appears twice", fix="one row per episode"))
    known = set(ids)
    last = decisions.groupby("episode_id", sort=True).agg(_patient=("patient_id", "first"), last_day=("day", "max"))
    orphans = sorted(set(last.index) - known)
    for episode in orphans[:MAX_FINDINGS_PER_RULE]:
        findings.append(Finding(file=file, row=None, column=cols.episode_id, value=_short(episode),
                                rule="episode_without_record", message="decisions refer to an episode absent here",
                                fix="add the episode to the episodes table or remove its decisions"))
    childless = ~ids.isin(last.index).to_numpy() & ~ids.isin(dropped_episodes).to_numpy()
    for row in np.flatnonzero(childless)[:MAX_FINDINGS_PER_RULE]:
        findings.append(Finding(file=file, row=int(source[row]), column=cols.episode_id, value=_short(ids.iat[row]),
                                rule="episode_without_decisions", message="episode has no decision in the decisions table",
                                fix="remove the episode or add its decisions"))
    if findings:
        return findings
    joined = frame.assign(_id=ids).join(last, on="_id")
    present = joined["last_day"].notna().to_numpy()
    if cols.patient_id is not None and cols.patient_id in frame.columns:
        differs = present & (joined[cols.patient_id].astype(str) != joined["_patient"]).to_numpy()
        for row in np.flatnonzero(differs)[:MAX_FINDINGS_PER_RULE]:
            findings.append(Finding(file=file, row=int(source[row]), column=cols.patient_id, value=None,
                                    rule="patient_mismatch", message="patient id differs from the decisions table's",
                                    fix="give the episode the same patient id in both tables"))
    if cols.followup in frame.columns and cols.event in frame.columns:
        follow = pd.to_numeric(joined[cols.followup]).to_numpy(dtype=float)
        censored = pd.to_numeric(joined[cols.event]).to_numpy(dtype=float) == 0
        short = present & censored & (follow < joined["last_day"].to_numpy(dtype=float))
        for row in np.flatnonzero(short)[:MAX_FINDINGS_PER_RULE]:
            findings.append(Finding(
                file=file, row=int(source[row]), column=cols.followup, value=_short(follow[row]),
                rule="followup_before_last_decision",
                message=f"censored episode ends before its last decision (day {int(joined['last_day'].iat[row])})",
                fix="a censored episode is followed up at least until its last decision; correct follow-up or event",
            ))  # fmt: skip
    return findings


def episode_runs(decisions: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """First row and number of decisions of each episode in clean decisions (sorted by episode and step)."""
    episode = decisions["episode_id"].to_numpy()
    starts = np.flatnonzero(np.r_[True, episode[1:] != episode[:-1]]) if episode.size else np.zeros(0, dtype=np.int64)
    return starts, np.diff(np.r_[starts, episode.size])


def clean_episodes(pf: ProtocolFile, frame: pd.DataFrame | None, decisions: pd.DataFrame,
                   dropped_episodes: set[str]) -> pd.DataFrame:  # fmt: skip
    """The episodes table: decision counts per episode, joined with the protocol's episodes file when given."""
    starts, lengths = episode_runs(decisions)
    counts = pd.DataFrame({
        "episode_id": decisions["episode_id"].to_numpy()[starts],
        "patient_id": decisions["patient_id"].to_numpy()[starts],
        "n_decisions": lengths,
    })  # fmt: skip
    if frame is None:
        return counts
    cols = pf.protocol.data.columns
    frame = frame.rename(columns={cols.episode_id: "episode_id", cols.followup: "followup_days", cols.event: "event"})
    frame["episode_id"] = frame["episode_id"].astype(str)
    frame = frame[~frame["episode_id"].isin(dropped_episodes)]
    frame = frame.drop(columns=[c for c in ("patient_id", cols.patient_id) if c in frame.columns])
    text = [c for c in frame.columns if c != "episode_id" and not pd.api.types.is_numeric_dtype(frame[c])]
    frame = frame.drop(columns=text)  # free text never travels into the results
    merged = counts.merge(frame, on="episode_id", how="left", validate="one_to_one")
    return merged.sort_values("episode_id", kind="mergesort").reset_index(drop=True)


def episodes_table(pf: ProtocolFile, decisions: pd.DataFrame) -> pd.DataFrame:
    """The episodes table for clean decisions (kept for callers; reads and checks the protocol's episodes file)."""
    frame = None
    if pf.episodes_path is not None:
        frame = read_table(pf.episodes_path, "episodes", pf.protocol.data.delimiter)
        _raise_if(check_episodes(pf, frame, pf.episodes_path.name, decisions, set()))
    return clean_episodes(pf, frame, decisions, set())


# ---------------------------------------------------------------------------------------------- whole run
def _raise_if(findings: list[Finding]) -> None:
    if findings:
        first = min(findings, key=lambda f: (f.row or 0, f.rule))
        rules = sorted({f.rule for f in findings})
        more = f" ({len(findings) - 1} more problem(s) of rules {rules})" if len(findings) > 1 else ""
        raise DataValidationError(first.one_line() + more, findings)


def collect_findings(pf: ProtocolFile) -> tuple[list[Finding], ValidationResult | None]:
    """Every finding for the protocol's records, and the clean result when there are none."""
    p = pf.protocol
    path = pf.decisions_path
    raw = read_table(path, "decisions", p.data.delimiter)
    episodes_raw = None if pf.episodes_path is None else read_table(pf.episodes_path, "episodes", p.data.delimiter)
    name = Path(path).name
    findings = identifier_findings(name, raw, pf) + long_text_findings(name, raw)
    if episodes_raw is not None:
        ep_name = pf.episodes_path.name
        findings += identifier_findings(ep_name, episodes_raw, pf) + long_text_findings(ep_name, episodes_raw)
    if findings:
        return findings, None
    frame, missing_actions = apply_missing_policy(pf, raw)
    findings = check_decisions(pf, frame, name)
    if findings:
        return findings, None
    decisions = clean_decisions(pf, frame)
    cols = p.data.columns
    # episodes the missing-data policy emptied (none when every row was kept)
    dropped = set() if len(decisions) == len(raw) else set(raw[cols.episode_id].astype(str)) - set(decisions["episode_id"])
    if episodes_raw is not None:
        findings = check_episodes(pf, episodes_raw, pf.episodes_path.name, decisions, dropped)
        if findings:
            return findings, None
    episodes = clean_episodes(pf, episodes_raw, decisions, dropped)
    summary = summarise(pf, decisions, raw, missing_actions, len(dropped))
    return [], ValidationResult(decisions=decisions, episodes=episodes, summary=summary)


def validate_records(pf: ProtocolFile) -> ValidationResult:
    """Read, check and clean the records named in the protocol.

    Raises
    ------
    DataValidationError
        When any rule fails; ``errors`` holds every finding and the message names the first.
    """
    findings, result = collect_findings(pf)
    _raise_if(findings)
    return result


# ---------------------------------------------------------------------------------------------- error report
def error_rows(findings) -> list[dict]:
    """Rows of validation_errors.csv sorted by rule, at most MAX_FINDINGS_PER_RULE per rule, then a total row."""
    by_rule: dict[str, list[Finding]] = {}
    for f in findings:
        by_rule.setdefault(f.rule, []).append(f)
    rows = []
    for rule in sorted(by_rule):
        group = sorted(by_rule[rule], key=lambda f: (f.file, f.row or 0, f.column or ""))
        for f in group[:MAX_FINDINGS_PER_RULE]:
            rows.append({"rule": rule, "file": f.file, "row": "" if f.row is None else f.row,
                         "column": f.column or "", "value": f.value or "", "problem": f.message,
                         "how_to_fix": f.fix})  # fmt: skip
        capped = " (list capped; the vectorised check may have found more rows)" \
            if len(group) >= MAX_FINDINGS_PER_RULE else ""
        rows.append({"rule": rule, "file": "", "row": "", "column": "", "value": "",
                     "problem": f"total: {len(group)} finding(s) listed{capped}", "how_to_fix": ""})  # fmt: skip
    return rows


def write_error_report(path, findings) -> None:
    """Write validation_errors.csv (header only when there are no findings)."""
    buffer = pd.DataFrame(error_rows(findings), columns=list(ERROR_COLUMNS)).to_csv(index=False, lineterminator="\n")
    write_text(path, buffer)


def report_lines(path, n: int = 10) -> list[str]:
    """The first n lines of a validation_errors.csv (already sorted by rule) for the terminal; [] if none."""
    path = Path(path)
    if not path.is_file():
        return []
    table = pd.read_csv(path, dtype=str, keep_default_na=False)
    listed = table[table["problem"].str.startswith("total: ") == False]  # noqa: E712
    lines = []
    for row in listed.head(n).itertuples(index=False):
        where = ", ".join(x for x in (row.file, row.row and f"row {row.row}", row.column and f"column {row.column!r}") if x)
        value = f" (value {row.value!r})" if row.value else ""
        lines.append(f"[{row.rule}] {where}: {row.problem}{value}; {row.how_to_fix}")
    if len(listed) > n:
        lines.append(f"... and {len(listed) - n} more listed")
    return lines


def summarise(pf: ProtocolFile, decisions: pd.DataFrame, raw: pd.DataFrame, missing_actions: dict | None = None,
              episodes_dropped: int = 0) -> dict:  # fmt: skip
    """Counts for validation.json (no individual-level values)."""
    p = pf.protocol
    starts, lengths = episode_runs(decisions)
    known = {r.column for r in decision_rules(pf)} | {f"{s}_missing" for s in p.state_names}
    return {
        "decisions_file": pf.decisions_path.name,
        "episodes_file": None if pf.episodes_path is None else pf.episodes_path.name,
        "rows_read": int(len(raw)),
        "rows_kept": int(len(decisions)),
        "rows_rejected": 0,
        "rows_dropped_missing": int(len(raw) - len(decisions)),
        "episodes_dropped_missing": int(episodes_dropped),
        "episodes": int(starts.size),
        "patients": int(decisions["patient_id"].nunique()),
        "episode_length": {str(k): int(v) for k, v in sorted(Counter(lengths.tolist()).items())},
        "decisions_by_step": {str(k): int(v) for k, v in decisions.groupby("step").size().items()},
        "actions": {a: int((decisions["action"] == a).sum()) for a in p.action_labels},
        "findings_by_rule": {rule: 0 for rule in RULES_CHECKED},
        "missing_data": missing_actions or {},
        "acknowledged_columns": [a.model_dump() for a in p.data.acknowledged_columns],
        "extra_columns_ignored": sorted(set(map(str, raw.columns)) - known),
    }


RULES_CHECKED = (
    "identifier_column", "identifier_value", "age_over_89", "long_text", "missing_column", "missing_value",
    "identifier_text", "whole_number", "number", "action_label", "duplicate_decision", "step_sequence",
    "day_order", "patient_per_episode", "duplicate_episode", "episode_without_record", "episode_without_decisions",
    "patient_mismatch", "followup_before_last_decision",
)  # fmt: skip
