"""Validate the decision records against the data contract and the protocol.

Field rules (types, ranges, labels, missing values) are declared once per column as :class:`FieldRule`. From
them come both a vectorised pandas check, which finds the failing rows of a large table quickly, and a pydantic
row model, which turns each failing row into precise error objects. Rules that span rows (consecutive steps,
duplicated decisions, day order, one patient per episode) are vectorised only.

Before the field rules run, the de-identification guard (:mod:`regimewise.data.deidentify`) refuses identifier-like
columns and values, and the protocol's missing-data policy (:mod:`regimewise.data.missing`) is applied. After them
come the episodes table and referential integrity between the two tables.

Every finding names the file, the 1-based data row, the column, a value (masked when it looks like an
identifier) and the rule. All findings go to ``validation_errors.csv`` (capped per rule, with totals), written
by :func:`write_error_report`; the exception message is one line naming the first.
"""

from __future__ import annotations

import re
from collections import Counter
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from regimewise.data.distinct import TableText
from regimewise.data.findings import (
    MAX_FINDINGS_PER_RULE,
    Finding,
    decision_rules,
    identifier_findings,
    long_text_findings,
    problem_count,
)
from regimewise.data.missing import apply_missing_policy
from regimewise.data.reading import read_table
from regimewise.data.records import (
    check_decisions,
    check_episodes,
    clean_decisions,
    clean_episodes,
    episode_runs,
    merged_levels,
    raise_if,
)
from regimewise.io import write_text
from regimewise.protocol.loading import ProtocolFile

ERROR_COLUMNS = ("rule", "file", "row", "column", "value", "problem", "how_to_fix")


@dataclass(frozen=True)
class ValidationResult:
    """Clean tables and the counts that go to validation.json."""

    decisions: pd.DataFrame
    episodes: pd.DataFrame
    summary: dict


def collect_findings(pf: ProtocolFile) -> tuple[list[Finding], ValidationResult | None]:
    """Every finding for the protocol's records, and the clean result when there are none."""
    p = pf.protocol
    path = pf.decisions_path
    raw = read_table(path, "decisions", p.data.delimiter)
    episodes_raw = None if pf.episodes_path is None else read_table(pf.episodes_path, "episodes", p.data.delimiter)
    name = Path(path).name
    pf, defaulted = default_columns(pf, raw)
    p = pf.protocol
    text = TableText(raw)  # each text column factorized once for the rules below
    findings = identifier_findings(name, raw, pf, text) + long_text_findings(name, raw, text)
    if episodes_raw is not None:
        ep_name = pf.episodes_path.name
        ep_text = TableText(episodes_raw)
        findings += identifier_findings(ep_name, episodes_raw, pf, ep_text)
        findings += long_text_findings(ep_name, episodes_raw, ep_text)
    if findings:
        return findings, None
    frame, missing_actions = apply_missing_policy(pf, raw)
    findings = (
        survival_day_findings(pf, name, defaulted)
        or policy_findings(pf, name, frame, missing_actions, len(raw))
        or check_decisions(pf, frame, name, text if frame is raw else None)  # the policy changed no row
    )
    del text  # its codes (one integer per row and text column) are not held while the clean tables are built
    if findings:
        return findings, None
    decisions = clean_decisions(pf, frame)
    cols = p.data.columns
    # episodes the missing-data policy emptied (none when every row was kept)
    dropped = (
        set() if len(decisions) == len(raw) else set(raw[cols.episode_id].astype(str)) - set(decisions["episode_id"])
    )
    if episodes_raw is not None:
        findings = check_episodes(pf, episodes_raw, pf.episodes_path.name, decisions, dropped, ep_text)
        if findings:
            return findings, None
    episodes = clean_episodes(pf, episodes_raw, decisions, dropped)
    summary = summarise(pf, decisions, raw, missing_actions, len(dropped), frame)
    summary["defaulted_columns"] = defaulted
    return [], ValidationResult(decisions=decisions, episodes=episodes, summary=summary)


DEFAULTED = {
    "patient_id": "no patient_id column: each episode is its own patient (resampled and cross-fitted alone)",
    "day": "no day column: the decision index (step 0, 1, 2, ...) is used as the day",
}


