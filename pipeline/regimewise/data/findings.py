"""Field rules and findings: each column's rule declared once (:class:`FieldRule`), checked vectorised over the
whole table, with a pydantic row model turning each failing row into a precise, masked :class:`Finding`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Annotated, Any, Literal

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, ValidationError, create_model

from regimewise.data.deidentify import find_identifiers, is_age_column, mask, shown_value
from regimewise.data.distinct import FIND, TableText, broadcast
from regimewise.data.missing import blank_mask
from regimewise.protocol.loading import ProtocolFile
from regimewise.protocol.types import level_text

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
    kind: Literal["number", "integer", "label", "text", "level"]
    low: float | None = None
    high: float | None = None
    labels: tuple[str, ...] = ()
    fix: str = ""

    def annotation(self):
        """The pydantic type of this field."""
        if self.kind == "label":
            return Literal[self.labels]  # type: ignore[valid-type]
        if self.kind == "level":
            return Annotated[Literal[self.labels], BeforeValidator(level_text)]  # type: ignore[valid-type]
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
    rules.append(
        FieldRule(cols.step, "integer", 0, p.horizon - 1, fix=f"steps are 0, 1, 2, ... below the horizon {p.horizon}")
    )
    if cols.day is not None:
        rules.append(
            FieldRule(
                cols.day,
                "integer",
                0,
                MAX_DAY,
                fix="day is whole days since the episode's index date, from 0 to 36525 (100 years)",
            )
        )
    for s in p.states:
        if s.kind == "categorical":
            fix = f"correct the record, or add the level to levels of {s.name} in the protocol"
            rules.append(FieldRule(s.source_column, "level", labels=tuple(s.levels), fix=fix))
            continue
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
def _failing_rows(frame: pd.DataFrame, rule: FieldRule, text: TableText | None = None) -> np.ndarray:
    """Boolean mask of rows whose value breaks the field rule (vectorised); ``text``, if given, is the frame's."""
    raw = frame[rule.column]
    if rule.kind == "text":
        distinct = FIND if text is None else text(rule.column)
        if distinct is FIND or distinct is None:
            return raw.isna().to_numpy() | blank_mask(raw, distinct)
        return (distinct[0] < 0) | blank_mask(raw, distinct)  # factorize codes -1 exactly the cells isna finds
    if rule.kind == "label":
        distinct = None if text is None else text(rule.column)
        if distinct is None:
            return ~raw.isin(rule.labels).to_numpy()
        codes, uniques = distinct  # each distinct value looked up once; a missing cell is no label
        return broadcast(~pd.Series(uniques, dtype=object).isin(rule.labels).to_numpy(), codes, True)
    if rule.kind == "level":
        codes, uniques = pd.factorize(raw, use_na_sentinel=True)
        known = np.isin(np.asarray([level_text(u) for u in uniques], dtype=object), np.asarray(rule.labels, object))
        return np.append(~known, True)[codes]  # a missing value (code -1) is a finding too
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


def _row_findings(
    file: str, frame: pd.DataFrame, rules: list[FieldRule], rows: np.ndarray, bad: list[np.ndarray]
) -> list[Finding]:
    """Run the pydantic row model on the failing rows and turn its errors into findings.

    ``bad`` holds each rule's vectorised failures; a value the vectorised check refuses but the row model would
    take (``1_000``, which Python's number parser reads) is still a finding, so the two can never disagree.
    """
    model = row_model(rules)
    source = source_rows(frame)
    findings = []
    for row in rows:
        record = {f"c{i}": _python_value(frame[rule.column].iat[row]) for i, rule in enumerate(rules)}
        explained = set()
        try:
            model.model_validate(record)
        except ValidationError as err:
            for problem in err.errors(include_url=False):
                index = int(str(problem["loc"][0])[1:])
                explained.add(index)
                missing = record[f"c{index}"] is None
                message = "value is missing" if missing else plain(problem["msg"])  # msg never echoes the value
                findings.append(_finding(file, source[row], rules[index], record[f"c{index}"], message, missing))
        for index, rule in enumerate(rules):
            if bad[index][row] and index not in explained:
                findings.append(_finding(file, source[row], rule, record[f"c{index}"], NOT_PLAIN[rule.kind], False))
    return findings


