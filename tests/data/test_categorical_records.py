"""Validation of a categorical state: undeclared values are findings, rare levels are refused or merged as the
protocol says, and the guard reads declared levels as labels."""

import numpy as np
import pytest
from support.tiny import tiny_decisions, tiny_protocol_dict, write_tiny

from regimewise.data.validate import collect_findings, validate_records
from regimewise.errors import DataValidationError
from regimewise.protocol import load_protocol

LEVELS = ["none", "school", "college", "graduate"]


def categorical(tmp_path, values, **state):
    raw = tiny_protocol_dict()
    raw["states"].append({"name": "edu", "label": "Education", "kind": "categorical", "levels": LEVELS, **state})
    frame = tiny_decisions(40)  # 120 decisions
    frame["edu"] = values
    return load_protocol(write_tiny(tmp_path, raw, frame)), frame


def common_levels(n=120, rare=None, rare_count=0):
    """'school', 'college' and 'graduate' in turn, with the first rare_count rows set to the level ``rare``."""
    values = np.resize(["school", "college", "graduate"], n).astype(object)
    if rare is not None:
        values[:rare_count] = rare
    return values


def test_clean_column_holds_the_levels_as_text(tmp_path):
    pf, frame = categorical(tmp_path, common_levels(), reference="college")
    result = validate_records(pf)
    # Exact: the records' values, unchanged.
    assert result.decisions["edu"].tolist() == frame["edu"].tolist()
    levels = result.summary["categorical_levels"]["edu"]
    # Exact: 40 decisions at each level (counted by construction); 'none' never occurs.
    assert levels == {
        "reference": "college",
        "decisions": {"school": 40, "college": 40, "graduate": 40},
        "merged": [],
        "absent": ["none"],
    }


def test_undeclared_value_is_a_finding_never_dropped(tmp_path):
    values = common_levels()
    values[7] = "doctorate"
    pf, _ = categorical(tmp_path, values)
    findings, result = collect_findings(pf)
    assert result is None
    # Exact: one finding, on data row 8 (1-based), naming the column and the value.
    assert [(f.rule, f.row, f.column, f.value) for f in findings] == [("undeclared_level", 8, "edu", "doctorate")]
    assert "levels of edu" in findings[0].fix


def test_missing_value_of_a_categorical_is_refused(tmp_path):
    values = common_levels()
    values[3] = None
    pf, _ = categorical(tmp_path, values)
    findings, _ = collect_findings(pf)
    # Exact: the blank cell on data row 4 is reported as missing (data.missing defaults to refuse).
    assert [(f.rule, f.row) for f in findings] == [("missing_value", 4)]


def test_rare_level_is_refused_in_one_line_naming_level_and_count(tmp_path):
    pf, _ = categorical(tmp_path, common_levels(rare="none", rare_count=4), reference="school")
    with pytest.raises(DataValidationError) as info:
        validate_records(pf)
    message = str(info.value)
    # Exact: 'none' has 4 decisions, fewer than the default report.min_cell_count of 11.
    assert "\n" not in message
    assert "level 'none' has 4 decision(s), fewer than report.min_cell_count (11)" in message
    assert "rare_levels: merge" in message


def test_rare_levels_are_merged_into_the_named_level(tmp_path):
    values = common_levels(rare="none", rare_count=12)
    values[:6] = "graduate_plus"
    levels = [*LEVELS, "graduate_plus"]
    raw = tiny_protocol_dict()
    raw["states"].append(
        {"name": "edu", "label": "Edu", "kind": "categorical", "levels": levels, "rare_levels": "merge",
         "other_level": "rare_group", "reference": "school"}
    )  # fmt: skip
    frame = tiny_decisions(40)
    frame["edu"] = values
    result = validate_records(load_protocol(write_tiny(tmp_path, raw, frame)))
    # Exact: rows 0-5 'graduate_plus' (6) and 6-11 'none' (6) are each rare and merge into 12 'rare_group'
    # decisions; the other rows keep their level.
    assert result.decisions["edu"].tolist()[:12] == ["rare_group"] * 12
    assert result.decisions["edu"].tolist()[12:] == values[12:].tolist()
    summary = result.summary["categorical_levels"]["edu"]
    assert summary["merged"] == ["none", "graduate_plus"] and summary["decisions"]["rare_group"] == 12