def default_columns(pf: ProtocolFile, raw: pd.DataFrame) -> tuple[ProtocolFile, dict[str, str]]:
    """The protocol with ``patient_id`` and ``day`` set to null when the records have no such column and the
    protocol did not name one (or wrote null), and what each default means (for validation.json and the report).

    A column the protocol names explicitly stays required: a misspelt mapping is a missing column, not a default.
    """
    cols = pf.protocol.data.columns
    present = set(map(str, raw.columns))
    defaulted = {
        key: DEFAULTED[key]
        for key in DEFAULTED
        if getattr(cols, key) is None or (key not in cols.model_fields_set and getattr(cols, key) not in present)
    }
    if not defaulted:
        return pf, {}
    columns = cols.model_copy(update=dict.fromkeys(defaulted))
    data = pf.protocol.data.model_copy(update={"columns": columns})
    return replace(pf, protocol=pf.protocol.model_copy(update={"data": data})), defaulted


def survival_day_findings(pf: ProtocolFile, file: str, defaulted: dict) -> list[Finding]:
    """A survival section needs real days: refuse it when the decision index stands in for the day."""
    if pf.protocol.survival is None or "day" not in defaulted:
        return []
    return [
        Finding(
            file=file,
            row=None,
            column="day",
            value=None,
            rule="missing_column",
            message="the survival section needs real days since the index date, but the file has no day column",
            fix="add the day column (or name it in data.columns.day), or remove the survival section",
        )
    ]


def policy_findings(pf: ProtocolFile, file: str, frame: pd.DataFrame, actions: dict, rows_read: int) -> list[Finding]:
    """Refusals of the missing-data policy's result: no decision left, or a state with no observed value."""
    if frame.empty:
        dropped = ", ".join(sorted(k for k, v in actions.items() if v.get("decisions_dropped")))
        return [
            Finding(
                file=file,
                row=None,
                column=None,
                value=None,
                rule="missing_value",
                message=f"the drop policy of data.missing ({dropped}) leaves no decision to analyse",
                fix="fill the missing values in the extract, or choose carry_forward or indicator for these states",
            )
        ]
    by_name = {s.name: s.source_column for s in pf.protocol.states}
    return [
        Finding(
            file=file,
            row=None,
            column=by_name[state],
            value=None,
            rule="missing_value",
            message=f"state {state!r} is missing in every decision, so the indicator policy has no observed "
            "value to fill with",
            fix=f"add the values of {state!r} to the extract, or drop the state from the protocol",
        )
        for state, entry in actions.items()
        if entry["policy"] == "indicator" and entry["missing"] == rows_read
    ]


def validate_records(pf: ProtocolFile) -> ValidationResult:
    """Read, check and clean the records named in the protocol.

    Raises
    ------
    DataValidationError
        When any rule fails; ``errors`` holds every finding and the message names the first.
    """
    findings, result = collect_findings(pf)
    raise_if(findings)
    return result


# ---------------------------------------------------------------------------------------------- error report
def error_rows(findings) -> list[dict]:
    """Rows of validation_errors.csv sorted by rule, at most MAX_FINDINGS_PER_RULE per rule, then a total row."""
    by_rule: dict[str, list[Finding]] = {}
    for f in findings:
        by_rule.setdefault(f.rule, []).append(f)
    rows = []
    for rule in sorted(by_rule):
        # a finding that counts a rule's unlisted rows (row None) goes after the rows it follows
        group = sorted(by_rule[rule], key=lambda f: (f.file, f.row is None, f.row or 0, f.column or ""))
        for f in group[:MAX_FINDINGS_PER_RULE]:
            rows.append(
                {
                    "rule": rule,
                    "file": f.file,
                    "row": "" if f.row is None else f.row,
                    "column": f.column or "",
                    "value": f.value or "",
                    "problem": f.message,
                    "how_to_fix": f.fix,
                }
            )
        by_row = sum(f.row is not None for f in group[:MAX_FINDINGS_PER_RULE])
        total = sum(problem_count(f) for f in group)  # true total: unlisted rows included
        rows.append(
            {
                "rule": rule,
                "file": "",
                "row": "",
                "column": "",
                "value": "",
                "problem": f"total: {total} problem(s) of this rule ({by_row} listed above row by row)",
                "how_to_fix": "",
            }
        )
    return rows


FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


PLAIN_NUMBER = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$")


