"""De-identification guard: Safe Harbor categories refused, day offsets and ages up to 89 accepted, and a planted
identifier never reaches the results folder or the terminal.

Source of the categories: HIPAA Privacy Rule, 45 CFR 164.514(b)(2)(i)(A)-(R) (the eighteen Safe Harbor
identifiers, including the 90-or-older age grouping), as recalled from the regulation's text (from memory).
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import yaml
from support.tiny import (
    REPOSITORY,
    tiny_decisions,
    tiny_episodes,
    tiny_protocol_dict,
    write_tiny,
)

from regimewise import cli
from regimewise.data.deidentify import (
    column_name_category,
    find_identifiers,
    looks_like_identifier,
    mask,
    scrub,
)
from regimewise.data.validate import validate_records
from regimewise.errors import DataValidationError
from regimewise.protocol import load_protocol
from regimewise.workflow.stages import validate_stage

# One column name per Safe Harbor category the guard can see in a name (45 CFR 164.514(b)(2)(i)).
REFUSED_NAMES = {
    "first_name": "person name",  # (A) names
    "patient_name": "person name",
    "street_address": "street address or place",  # (B) geographic subdivisions smaller than a state
    "zip": "street address or place",
    "city": "street address or place",
    "date_of_birth": "full date",  # (C) all elements of dates except year
    "admission_date": "full date",
    "phone_number": "telephone or fax",  # (D) telephone numbers
    "fax": "telephone or fax",  # (E) fax numbers
    "email": "e-mail",  # (F) e-mail addresses
    "ssn": "social-security or record number",  # (G) social security numbers
    "medical_record_number": "social-security or record number",  # (H) medical record numbers
    "health_plan_id": "social-security or record number",  # (I) health plan beneficiary numbers
    "account_number": "social-security or record number",  # (J) account numbers
    "licence_number": "device, licence or vehicle number",  # (K) certificate/license numbers
    "vehicle_plate": "device, licence or vehicle number",  # (L) vehicle identifiers
    "device_serial": "device, licence or vehicle number",  # (M) device identifiers and serial numbers
    "url": "URL or IP address",  # (N) URLs
    "ip_address": "URL or IP address",  # (O) IP addresses
    "fingerprint": "biometric or photo",  # (P) biometric identifiers
    "photo": "biometric or photo",  # (Q) full-face photographs
}
ACCEPTED_NAMES = [
    "episode_id",
    "patient_id",
    "step",
    "day",
    "age",
    "age_at_index",
    "followup_days",
    "event",
    "sbp",
    "egfr",
    "potassium",
    "female",
    "diabetes",
    "adherence",
    "therapy_level",
    "action",
    "reward",
    "stage",
    "usage_days",
]


@pytest.mark.parametrize("name", sorted(REFUSED_NAMES))
def test_identifier_like_column_names_are_refused(name):
    assert column_name_category(name) == REFUSED_NAMES[name]


@pytest.mark.parametrize("name", ACCEPTED_NAMES)
def test_contract_and_demo_columns_pass(name):
    assert column_name_category(name) is None


@pytest.mark.parametrize(
    "value",
    [
        "jane.roe@example.org",
        "https://example.org/p/1",
        "www.example.org",
        "192.0.2.17",
        "078-05-1120",
        "MRN 4471203",
        "123456789",
        "(555) 201-9876",
        "+44 20 7946 0958",
        "2019-03-14",
        "14/03/2019",
        "02139",
        "02139-4307",
    ],
)
def test_identifier_like_values_are_found(value):
    assert looks_like_identifier(value)
    assert value not in scrub(f"parser said: {value} here") or value == "02139"  # five digits alone only


@pytest.mark.parametrize("value", ["E00001", "P00042", "hold", "step_up", "add_agent", "90+", "3.5", "-2.190"])
def test_ordinary_values_pass(value):
    assert not looks_like_identifier(value)


def test_mask_shows_length_only():
    assert mask("jane.roe@example.org") == "[masked, 20 characters]"


def test_ages_above_89_are_refused_unless_grouped():
    # Safe Harbor (C): ages over 89 only as a single category of 90 or older.
    frame = pd.DataFrame({"age": [30, 89, 90, 104], "age_group": ["40-49", "90+", "80-89", "90+"]})
    hits = find_identifiers(frame)
    assert [(h.column, h.row) for h in hits] == [("age", 2), ("age", 3)]
    assert not find_identifiers(pd.DataFrame({"age": ["89", "90+", " 90+ "]}))


def test_datetime_columns_are_refused_as_full_dates(tmp_path):
    frame = tiny_decisions()
    frame["seen"] = pd.Timestamp("2020-01-02")
    frame.to_parquet(tmp_path / "decisions.parquet", index=False)
    protocol = tiny_protocol_dict(decisions="decisions.parquet")
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump(protocol), encoding="utf-8")
    with pytest.raises(DataValidationError, match=r"column 'seen'.*full date.*\[rule identifier_value\]"):
        validate_records(load_protocol(tmp_path / "protocol.yaml"))


def test_demo_cohort_passes_the_guard():
    # The demo has `age` (continuous, at most 89) and integer `day` offsets: both must pass.
    result = validate_records(load_protocol(REPOSITORY / "config" / "protocol.yaml"))
    assert result.summary["rows_kept"] == 24000


def test_acknowledged_column_passes_and_is_recorded(tmp_path):
    frame = tiny_decisions()
    frame["clinic_zip"] = "00000"
    protocol = tiny_protocol_dict()
    why = "Constant placeholder written by the extract tool; holds no postcode of any person."
    protocol["data"]["acknowledged_columns"] = [{"column": "clinic_zip", "justification": why}]
    result = validate_records(load_protocol(write_tiny(tmp_path, protocol=protocol, decisions=frame)))
    assert result.summary["acknowledged_columns"] == [{"column": "clinic_zip", "justification": why}]
    assert "clinic_zip" not in result.decisions.columns


# UK postcode examples as printed in the UK format description (BS 7666 formats A9 9AA ... AA9A 9AA; from memory),
# Canadian ones in Canada Post's A9A 9A9 form (from memory), and made-up US ZIP+4 codes.
UK_POSTCODES = ["M1 1AE", "B33 8TH", "CR2 6XH", "DN55 1PT", "W1A 0AX", "EC1A 1BB", "SW1A1AA"]
CANADIAN_POSTCODES = ["K1A 0B1", "H0H 0H0", "M5V 3L9", "K1A0B1", "T2P-1J9"]
ZIP_PLUS_4 = ["02139-4307", "94105-1804"]


@pytest.mark.parametrize("value", UK_POSTCODES + CANADIAN_POSTCODES + ZIP_PLUS_4)
def test_postcodes_are_found_alone_and_inside_text(value):
    # Safe Harbor (B): geographic subdivisions smaller than a state, including ZIP codes (45 CFR 164.514(b)(2)(i)(B)).
    assert looks_like_identifier(value)
    assert value not in scrub(f"moved to {value} in spring")
    frame = pd.DataFrame({"note": ["none", f"seen at {value}", "none"]})
    assert [(h.row, h.category) for h in find_identifiers(frame)] == [(1, "postcode")]


@pytest.mark.parametrize(
    "value",
    # Codes a clinical extract holds (ATC drug code, ICD-10 code, lab names, stage labels) and near-misses of the
    # postcode formats: inward letters C/I/K/M/O/V never occur in UK postcodes, D/F/I/O/Q/U never in Canadian ones.
    [
        "A10BA02",
        "E11.9",
        "HbA1c 7.2",
        "CKD 3A",
        "stage 3B",
        "SW1A 1CA",
        "D1A 1A1",
        "1234-5678",
        "Add agent",
        "step_up",
        "T2 DM",
    ],
)
def test_codes_and_near_misses_are_not_postcodes(value):
    assert not looks_like_identifier(value)


def test_whole_numbers_in_a_postcode_like_column_are_refused():
    # A five-digit ZIP code stored as an integer loses its leading zero (02139 -> 2139); Safe Harbor keeps only
    # the first three digits (45 CFR 164.514(b)(2)(i)(B)), so three-digit prefixes pass.
    frame = pd.DataFrame(
        {
            "zip5": [2139, 94105, np.nan],
            "home_postal": ["2139", "941", ""],
            "zip3": [21, 941, 100],
            "dose_mg": [10000, 20000, 5000],  # large numbers in a column not named like a postcode pass
        }
    )
    hits = [(h.column, h.row, h.category) for h in find_identifiers(frame)]
    assert hits == [("zip5", 0, "postcode"), ("zip5", 1, "postcode"), ("home_postal", 0, "postcode")]


def _made_up_names(n):
    given = ["Alma", "Bruno", "Clara", "Dmitri", "Edda", "Farid", "Greta", "Hugo", "Ines", "Jonas", "Kaja", "Lior"]
    family = ["Vale", "Oakes", "Marsh", "Brook", "Thorne", "Quill", "Lund", "Ferris", "Hale", "Novak", "Reyes"]
    return [f"{given[i % len(given)]} {family[(i * 7) % len(family)]}" for i in range(n)]


def test_a_column_of_person_names_is_refused_cell_by_cell():
    # Safe Harbor (A): names. The names are made up; two capitalised words per cell, 40 patients x 3 visits.
    names = np.repeat(_made_up_names(40), 3).astype(object)
    names[5] = None
    hits = find_identifiers(pd.DataFrame({"carer": names}))
    assert {h.category for h in hits} == {"person name"}
    assert [h.row for h in hits] == [r for r in range(120) if r != 5]
    assert looks_like_identifier("Mary-Ann O'Neil") and looks_like_identifier("Roe, Jane")


def test_capitalised_category_labels_and_mixed_text_are_not_taken_for_names():
    labels = pd.DataFrame(
        {
            "action": np.resize(["Hold", "Step Up", "Step Down", "Add Agent"], 120),  # few labels, many repeats
            "regimen": np.resize(["Add agent", "step_up", "hold"], 120),
            # A known limit of the heuristic (see name_column_hits): one name among other text is not found.
            "comment": ["none"] * 119 + ["Jane Roe"],
        }
    )
    assert find_identifiers(labels) == []


def test_names_and_postcodes_are_masked_in_validation_messages(tmp_path):
    frame = tiny_decisions().astype(object)
    frame["carer"] = np.repeat(_made_up_names(40), 3)
    frame.loc[3, "bp"] = "B33 8TH"  # text in a numeric column: a field-rule finding would quote it
    with pytest.raises(DataValidationError) as err:
        validate_records(load_protocol(write_tiny(tmp_path, decisions=frame)))
    listed = "\n".join(f"{f.column} {f.value} {f.message}" for f in err.value.errors)
    assert "person name" in listed and "postcode" in listed
    for secret in [*_made_up_names(40), "B33 8TH"]:
        assert secret not in listed and secret not in str(err.value)


PLANTED = "jane.roe@example.org"


def _planted_study(folder, table, column):
    decisions, episodes = tiny_decisions().astype(object), tiny_episodes().astype(object)
    (decisions if table == "decisions" else episodes).loc[7, column] = PLANTED
    return write_tiny(folder, decisions=decisions, episodes=episodes)


def _everything_under(folder) -> str:
    return "".join(p.read_bytes().decode("utf-8", "replace") for p in folder.rglob("*") if p.is_file())


CELLS = [("decisions", c) for c in tiny_decisions().columns] + [("episodes", c) for c in tiny_episodes().columns]


@pytest.mark.parametrize(("table", "column"), CELLS)
def test_planted_identifier_never_reaches_results_or_terminal(tmp_path, capsys, table, column):
    protocol = _planted_study(tmp_path / "study", table, column)
    results = tmp_path / "results"
    assert cli.main(["check", str(protocol), "--errors", str(results / "logs")]) == 1
    outputs = [results / "validate" / n for n in ("decisions.parquet", "episodes.parquet", "validation.json")]
    with pytest.raises(DataValidationError, match=r"\[rule identifier_value\]"):
        validate_stage(str(protocol), *map(str, outputs), errors=str(results / "logs" / "stage_errors.csv"))
    captured = capsys.readouterr()
    assert "[masked, 20 characters]" in captured.err
    assert PLANTED not in captured.out + captured.err
    assert (results / "logs" / "validation_errors.csv").is_file()
    assert PLANTED not in _everything_under(results)


def test_planted_identifier_through_the_workflow(tmp_path):
    protocol = _planted_study(tmp_path / "study", "decisions", "action")
    out = tmp_path / "out"
    command = [sys.executable, "-m", "regimewise.cli", "run", protocol, "--out", out]
    result = subprocess.run(command, capture_output=True, text=True, check=False)
    assert result.returncode == 1
    assert "decisions.csv, row 8, column 'action'" in result.stderr
    assert PLANTED not in result.stdout + result.stderr
    assert (out / "logs" / "validation_errors.csv").is_file()
    assert PLANTED not in _everything_under(out)


def test_report_section_lists_acknowledged_columns_and_missing_actions(tmp_path):
    from regimewise.report.html import template_environment

    frame = tiny_decisions()
    frame["clinic_zip"] = "00000"
    frame.loc[4, "bp"] = np.nan
    protocol = tiny_protocol_dict()
    why = "Constant placeholder written by the extract tool; holds no postcode of any person."
    protocol["data"].update(
        acknowledged_columns=[{"column": "clinic_zip", "justification": why}], missing={"bp": "carry_forward"}
    )
    pf = load_protocol(write_tiny(tmp_path, protocol=protocol, decisions=frame))
    summary = validate_records(pf).summary
    template = template_environment(pf.protocol).get_template("sections/validation.html")
    html = template.render(p=pf.protocol, validation=summary)
    assert "clinic_zip" in html and "holds no postcode" in html
    assert "carry forward" in html and "validation rules passed with no finding" in html
