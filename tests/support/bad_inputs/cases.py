"""The catalogue of defects: each builds a tiny study (made-up records) with exactly one thing wrong.

A defect is a name, the part of the input it breaks, the text the one-line error must contain (the place and
the rule), and a function that writes the study into a folder and returns the protocol path. The base study
is tests/tiny.py's protocol with decisions and an episodes table, which passes validation.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from support.tiny import tiny_decisions, tiny_episodes, tiny_protocol_dict


@dataclass(frozen=True)
class Defect:
    name: str
    part: str  # decisions | episodes | protocol | file
    expected: tuple[str, ...]
    build: Callable[[Path], Path]


def _study(folder: Path, decisions=None, episodes=None, protocol=None, decisions_text=None, name="decisions.csv"):
    folder.mkdir(parents=True, exist_ok=True)
    d = tiny_decisions() if decisions is None else decisions
    if decisions_text is not None:
        (folder / name).write_bytes(decisions_text if isinstance(decisions_text, bytes) else decisions_text.encode())
    else:
        d.to_csv(folder / name, index=False)
    (tiny_episodes(tiny_decisions()) if episodes is None else episodes).to_csv(folder / "episodes.csv", index=False)
    p = tiny_protocol_dict(decisions=name, episodes="episodes.csv")
    if protocol is not None:
        protocol(p)
    path = folder / "protocol.yaml"
    path.write_text(yaml.safe_dump(p, sort_keys=False), encoding="utf-8")
    return path


def decisions(change):
    """A study whose decisions table is changed in place by ``change(frame)``."""

    def build(folder):
        frame = tiny_decisions().astype(object)
        change(frame)
        return _study(folder, decisions=frame)

    return build


def episodes(change):
    def build(folder):
        frame = tiny_episodes().astype(object)
        frame = change(frame)
        return _study(folder, episodes=frame)

    return build


def protocol(change):
    return lambda folder: _study(folder, protocol=change)


def raw(text, name="decisions.csv", settings=None):
    return lambda folder: _study(folder, decisions_text=text, name=name, protocol=settings)


def protocol_text(text):
    def build(folder):
        path = _study(folder)
        path.write_text(text, encoding="utf-8")
        return path

    return build


def cell(row, column, value):
    def change(frame):
        frame.loc[row, column] = value

    return change


def add_column(column, values, row=None, value=None):
    def change(frame):
        frame[column] = values
        if row is not None:
            frame.loc[row, column] = value

    return change


def _escape(folder: Path) -> Path:
    path = _study(folder / "inner")
    tiny_decisions().to_csv(folder / "outside.csv", index=False)
    p = yaml.safe_load(path.read_text(encoding="utf-8"))
    p["data"]["decisions"] = "../outside.csv"
    path.write_text(yaml.safe_dump(p, sort_keys=False), encoding="utf-8")
    return path


def _no_step_one(frame):
    frame.drop(index=frame.index[(frame["episode_id"] == "E003") & (frame["step"] == 1)], inplace=True)


def _repeat_header(text: str) -> str:
    lines = text.splitlines()
    return "\n".join([lines[0] + ",bp"] + [line + ",120" for line in lines[1:]]) + "\n"


_CSV = tiny_decisions().to_csv(index=False)
_HEADER = _CSV.splitlines()[0] + "\n"
ROW = "decisions.csv, row {}, column '{}'"
EP = "episodes.csv, row {}, column '{}'"

DEFECTS = [
    # ---- protocol
    Defect("unknown key", "protocol", ("sneaky: unknown key 'sneaky'",), protocol(lambda p: p.update(sneaky=1))),
    Defect("horizon of wrong type", "protocol", ("horizon",), protocol(lambda p: p.update(horizon="three"))),
    Defect(
        "threshold out of range",
        "protocol",
        ("constraints.support_threshold",),
        protocol(lambda p: p.update(constraints={"support_threshold": 1.5})),
    ),
    Defect(
        "duplicate action labels",
        "protocol",
        ("action label 'hold' is declared twice",),
        protocol(lambda p: p["actions"].append({"label": "hold", "description": "again"})),
    ),
    Defect(
        "state declared twice",
        "protocol",
        ("state name 'bp' is declared twice",),
        protocol(lambda p: p["states"].append(dict(p["states"][0]))),
    ),
    Defect("path escapes the protocol folder", "protocol", ("data.decisions '../outside.csv' leads outside",), _escape),
    Defect(
        "decisions file not found",
        "protocol",
        ("decisions file", "not found"),
        protocol(lambda p: p["data"].update(decisions="nowhere.csv")),
    ),
    Defect("discount zero", "protocol", ("discount",), protocol(lambda p: p.update(discount=0))),
    Defect(
        "plausible range reversed",
        "protocol",
        ("plausible_range of 'bp' must have low < high",),
        protocol(lambda p: p["states"][0].update(plausible_range=[250, 70])),
    ),
    Defect(
        "binary state with wide range",
        "protocol",
        ("binary state 'flag'",),
        protocol(lambda p: p["states"][1].update(plausible_range=[0, 2])),
    ),
    Defect(
        "missing policy for an undeclared state",
        "protocol",
        ("data.missing names 'weight'",),
        protocol(lambda p: p["data"].update(missing={"weight": "drop"})),
    ),
    Defect(
        "unknown missing policy",
        "protocol",
        ("data.missing.bp",),
        protocol(lambda p: p["data"].update(missing={"bp": "guess"})),
    ),
    Defect(
        "acknowledgement without justification",
        "protocol",
        ("data.acknowledged_columns[0].justification: must have at least 20 characters",),
        protocol(lambda p: p["data"].update(acknowledged_columns=[{"column": "zip", "justification": "ok"}])),
    ),
    Defect(
        "delimiter not allowed", "protocol", ("data.delimiter",), protocol(lambda p: p["data"].update(delimiter="|"))
    ),
    Defect(
        "state column is a contract column",
        "protocol",
        ("data-contract column",),
        protocol(lambda p: p["states"][0].update(column="reward")),
    ),
    Defect(
        "required section missing",
        "protocol",
        ("reward: required key is missing",),
        protocol(lambda p: p.pop("reward")),
    ),
    Defect("invalid YAML", "protocol", ("not valid YAML",), protocol_text("study: [unclosed\n")),
    Defect(
        "key repeated in YAML", "protocol", ("key 'horizon' appears twice",), protocol_text("horizon: 3\nhorizon: 4\n")
    ),
    Defect("protocol is a list", "protocol", ("expected a mapping",), protocol_text("- a\n- b\n")),
    # ---- decisions table: fields
    Defect(
        "missing state column",
        "decisions",
        ("column 'bp'", "[rule missing_column]"),
        decisions(lambda f: f.drop(columns=["bp"], inplace=True)),
    ),
    Defect(
        "text in numeric state", "decisions", (ROW.format(5, "bp"), "[rule number]"), decisions(cell(4, "bp", "high"))
    ),
    Defect(
        "state out of plausible range",
        "decisions",
        (ROW.format(8, "bp"), "[rule number]"),
        decisions(cell(7, "bp", 300.0)),
    ),
    Defect(
        "infinite reward",
        "decisions",
        (ROW.format(12, "reward"), "[rule number]"),
        decisions(cell(11, "reward", np.inf)),
    ),
    Defect("huge reward", "decisions", (ROW.format(3, "reward"), "[rule number]"), decisions(cell(2, "reward", 1e300))),
    Defect(
        "fractional step", "decisions", (ROW.format(2, "step"), "[rule whole_number]"), decisions(cell(1, "step", 1.5))
    ),
    Defect("negative day", "decisions", (ROW.format(1, "day"), "[rule whole_number]"), decisions(cell(0, "day", -4))),
    Defect(
        "day beyond a century",
        "decisions",
        (ROW.format(3, "day"), "[rule whole_number]"),
        decisions(cell(2, "day", 10**7)),
    ),
    Defect(
        "binary state not 0/1",
        "decisions",
        (ROW.format(3, "flag"), "[rule whole_number]"),
        decisions(cell(2, "flag", 2)),
    ),
    Defect(
        "unknown action label",
        "decisions",
        (ROW.format(6, "action"), "[rule action_label]"),
        decisions(cell(5, "action", "double")),
    ),
    Defect(
        "missing action",
        "decisions",
        (ROW.format(4, "action"), "[rule missing_value]"),
        decisions(cell(3, "action", np.nan)),
    ),
    Defect(
        "missing state value",
        "decisions",
        (ROW.format(10, "bp"), "[rule missing_value]"),
        decisions(cell(9, "bp", np.nan)),
    ),
    Defect(
        "missing episode id",
        "decisions",
        (ROW.format(7, "episode_id"), "[rule missing_value]"),
        decisions(cell(6, "episode_id", np.nan)),
    ),
    Defect(
        "carry forward cannot fill a first step",
        "decisions",
        (ROW.format(1, "bp"), "[rule missing_value]"),
        lambda folder: _study(
            folder,
            decisions=_with(cell(0, "bp", np.nan)),
            protocol=lambda p: p["data"].update(missing={"bp": "carry_forward"}),
        ),
    ),
    # ---- decisions table: rows together
    Defect(
        "duplicate decision", "decisions", ("column 'step'", "[rule duplicate_decision]"), decisions(cell(1, "step", 0))
    ),
    Defect("gap in steps", "decisions", ("expected step 1", "[rule step_sequence]"), decisions(_no_step_one)),
    Defect("day goes backwards", "decisions", (ROW.format(3, "day"), "[rule day_order]"), decisions(cell(2, "day", 1))),
    Defect(
        "two patients in one episode",
        "decisions",
        ("column 'patient_id'", "[rule patient_per_episode]"),
        decisions(cell(1, "patient_id", "P999")),
    ),
    # ---- decisions table: identifiers
    Defect(
        "e-mail column",
        "decisions",
        ("the header of column 9 looks like a direct identifier (e-mail)", "[rule identifier_column]"),
        decisions(add_column("email", "none")),
    ),
    Defect(
        "full-date column",
        "decisions",
        ("the header of column 9 looks like a direct identifier (full date)", "[rule identifier_column]"),
        decisions(add_column("visit_date", 1)),
    ),
    Defect(
        "postcode column",
        "decisions",
        ("the header of column 9 looks like a direct identifier (street address or place)", "[rule identifier_column]"),
        decisions(add_column("ZipCode", 1)),
    ),
    Defect(
        "e-mail value",
        "decisions",
        (ROW.format(6, "note"), "[rule identifier_value]"),
        decisions(add_column("note", "x", 5, "someone@example.org")),
    ),
    Defect(
        "telephone value",
        "decisions",
        (ROW.format(3, "note"), "[rule identifier_value]"),
        decisions(add_column("note", "x", 2, "+1 555-201-9876")),
    ),
    Defect(
        "social-security number",
        "decisions",
        (ROW.format(9, "note"), "[rule identifier_value]"),
        decisions(add_column("note", "x", 8, "078-05-1120")),
    ),
    Defect(
        "IP address",
        "decisions",
        (ROW.format(2, "note"), "[rule identifier_value]"),
        decisions(add_column("note", "x", 1, "10.20.30.40")),
    ),
    Defect(
        "full date value",
        "decisions",
        (ROW.format(4, "note"), "[rule identifier_value]"),
        decisions(add_column("note", "x", 3, "2019-03-14")),
    ),
    Defect(
        "age over 89",
        "decisions",
        (ROW.format(5, "age"), "[rule age_over_89]"),
        decisions(add_column("age", 60, 4, 93)),
    ),
    Defect(
        "very long text",
        "decisions",
        (ROW.format(2, "note"), "[rule long_text]"),
        decisions(add_column("note", "x", 1, "lorem " * 60)),
    ),
    # ---- files
    Defect("empty file", "file", ("decisions file decisions.csv is empty",), raw("")),
    Defect("header only", "file", ("header but no records",), raw(_HEADER)),
    Defect("repeated column name", "file", ("column 'bp' appears twice",), raw(_repeat_header(_CSV))),
    Defect("wrong delimiter", "file", ("set data.delimiter to ';'",), raw(_CSV.replace(",", ";"))),
    Defect("not UTF-8", "file", ("not UTF-8",), raw(_CSV.replace("hold", "h\u00f6ld", 1).encode("latin-1"))),
    Defect("unknown format", "file", ("unknown format '.xlsx'",), raw(_CSV, name="decisions.xlsx")),
    # ---- episodes table
    Defect(
        "episode without decisions",
        "episodes",
        ("[rule episode_without_decisions]", "column 'episode_id'"),
        episodes(
            lambda e: pd.concat(
                [e, pd.DataFrame([{"episode_id": "E999", "patient_id": "P999", "followup_days": 10, "event": 0}])],
                ignore_index=True,
            )
        ),
    ),
    Defect(
        "decision's episode not listed",
        "episodes",
        ("[rule episode_without_record]", "column 'episode_id'"),
        episodes(lambda e: e.iloc[1:]),
    ),
    Defect(
        "patient differs between tables",
        "episodes",
        (EP.format(3, "patient_id"), "[rule patient_mismatch]"),
        episodes(lambda e: e.assign(patient_id=lambda x: x["patient_id"].where(x.index != 2, "P777"))),
    ),
    Defect(
        "event coded 2",
        "episodes",
        (EP.format(4, "event"), "[rule whole_number]"),
        episodes(lambda e: e.assign(event=lambda x: x["event"].where(x.index != 3, 2))),
    ),
    Defect(
        "negative follow-up",
        "episodes",
        (EP.format(2, "followup_days"), "[rule whole_number]"),
        episodes(lambda e: e.assign(followup_days=lambda x: x["followup_days"].where(x.index != 1, -5))),
    ),
    Defect(
        "censored before last decision",
        "episodes",
        (EP.format(2, "followup_days"), "[rule followup_before_last_decision]"),
        episodes(lambda e: e.assign(followup_days=lambda x: x["followup_days"].where(x.index != 1, 50))),
    ),
    Defect(
        "episode listed twice",
        "episodes",
        (EP.format(41, "episode_id"), "[rule duplicate_episode]"),
        episodes(lambda e: pd.concat([e, e.iloc[[4]]], ignore_index=True)),
    ),
    Defect(
        "episodes lack the id column",
        "episodes",
        ("column 'episode_id'", "[rule missing_column]"),
        episodes(lambda e: e.drop(columns=["episode_id"])),
    ),
    Defect(
        "address column in episodes",
        "episodes",
        ("the header of column 5 looks like a direct identifier (street address or place)", "[rule identifier_column]"),
        episodes(lambda e: e.assign(home_address="x")),
    ),
]


def _with(change):
    frame = tiny_decisions().astype(object)
    change(frame)
    return frame


CASES = {d.name: d for d in DEFECTS}
assert len(CASES) == len(DEFECTS), "defect names must be distinct"