def neutralise(cell):
    """A text cell that a spreadsheet would run as a formula, prefixed with ``'`` (OWASP, "CSV Injection").

    A plain number such as ``-2.5`` is left as it is: a spreadsheet reads it as a number, not a formula.
    """
    if not isinstance(cell, str) or not cell.startswith(FORMULA_STARTS) or PLAIN_NUMBER.match(cell):
        return cell
    return "'" + cell


def write_error_report(path, findings) -> None:
    """Write validation_errors.csv (header only when there are no findings), text cells neutralised against
    spreadsheet formula injection (row numbers are written as numbers and never start with a sign)."""
    rows = [{k: neutralise(v) for k, v in row.items()} for row in error_rows(findings)]
    buffer = pd.DataFrame(rows, columns=list(ERROR_COLUMNS)).to_csv(index=False, lineterminator="\n")
    write_text(path, buffer)


def report_lines(path, n: int = 10) -> list[str]:
    """The first n lines of a validation_errors.csv (already sorted by rule) for the terminal; [] if none."""
    path = Path(path)
    if not path.is_file():
        return []
    table = pd.read_csv(path, dtype=str, keep_default_na=False)
    if table.empty:
        return []
    listed = table[table["problem"].str.startswith("total: ") == False]  # noqa: E712
    lines = []
    for row in listed.head(n).itertuples(index=False):
        where = ", ".join(
            x for x in (row.file, row.row and f"row {row.row}", row.column and f"column {row.column!r}") if x
        )
        value = f" (value {row.value!r})" if row.value else ""
        lines.append(f"[{row.rule}] {where}: {row.problem}{value}; {row.how_to_fix}")
    if len(listed) > n:
        lines.append(f"... and {len(listed) - n} more listed")
    return lines


def summarise(
    pf: ProtocolFile,
    decisions: pd.DataFrame,
    raw: pd.DataFrame,
    missing_actions: dict | None = None,
    episodes_dropped: int = 0,
    frame: pd.DataFrame | None = None,
) -> dict:
    """Counts for validation.json (no individual-level values)."""
    p = pf.protocol
    levels = merged_levels(frame, pf) if frame is not None else {}
    starts, lengths = episode_runs(decisions)
    known = {r.column for r in decision_rules(pf)} | {f"{s}_missing" for s in p.state_names}
    actions = decisions["action"].value_counts()  # one pass over the labels (clean text) for all actions
    return {
        "decisions_file": pf.decisions_path.name,
        "episodes_file": None if pf.episodes_path is None else pf.episodes_path.name,
        "rows_read": int(len(raw)),
        "rows_kept": int(len(decisions)),
        "rows_rejected": 0,
        "rows_dropped_missing": int(len(raw) - len(decisions)),
        "episodes_dropped_missing": int(episodes_dropped),
        "episodes": int(starts.size),
        "patients": int(decisions["patient_id"].iloc[starts].nunique()),  # one patient per episode (checked)
        "episode_length": {str(k): int(v) for k, v in sorted(Counter(lengths.tolist()).items())},
        "decisions_by_step": steps_present(decisions["step"].to_numpy()),
        "actions": {a: int(actions.get(a, 0)) for a in p.action_labels},
        "findings_by_rule": {rule: 0 for rule in RULES_CHECKED},
        "missing_data": missing_actions or {},
        "acknowledged_columns": [a.model_dump() for a in p.data.acknowledged_columns],
        "extra_columns_ignored": sorted(set(map(str, raw.columns)) - known),
        **({"categorical_levels": levels} if levels else {}),
    }


def steps_present(step: np.ndarray) -> dict[str, int]:
    """Decisions at each step present, in step order (``groupby("step").size()`` of clean steps, 0 or more, by
    counting instead of grouping)."""
    counts = np.bincount(step)
    return {str(k): int(counts[k]) for k in np.flatnonzero(counts)}


RULES_CHECKED = (
    "identifier_column",
    "identifier_value",
    "age_over_89",
    "long_text",
    "missing_column",
    "missing_value",
    "identifier_text",
    "whole_number",
    "number",
    "action_label",
    "undeclared_level",
    "rare_level",
    "duplicate_decision",
    "step_sequence",
    "day_order",
    "patient_per_episode",
    "duplicate_episode",
    "episode_without_record",
    "episode_without_decisions",
    "patient_mismatch",
    "followup_before_last_decision",
)