NOT_PLAIN = {
    "number": "not a plain number: write digits with an optional sign, decimal point and exponent (no _ or spaces)",
    "integer": "not a plain whole number: write digits with an optional sign (no _, spaces or decimals)",
    "label": "not one of the action labels",
    "level": "not one of the state's declared levels",
    "text": "value is missing or blank",
}


def _finding(file: str, row, rule: FieldRule, value, message: str, missing: bool) -> Finding:
    return Finding(
        file=file,
        row=int(row),
        column=rule.column,
        value=clip_text(value),
        rule="missing_value" if missing else _rule_name(rule),
        message=message,
        fix=rule.fix,
    )


def _python_value(value):
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return None
    if isinstance(value, np.generic):
        return value.item()
    return value


def _rule_name(rule: FieldRule) -> str:
    names = {"label": "action_label", "text": "identifier_text", "integer": "whole_number", "level": "undeclared_level"}
    return names.get(rule.kind, "number")


def plain(msg: str) -> str:
    return " ".join(msg.split()).rstrip(".")


def field_findings(
    file: str, frame: pd.DataFrame, rules: list[FieldRule], text: TableText | None = None
) -> list[Finding]:
    """Vectorised check of every field rule; the pydantic model explains at most a capped number of rows per rule.

    ``text``, if given, holds the frame's text columns already factorized (:class:`TableText` of this frame).
    """
    chosen = np.zeros(len(frame), dtype=bool)
    bad = [_failing_rows(frame, rule, text) for rule in rules]
    shown = [_listed_rows(failing) for failing in bad]  # a capped rule keeps one place for its count
    for rows in shown:
        chosen[rows] = True
    findings = _row_findings(file, frame, rules, np.flatnonzero(chosen), bad)
    for rule, failing, rows in zip(rules, bad, shown):
        unlisted = int(np.count_nonzero(failing)) - len(rows)
        if unlisted > 0:
            findings.append(
                Finding(
                    file=file,
                    row=None,
                    column=rule.column,
                    value=None,
                    rule=_rule_name(rule),
                    message=UNLISTED.format(count=unlisted, cap=len(rows)),
                    fix=rule.fix,
                )
            )
    return findings


def _listed_rows(failing: np.ndarray) -> np.ndarray:
    rows = np.flatnonzero(failing)
    return rows if len(rows) <= MAX_FINDINGS_PER_RULE else rows[: MAX_FINDINGS_PER_RULE - 1]


# A finding standing for the rows of one rule beyond the listed ones: it counts as that many problems.
UNLISTED = "{count} more row(s) fail this rule beyond the first {cap} listed"


_UNLISTED = re.compile(r"^(\d+) more row\(s\) fail this rule beyond the first \d+ listed$")


def problem_count(finding: Finding) -> int:
    """How many problems a finding stands for (one, or the unlisted rows of a capped rule)."""
    match = _UNLISTED.match(finding.message) if finding.row is None else None
    return int(match.group(1)) if match else 1


def findings_line(findings: list[Finding]) -> str:
    """The one line naming the first problem and the true total of the others (unlisted rows included)."""
    listed = [f for f in findings if f.row is not None or not _UNLISTED.match(f.message)] or findings
    first = min(listed, key=lambda f: (f.row or 0, f.rule))
    total = sum(problem_count(f) for f in findings)
    rules = sorted({f.rule for f in findings})
    return first.one_line() + (f" ({total} problems in all, of rules {rules})" if total > 1 else "")


# ---------------------------------------------------------------------------------------------- table-wide checks
def guard_roles(pf: ProtocolFile) -> tuple[list[str], list[str]]:
    """The id columns and the other declared columns (states and contract columns) of the protocol."""
    cols = pf.protocol.data.columns
    ids = [c for c in (cols.episode_id, cols.patient_id) if c is not None]
    declared = [c for c in (cols.step, cols.day, cols.action, cols.reward, cols.followup, cols.event) if c]
    declared += [s.source_column for s in pf.protocol.states]
    declared += [f"{s.name}_missing" for s in pf.protocol.states]
    return ids, declared


ID_FIX = (
    "replace the ids with study pseudonyms (codes such as P000123 assigned from a key kept outside the extract); "
    "never use names, dates, record, phone or social-security numbers as ids"
)


