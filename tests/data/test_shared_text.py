"""Validation factorizes each text column once and shares it among the rules, and checks the episodes join with
cheaper steps: the findings and tables must be those of the computations they replace, bit for bit.

Equivalence checks with no outside reference: the expected values are the former computations, written out
plainly below or kept as they were (:func:`text_lengths`, the cell-by-cell measure), on small invented tables.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from regimewise.data.deidentify import DECLARED, ID, find_identifiers, value_hits
from regimewise.data.distinct import TableText, distinct_text
from regimewise.data.findings import FieldRule, distinct_lengths, field_findings, long_text_findings, text_lengths
from regimewise.data.records import absent_from, one_to_one

LONG = "x" * 201


COLUMNS = {
    "ids": ["P1", "P2", "P1", None, "P3", "P2"],
    "long": [LONG, "a", None, LONG + "y", float("nan"), "é" * 250],
    "blank": ["a", " ", "", "\t", None, "b"],
    "absent": ["a", pd.NA, "c", float("nan"), None, "b"],
    "absent_nat": ["a", pd.NA, pd.NaT, float("nan"), None, "b"],
    "surrogate": ["a\ud800", "b", "a\ud800" * 100, None, "c", "d"],
    "mixed": ["a", 1, 2.5, None, LONG, "b"],
    "empty": [None, None, None, None, None, None],
    "number": [1.0, 2.0, None, 4.0, 5.0, 6.0],
}


def _table() -> pd.DataFrame:
    frame = pd.DataFrame({k: pd.Series(v, dtype=float if k == "number" else object) for k, v in COLUMNS.items()})
    frame["category"] = pd.Series(["P000123", "123456789", "a", None, "123456789", "b"], dtype="category")
    frame.index = pd.RangeIndex(3, 9)  # rows keep the file's numbers
    return frame


@pytest.mark.parametrize("column", [c for c in COLUMNS if c != "number"])
def test_lengths_of_the_distinct_values_are_those_of_every_cell(column):
    values = _table()[column]
    distinct = distinct_text(values)
    if distinct is None:  # not a column of str: measured cell by cell as before
        assert column in ("mixed", "absent_nat")
        return
    lengths = distinct_lengths(*distinct)
    assert np.array_equal(lengths.astype(np.int64), text_lengths(values).astype(np.int64))


def test_long_text_findings_are_the_same_with_shared_text():
    frame = _table()
    assert long_text_findings("d.csv", frame, TableText(frame)) == long_text_findings("d.csv", frame)
    assert [f.row for f in long_text_findings("d.csv", frame, TableText(frame))] == [4, 7, 9, 8]


def test_field_findings_are_the_same_with_shared_text():
    frame = _table()
    rules = [
        FieldRule(c, "text", fix="fill it")
        for c in ("ids", "blank", "absent", "absent_nat", "mixed", "empty", "category")
    ]
    shared = field_findings("d.csv", frame, rules, TableText(frame))
    assert shared == field_findings("d.csv", frame, rules)
    assert {(f.column, f.row) for f in shared} >= {("blank", 5), ("blank", 6), ("blank", 7), ("ids", 7)}
    assert sorted(f.row for f in shared if f.column == "absent") == [5, 7, 8]  # pd.NA, NaN and None


def test_action_label_findings_are_the_same_with_shared_text():
    frame = _table().assign(action=["hold", "step_up", None, "Hold", float("nan"), "hold "])
    rules = [FieldRule("action", "label", labels=("hold", "step_up"), fix="use a label")]
    shared = field_findings("d.csv", frame, rules, TableText(frame))
    assert shared == field_findings("d.csv", frame, rules)
    assert [f.row for f in shared] == [6, 7, 8, 9]


@pytest.mark.parametrize("role", [ID, DECLARED, "other"])
def test_identifier_hits_are_the_same_with_shared_text(role):
    frame = _table().drop(columns="surrogate")  # the guard cannot read a lone surrogate, either way
    text = TableText(frame)
    for column in frame.columns:
        assert value_hits(column, frame[column], role, distinct=text(column)) == value_hits(column, frame[column], role)
    levels = {"category": ["a", "b"]}
    assert find_identifiers(frame, id_columns=["ids"], levels=levels, text=text) == find_identifiers(
        frame, id_columns=["ids"], levels=levels
    )
    assert find_identifiers(frame, id_columns=["category"], text=text)  # the nine digits are still found


def test_absent_entries_are_the_former_set_difference():
    index = pd.Index(["e3", "e1", "e9", "e2", "e7"])
    ids = pd.Series(["e1", "e2", "e4", "e1"])
    assert absent_from(index, ids) == sorted(set(index) - set(ids)) == ["e3", "e7", "e9"]
    assert absent_from(index, pd.Series(list(index))) == []


def test_episodes_join_is_the_former_validated_merge():
    counts = pd.DataFrame({"episode_id": ["a", "b", "c"], "n": [1, 2, 3]})
    frame = pd.DataFrame({"episode_id": ["c", "a", "z"], "followup_days": [5, 6, 7]})
    old = counts.merge(frame, on="episode_id", how="left", validate="one_to_one")
    new = counts.merge(frame, on="episode_id", how="left", validate=one_to_one(counts, frame, "episode_id"))
    pd.testing.assert_frame_equal(new, old)
    twice = pd.concat([frame, frame.iloc[:1]])
    assert one_to_one(counts, twice, "episode_id") == "one_to_one"  # merge still refuses a repeated episode
    with pytest.raises(pd.errors.MergeError):
        counts.merge(twice, on="episode_id", how="left", validate=one_to_one(counts, twice, "episode_id"))
