"""The guard reads every column by content, whatever its type: identifier-shaped numbers and text are refused in
id columns and extra columns, legitimate clinical numbers pass.

Categories: HIPAA Safe Harbor, 45 CFR 164.514(b)(2)(i) (from memory). The made-up identifiers below are invented;
078-05-1120 is the social-security number printed on a 1938 wallet insert, a well-known invalid example (from
memory); 555 telephone numbers are reserved for fiction in North America (from memory).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from support.tiny import REPOSITORY, tiny_decisions, tiny_episodes, write_tiny

from regimewise import cli
from regimewise.data.deidentify import ID, OTHER, find_identifiers, value_hits
from regimewise.data.validate import validate_records
from regimewise.errors import DataValidationError
from regimewise.protocol import load_protocol

# Extra numeric columns of the episodes table (40 episodes), each holding one kind of identifier by content.
N = 40
EXTRA_NUMBERS = {
    "record numbers": 100_000_000 + 7919 * np.arange(N),  # nine digits
    "phone numbers": 2_025_550_100 + np.arange(N),  # ten digits
    "chart numbers": 4_471_203 + 37 * np.arange(N),  # seven digits, all distinct
    "ages 95-99": 95 + np.arange(N) % 5,
    "postcodes": np.resize([2139, 94105, 10001, 60614, 73301, 98109, 30303, 55455], N),
    "dates yyyymmdd": np.resize([19540314, 19621105, 19710228, 19800101], N),
    "dates ddmmyyyy": np.resize([14031954, 5111962, 28021971], N),
}


def _check_fails(tmp_path, capsys, decisions=None, episodes=None) -> str:
    protocol = write_tiny(tmp_path / "study", decisions=decisions, episodes=episodes)
    errors = tmp_path / "logs"
    assert cli.main(["check", str(protocol), "--errors", str(errors)]) == 1
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in captured.err + captured.out, captured.err
    return lines[0] + "\n" + captured.out + (errors / "validation_errors.csv").read_text(encoding="utf-8")


@pytest.mark.parametrize("kind", sorted(EXTRA_NUMBERS))
@pytest.mark.parametrize("as_text", [False, True])
def test_identifier_shaped_numbers_in_an_extra_column_are_refused(tmp_path, capsys, kind, as_text):
    values = EXTRA_NUMBERS[kind]
    episodes = tiny_episodes()
    episodes["extra_code"] = values.astype(str) if as_text else values
    shown = _check_fails(tmp_path, capsys, episodes=episodes)
    assert "column 'extra_code'" in shown
    shown = shown.replace(str(tmp_path), "<tmp>")  # pytest's folder number (pytest-96) is not a leaked value
    for value in values[:5]:
        assert f"{value}" not in shown.replace("extra_code", "")


@pytest.mark.parametrize(
    "planted",
    [
        "123456789",
        "14 March 1950",
        "March 14, 1950",
        "14.03.50",
        "14/03/1950",
        "19540314",
        "jane roe",
        "roe_jane",
        "078 05 1120",
        "MRN4471203",
        "mrn: 4471203",
        "(555)201-9876",
        "(555) 201-9876",
        "jane.roe@example.org",
    ],
)
@pytest.mark.parametrize("column", ["episode_id", "patient_id"])
def test_direct_identifiers_in_id_columns_are_refused_with_advice(tmp_path, capsys, planted, column):
    decisions = tiny_decisions()
    rows = decisions["episode_id"] == "E005"
    decisions.loc[rows, column] = planted
    shown = _check_fails(tmp_path, capsys, decisions=decisions)
    assert f"column '{column}'" in shown and "study pseudonyms" in shown
    assert planted not in shown


def test_nine_digit_whole_number_patient_ids_are_refused(tmp_path, capsys):
    decisions = tiny_decisions()
    decisions["patient_id"] = 100_000_000 + decisions["episode_id"].str[1:].astype(int) // 2
    shown = _check_fails(tmp_path, capsys, decisions=decisions)
    assert "column 'patient_id'" in shown and "[rule identifier_value]" in shown
    assert "100000000" not in shown


def test_identifier_like_header_is_refused_and_never_shown(tmp_path, capsys):
    decisions = tiny_decisions()
    decisions["jane.roe@example.org"] = 1
    shown = _check_fails(tmp_path, capsys, decisions=decisions)
    assert "the header of column 9 looks like a direct identifier (e-mail)" in shown
    assert "jane.roe" not in shown


def test_legitimate_clinical_numbers_pass_the_guard():
    """The demo's records, day counts to 36525, ages up to 89 and derived columns such as age_sq pass."""
    decisions = pd.read_csv(REPOSITORY / "synthetic_cohort" / "decisions.csv")
    episodes = pd.read_csv(REPOSITORY / "synthetic_cohort" / "episodes.csv")
    ids = ["episode_id", "patient_id"]
    assert find_identifiers(decisions, id_columns=ids) == []
    assert find_identifiers(episodes, id_columns=ids) == []
    extra = pd.DataFrame(
        {
            "age_sq": decisions["age"] ** 2,  # up to 74**2 = 5,476 in the demo
            "days_since_diagnosis": np.arange(len(decisions)) % 800,
            "creatinine_umol": np.resize([62, 88, 104, 131, 250], len(decisions)),
            "platelets_1e9": np.resize([150, 220, 310, 405], len(decisions)),
            "dose_mg": np.resize([10_000, 20_000, 5_000], len(decisions)),
            "weight_kg": np.resize([55.2, 71.0, 96.4, 120.3], len(decisions)),
        }
    )
    assert find_identifiers(extra) == []