def test_merged_level_still_rare_is_refused(tmp_path):
    pf, _ = categorical(tmp_path, common_levels(rare="none", rare_count=3), rare_levels="merge", reference="school")
    with pytest.raises(DataValidationError, match=r"rare level\(s\) 'none' merged into 'other' have 3 decision"):
        validate_records(pf)


def test_rare_reference_level_is_refused(tmp_path):
    pf, _ = categorical(tmp_path, common_levels(rare="none", rare_count=5), reference="none", rare_levels="merge")
    with pytest.raises(DataValidationError, match=r"reference level 'none' has 5 decision\(s\)"):
        validate_records(pf)


def test_levels_written_as_numbers_match_integer_codes(tmp_path):
    raw = tiny_protocol_dict()
    raw["states"].append({"name": "grade", "label": "Grade", "kind": "categorical", "levels": [1, 2, 3]})
    frame = tiny_decisions(40)
    frame["grade"] = np.resize([1, 2, 3], len(frame))
    result = validate_records(load_protocol(write_tiny(tmp_path, raw, frame)))
    # Exact: the integer codes 1, 2, 3 read from the CSV are the declared levels '1', '2', '3'.
    assert result.decisions["grade"].tolist() == [str(v) for v in frame["grade"]]


def test_guard_reads_declared_levels_as_labels_and_other_values_by_content(tmp_path):
    raw = tiny_protocol_dict()
    levels = ["10001", "10002", "unknown"]
    raw["states"].append({"name": "site", "label": "Site code", "kind": "categorical", "levels": levels})
    frame = tiny_decisions(40)
    frame["site"] = np.resize(levels, len(frame)).astype(object)
    path = write_tiny(tmp_path, raw, frame)
    # Exact: five-digit text reads as a postcode (module docstring of regimewise.data.deidentify); the declared
    # levels are labels the protocol lists one by one, so they pass.
    assert validate_records(load_protocol(path)).decisions["site"].nunique() == 3
    frame.loc[5, "site"] = "02139"
    findings, _ = collect_findings(load_protocol(write_tiny(tmp_path, raw, frame)))
    assert [(f.rule, f.row, f.column) for f in findings] == [("identifier_value", 6, "site")]
    assert "02139" not in findings[0].one_line()


def test_levels_of_an_age_state_are_still_ages(tmp_path):
    raw = tiny_protocol_dict()
    raw["states"].append({"name": "age_band", "label": "Age", "kind": "categorical", "levels": [70, 80, 95]})
    frame = tiny_decisions(40)
    frame["age_band"] = np.resize([70, 80, 95], len(frame))
    findings, _ = collect_findings(load_protocol(write_tiny(tmp_path, raw, frame)))
    # Safe Harbor, 45 CFR 164.514(b)(2)(i)(C): ages over 89 are identifiers; every third row holds 95.
    assert {f.rule for f in findings} == {"age_over_89"} and len(findings) == 40


def test_carry_forward_fills_a_missing_level_with_the_previous_one(tmp_path):
    values = common_levels()
    values[4] = None  # episode E001, step 1; step 0 (row 3) holds values[3]
    raw = tiny_protocol_dict()
    raw["states"].append(
        {"name": "edu", "label": "Education", "kind": "categorical", "levels": LEVELS, "reference": "school"}
    )
    raw["data"]["missing"] = {"edu": "carry_forward"}
    frame = tiny_decisions(40)
    frame["edu"] = values
    pf = load_protocol(write_tiny(tmp_path, raw, frame))
    # Exact: the episode's last observed level (row 3) is carried to row 4; nothing else changes.
    expected = values.copy()
    expected[4] = values[3]
    assert validate_records(pf).decisions["edu"].tolist() == expected.tolist()
