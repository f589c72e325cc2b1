"""Field rules and findings: each column's rule declared once (:class:`FieldRule`), checked vectorised over the
whole table, with a pydantic row model turning each failing row into a precise, masked :class:`Finding`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any, Literal

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, ValidationError, create_model

from regimewise.data.deidentify import find_identifiers, mask, shown_value
from regimewise.data.missing import blank_mask
from regimewise.protocol.loading import ProtocolFile

MAX_VALUE_CHARS = 40


MAX_TEXT_CHARS = 200


MAX_FINDINGS_PER_RULE = 100


MAX_ABS_NUMBER = 1e9


MAX_DAY = 36525


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
        FieldRule(
            cols.day,
            "integer",
            0,
            MAX_DAY,
            fix="day is whole days since the episode's index date, from 0 to 36525 (100 years)",
        ),
    ]
    for s in p.states:
        low, high = s.plausible_range
        kind = "number" if s.kind == "continuous" else "integer"
        rules.append(
            FieldRule(s.source_column, kind, low, high, fix=f"correct the record or widen plausible_range of {s.name}")
        )
    rules += [
        FieldRule(cols.action, "label", labels=p.action_labels, fix=f"actions must be one of {list(p.action_labels)}"),
        FieldRule(
            cols.reward,
            "number",
            -MAX_ABS_NUMBER,
            MAX_ABS_NUMBER,
            fix="reward must be a finite number between -1e9 and 1e9 for every decision",
        ),
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


def clip_text(value) -> str | None:
    """A value as it may be shown: None if missing, masked if identifier-like, else at most 40 characters."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return None
    text = shown_value(value)
    return text if len(text) <= MAX_VALUE_CHARS else text[: MAX_VALUE_CHARS - 3] + "..."


def source_rows(frame: pd.DataFrame) -> np.ndarray:
    """1-based data row in the file of each row (the index is the file's 0-based row number)."""
    return frame.index.to_numpy(dtype=np.int64) + 1


def _row_findings(file: str, frame: pd.DataFrame, rules: list[FieldRule], rows: np.ndarray) -> list[Finding]:
    """Run the pydantic row model on the failing rows and turn its errors into findings."""
    model = row_model(rules)
    source = source_rows(frame)
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
                        value=clip_text(record[f"c{index}"]),
                        rule="missing_value" if missing else _rule_name(rule),
                        message="value is missing"
                        if missing
                        else plain(problem["msg"]),  # pydantic's msg never echoes the value
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


def plain(msg: str) -> str:
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
    source = source_rows(frame)
    findings = []
    for hit in find_identifiers(frame, acknowledged):
        if hit.row is None:
            findings.append(
                Finding(
                    file=file,
                    row=None,
                    column=hit.column,
                    value=None,
                    rule="identifier_column",
                    message=f"column name looks like a direct identifier ({hit.category})",
                    fix="remove the column from the extract, or list it in data.acknowledged_columns with a "
                    "justification",
                )
            )
        elif hit.category == "age over 89":
            findings.append(
                Finding(
                    file=file,
                    row=int(source[hit.row]),
                    column=hit.column,
                    value=mask("x" * hit.length),
                    rule="age_over_89",
                    message="age above 89 is an identifier under Safe Harbor",
                    fix="group every age above 89 into the single category '90+' (or cap at 89 with the study's "
                    "approval)",
                )
            )
        else:
            findings.append(
                Finding(
                    file=file,
                    row=int(source[hit.row]),
                    column=hit.column,
                    value=mask("x" * hit.length),
                    rule="identifier_value",
                    message=f"value looks like a direct identifier ({hit.category})",
                    fix="remove or replace identifiers in the extract before analysis",
                )
            )
    return findings


def long_text_findings(file: str, frame: pd.DataFrame) -> list[Finding]:
    """Text cells longer than MAX_TEXT_CHARS (free text does not belong in an analysis extract)."""
    findings = []
    source = source_rows(frame)
    for column in frame.columns:
        values = frame[column]
        if not pd.api.types.is_object_dtype(values):
            continue
        lengths = values.astype("string").str.len().fillna(0).to_numpy()
        for row in np.flatnonzero(lengths > MAX_TEXT_CHARS)[:MAX_FINDINGS_PER_RULE]:
            findings.append(
                Finding(
                    file=file,
                    row=int(source[row]),
                    column=str(column),
                    value=mask(values.iat[row]),
                    rule="long_text",
                    message=f"text of {int(lengths[row])} characters (at most {MAX_TEXT_CHARS})",
                    fix="remove free text from the extract; codes and numbers only",
                )
            )
    return findings
