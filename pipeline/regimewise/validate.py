"""Validate the decision records against the data contract and the protocol.

Field rules (types, ranges, labels, missing values) are declared once per column as :class:`FieldRule`. From
them come both a vectorised pandas check, which finds the failing rows of a large table quickly, and a pydantic
row model, which turns each failing row into precise error objects. Rules that span rows (consecutive steps,
duplicated decisions, day order, one patient per episode) are vectorised only.

Every finding names the file, the 1-based data row, the column, the value and the rule.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, ValidationError, create_model

from .errors import DataValidationError
from .io import read_table
from .protocol import ProtocolFile

MAX_VALUE_CHARS = 40


class Finding(BaseModel):
    """One row-level problem in an input table."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    file: str
    row: int | None = Field(description="1-based data row (the header is not counted); null for whole-table rules")
    column: str | None
    value: str | None
    rule: str
    message: str

    def one_line(self) -> str:
        where = [f"{self.file}"]
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.column is not None:
            where.append(f"column {self.column!r}")
        value = "" if self.value is None else f" (value {self.value!r})"
        return f"{', '.join(where)}: {self.message}{value} [rule {self.rule}]"


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
        FieldRule(cols.day, "integer", 0, None, fix="day is whole days since the episode's index date, never negative"),
    ]
    for s in p.states:
        low, high = s.plausible_range
        kind = "number" if s.kind == "continuous" else "integer"
        rules.append(
            FieldRule(s.source_column, kind, low, high, fix=f"correct the record or widen plausible_range of {s.name}")
        )
    rules += [
        FieldRule(cols.action, "label", labels=p.action_labels, fix=f"actions must be one of {list(p.action_labels)}"),
        FieldRule(cols.reward, "number", fix="reward must be a finite number for every decision"),
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
        return raw.isna().to_numpy() | (raw.astype(str).str.strip() == "").to_numpy()
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
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return None
    text = str(value)
    return text if len(text) <= MAX_VALUE_CHARS else text[: MAX_VALUE_CHARS - 3] + "..."


def _row_findings(file: str, frame: pd.DataFrame, rules: list[FieldRule], rows: np.ndarray) -> list[Finding]:
    """Run the pydantic row model on the failing rows and turn its errors into findings."""
    model = row_model(rules)
    findings = []
    for row in rows:
        record = {f"c{i}": _python_value(frame[rule.column].iat[row]) for i, rule in enumerate(rules)}
        try:
            model.model_validate(record)
        except ValidationError as err:
            for problem in err.errors(include_url=False):
                rule = rules[int(str(problem["loc"][0])[1:])]
                missing = record[f"c{rules.index(rule)}"] is None
                findings.append(
                    Finding(
                        file=file,
                        row=int(row) + 1,
                        column=rule.column,
                        value=_short(record[f"c{rules.index(rule)}"]),
                        rule="missing_value" if missing else _rule_name(rule),
                        message=("value is missing; " if missing else "") + f"{_plain(problem['msg'])}; {rule.fix}",
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


# ---------------------------------------------------------------------------------------------- row-spanning checks
def _sequence_findings(file: str, frame: pd.DataFrame, pf: ProtocolFile) -> list[Finding]:
    cols = pf.protocol.data.columns
    findings = []
    ep, step, day = frame[cols.episode_id].astype(str), frame[cols.step].astype(np.int64), frame[cols.day]
    order = np.lexsort((step.to_numpy(), ep.to_numpy()))
    ep_s, step_s, day_s = ep.to_numpy()[order], step.to_numpy()[order], day.to_numpy(dtype=float)[order]
    same = np.r_[False, ep_s[1:] == ep_s[:-1]]
    duplicate = same & np.r_[False, step_s[1:] == step_s[:-1]]
    for i in np.flatnonzero(duplicate):
        findings.append(
            Finding(file=file, row=int(order[i]) + 1, column=cols.step, value=str(step_s[i]), rule="duplicate_decision",
                    message=f"episode {ep_s[i]!r} has step {step_s[i]} twice; keep one record per decision point")
        )
    expected = np.where(same, np.r_[0, step_s[:-1]] + 1, 0)
    gap = (step_s != expected) & ~duplicate
    for i in np.flatnonzero(gap):
        findings.append(
            Finding(file=file, row=int(order[i]) + 1, column=cols.step, value=str(step_s[i]), rule="step_sequence",
                    message=f"episode {ep_s[i]!r}: expected step {expected[i]}; steps run 0, 1, 2, ... without gaps")
        )
    backwards = same & np.r_[False, day_s[1:] < day_s[:-1]]
    for i in np.flatnonzero(backwards):
        findings.append(
            Finding(file=file, row=int(order[i]) + 1, column=cols.day, value=_short(day_s[i]), rule="day_order",
                    message=f"episode {ep_s[i]!r}: day goes backwards at step {step_s[i]}; days never decrease")
        )
    if cols.patient_id is not None:
        per_episode = frame.groupby(cols.episode_id, sort=True)[cols.patient_id].nunique()
        for episode in per_episode.index[per_episode.to_numpy() > 1]:
            row = int(np.flatnonzero(ep.to_numpy() == str(episode))[0]) + 1
            findings.append(
                Finding(file=file, row=row, column=cols.patient_id, value=None, rule="patient_per_episode",
                        message=f"episode {str(episode)!r} has more than one patient id; an episode is one patient's")
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
                    message="required column is absent; add it or map it in data.columns / states[].column")
            for c in missing
        ]
    bad = np.zeros(len(frame), dtype=bool)
    for rule in rules:
        bad |= _failing_rows(frame, rule)
    findings = _row_findings(file, frame, rules, np.flatnonzero(bad))
    if not findings:
        findings = _sequence_findings(file, frame, pf)
    return findings


def clean_decisions(pf: ProtocolFile, frame: pd.DataFrame) -> pd.DataFrame:
    """Rename to contract names, cast types and sort by episode and step (call only on a clean table)."""
    p = pf.protocol
    cols = p.data.columns
    out = pd.DataFrame(
        {
            "episode_id": frame[cols.episode_id].astype(str),
            "patient_id": (frame[cols.patient_id] if cols.patient_id else frame[cols.episode_id]).astype(str),
            "step": pd.to_numeric(frame[cols.step]).astype(np.int64),
            "day": pd.to_numeric(frame[cols.day]).astype(np.int64),
        }
    )
    for s in p.states:
        out[s.name] = pd.to_numeric(frame[s.source_column]).astype(np.float64)
    out["action"] = frame[cols.action].astype(str)
    out["reward"] = pd.to_numeric(frame[cols.reward]).astype(np.float64)
    return out.sort_values(["episode_id", "step"], kind="mergesort").reset_index(drop=True)


def episodes_table(pf: ProtocolFile, decisions: pd.DataFrame) -> pd.DataFrame:
    """The episodes table: the protocol's file when given (checked against the decisions), else derived."""
    counts = decisions.groupby("episode_id", sort=True).agg(
        patient_id=("patient_id", "first"), n_decisions=("step", "size")
    ).reset_index()
    path = pf.episodes_path
    if path is None:
        return counts
    frame = read_table(path, "episodes")
    name = pf.protocol.data.columns.episode_id
    if name not in frame.columns:
        raise DataValidationError(f"{path.name}: required column {name!r} is absent [rule missing_column]")
    frame = frame.rename(columns={name: "episode_id"})
    frame["episode_id"] = frame["episode_id"].astype(str)
    repeated = frame["episode_id"].duplicated()
    if repeated.any():
        row = int(np.flatnonzero(repeated.to_numpy())[0]) + 1
        raise DataValidationError(
            f"{path.name}, row {row}: episode {frame['episode_id'].iat[row - 1]!r} appears twice; one row per episode"
            " [rule duplicate_episode]"
        )
    frame = frame.drop(columns=[c for c in ("patient_id",) if c in frame.columns])
    merged = counts.merge(frame, on="episode_id", how="left", validate="one_to_one")
    return merged.sort_values("episode_id", kind="mergesort").reset_index(drop=True)


def validate_records(pf: ProtocolFile) -> ValidationResult:
    """Read, check and clean the records named in the protocol.

    Raises
    ------
    DataValidationError
        When any rule fails; ``errors`` holds every finding and the message names the first.
    """
    path = pf.decisions_path
    frame = read_table(path, "decisions")
    findings = check_decisions(pf, frame, Path(path).name)
    if findings:
        first = min(findings, key=lambda f: (f.row or 0, f.rule))
        more = f" ({len(findings) - 1} more problem(s) of rules {sorted({f.rule for f in findings})})" \
            if len(findings) > 1 else ""
        raise DataValidationError(first.one_line() + more, findings)
    decisions = clean_decisions(pf, frame)
    episodes = episodes_table(pf, decisions)
    return ValidationResult(decisions=decisions, episodes=episodes, summary=summarise(pf, decisions, frame))


def summarise(pf: ProtocolFile, decisions: pd.DataFrame, raw: pd.DataFrame) -> dict:
    """Counts for validation.json (no individual-level values)."""
    p = pf.protocol
    lengths = decisions.groupby("episode_id").size()
    return {
        "decisions_file": pf.decisions_path.name,
        "episodes_file": None if pf.episodes_path is None else pf.episodes_path.name,
        "rows_read": int(len(raw)),
        "rows_kept": int(len(decisions)),
        "rows_rejected": 0,
        "episodes": int(decisions["episode_id"].nunique()),
        "patients": int(decisions["patient_id"].nunique()),
        "episode_length": {str(k): int(v) for k, v in sorted(Counter(lengths.to_numpy().tolist()).items())},
        "decisions_by_step": {str(k): int(v) for k, v in decisions.groupby("step").size().items()},
        "actions": {a: int((decisions["action"] == a).sum()) for a in p.action_labels},
        "findings_by_rule": {},
        "extra_columns_ignored": sorted(set(map(str, raw.columns)) - {r.column for r in decision_rules(pf)}),
    }