def identifier_findings(
    file: str, frame: pd.DataFrame, pf: ProtocolFile, text: TableText | None = None
) -> list[Finding]:
    """Identifier-like column headers and values (Safe Harbor categories); values and headers are never shown.
    ``text``, if given, is the frame's :class:`TableText`."""
    acknowledged = [a.column for a in pf.protocol.data.acknowledged_columns]
    ids, declared = guard_roles(pf)
    ages = [s.source_column for s in pf.protocol.states if is_age_column(s.name)]  # declared as ages
    source = source_rows(frame)
    position = {str(c): i + 1 for i, c in enumerate(frame.columns)}
    findings = []
    levels = {s.source_column: s.levels for s in pf.protocol.states if s.kind == "categorical"}  # labels, not values
    hits = find_identifiers(frame, acknowledged, id_columns=ids, declared=declared, ages=ages, levels=levels, text=text)
    for hit in hits:
        if hit.row is None:
            findings.append(
                Finding(
                    file=file,
                    row=None,
                    column=None,
                    value=None,
                    rule="identifier_column",
                    message=f"the header of column {position[hit.column]} looks like a direct identifier "
                    f"({hit.category}); the header is not shown",
                    fix="remove the column from the extract or rename it; if it is not an identifier, list it in "
                    "data.acknowledged_columns with a justification",
                )
            )
            continue
        age = hit.category == "age over 89"
        findings.append(
            Finding(
                file=file,
                row=int(source[hit.row]),
                column=hit.column,
                value=mask("x" * hit.length),
                rule="age_over_89" if age else "identifier_value",
                message="age above 89 is an identifier under Safe Harbor"
                if age
                else f"value looks like a direct identifier ({hit.category})",
                fix=_identifier_fix(hit, ids, declared),
            )
        )
    return findings


def _identifier_fix(hit, ids, declared) -> str:
    if hit.column in ids:
        return ID_FIX
    if hit.category == "age over 89":
        fix = "group every age above 89 into the single category '90+' (or cap at 89 with the study's approval)"
        if hit.column in declared:
            return fix + "; if the state holds no ages, name it for what it holds (e.g. age_sq for a square)"
        return fix + (
            "; if the column holds no ages (a derived term such as a square), declare it as a state, drop it, or "
            "list it in data.acknowledged_columns with a justification"
        )
    fix = "remove or replace identifiers in the extract before analysis"
    if hit.column not in declared:
        fix += "; if the column is not an identifier, list it in data.acknowledged_columns with a justification"
    return fix


def long_text_findings(file: str, frame: pd.DataFrame, text: TableText | None = None) -> list[Finding]:
    """Text cells longer than MAX_TEXT_CHARS (free text does not belong in an analysis extract); ``text``, if
    given, is the frame's :class:`TableText`, whose distinct values are measured instead of every cell."""
    findings = []
    source = source_rows(frame)
    for column in frame.columns:
        values = frame[column]
        if not pd.api.types.is_object_dtype(values):
            continue
        distinct = None if text is None else text(column)
        lengths = text_lengths(values) if distinct is None else distinct_lengths(*distinct)
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


def distinct_lengths(codes: np.ndarray, uniques: np.ndarray) -> np.ndarray:
    """:func:`text_lengths` of a text column from its distinct values (:func:`distinct_text`): each value is
    measured once (code points, as ``len``) and broadcast back to the rows, 0 where missing."""
    return broadcast(text_lengths(pd.Series(uniques, dtype=object)), codes, 0)


def text_lengths(values: pd.Series) -> np.ndarray:
    """Characters in each cell of an object column as text (0 where missing).

    A column of ``str`` is measured by pyarrow (code points, as ``len``); any other, or one pyarrow cannot hold
    (a lone surrogate), through pandas' string dtype, which reads each cell's ``str``.
    """
    cells = values.to_numpy()
    if pd.api.types.infer_dtype(cells, skipna=True) == "string":
        try:
            text = pa.array(cells, type=pa.string(), from_pandas=True)
        except (pa.ArrowException, UnicodeError):
            pass
        else:
            return pc.fill_null(pc.utf8_length(text), 0).to_numpy()
    return values.astype("string").str.len().fillna(0).to_numpy()