def test_demo_protocol_and_records_pass_check(capsys):
    assert cli.main(["check", str(REPOSITORY / "config" / "protocol.yaml")]) == 0
    assert "pass validation" in capsys.readouterr().out


# ---------------------------------------------------------------------------------------------- properties
SSN = st.builds(
    lambda a, b, c, sep: f"{a:03d}{sep}{b:02d}{sep}{c:04d}",
    st.integers(1, 899),
    st.integers(1, 99),
    st.integers(1, 9999),
    st.sampled_from(["-", " "]),
)
NINE_PLUS_DIGITS = st.integers(100_000_000, 10**14)
DATES = st.dates(min_value=pd.Timestamp("1900-01-01").date(), max_value=pd.Timestamp("2099-12-31").date())
EIGHT_DIGIT_DATE = st.builds(lambda d, order: int(d.strftime(order)), DATES, st.sampled_from(["%Y%m%d", "%d%m%Y"]))
EMAIL = st.builds(
    lambda u, d: f"{u}@{d}.org",
    st.from_regex(r"[a-z]{2,8}", fullmatch=True),
    st.from_regex(r"[a-z]{3,8}", fullmatch=True),
)
PHONE = st.builds(
    lambda a, b, c: f"({a:03d}) {b:03d}-{c:04d}", st.integers(200, 999), st.integers(200, 999), st.integers(0, 9999)
)
WORD_DATE = st.builds(lambda d, fmt: d.strftime(fmt), DATES, st.sampled_from(["%d %B %Y", "%B %d, %Y", "%d %b %Y"]))


def _as(value, dtype):
    """One cell in a column of the given type: integer, float or text (pandas 'object' and 'string')."""
    if dtype == "int64":
        return pd.Series([int(value)], dtype="int64")
    if dtype == "float64":
        return pd.Series([float(value)], dtype="float64")
    return pd.Series([str(value)], dtype=dtype)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    value=st.one_of(NINE_PLUS_DIGITS, EIGHT_DIGIT_DATE),
    dtype=st.sampled_from(["int64", "float64", "object", "string"]),
    role=st.sampled_from([ID, OTHER]),
)
def test_identifier_shaped_numbers_are_refused_in_every_dtype(value, dtype, role):
    assert [h.row for h in value_hits("extra", _as(value, dtype), role)] == [0]


@settings(max_examples=60, deadline=None)
@given(
    value=st.one_of(SSN, EMAIL, PHONE, WORD_DATE),
    dtype=st.sampled_from(["object", "string"]),
    role=st.sampled_from([ID, OTHER]),
)
def test_identifier_shaped_text_is_refused_in_text_columns(value, dtype, role):
    assert [h.row for h in value_hits("extra", _as(value, dtype), role)] == [0]


def test_refused_values_are_refused_by_validation_too(tmp_path):
    episodes = tiny_episodes()
    episodes["extra"] = 19540314
    with pytest.raises(DataValidationError, match=r"full date"):
        validate_records(load_protocol(write_tiny(tmp_path, episodes=episodes)))
