"""Optional contract columns and state columns of any name (issue 15, point 2).

Without ``patient_id`` each episode is its own patient; without ``day`` the decision index stands in; a state
column named ``L`` or ``BP`` is read through the protocol's column mapping. The expected values are exact by
construction of the made-up records (counts of episodes, the step index), not estimates.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_decisions, tiny_episodes, tiny_protocol_dict, write_tiny

from regimewise.data.deidentify import find_identifiers, is_age_column
from regimewise.data.findings import identifier_findings
from regimewise.data.validate import DEFAULTED, validate_records
from regimewise.errors import DataValidationError, ProtocolError
from regimewise.protocol import load_protocol
from regimewise.report.html import template_environment


def two_decisions(n_episodes=30) -> pd.DataFrame:
    """Two decisions per episode, no patient_id, no day; the pressure column is called BP and the flag L."""
    frame = tiny_decisions(n_episodes)
    frame = frame[frame["step"] < 2].drop(columns=["patient_id", "day"])
    return frame.rename(columns={"bp": "BP", "flag": "L"}).reset_index(drop=True)


def two_decision_protocol() -> dict:
    protocol = tiny_protocol_dict()
    protocol["horizon"] = 2
    protocol["states"][0]["column"] = "BP"  # mapped explicitly
    protocol["states"][1]["name"] = "L"  # a name that is not snake case maps to the column L, state l
    return protocol


def test_two_decisions_without_patient_or_day_and_upper_case_states_pass(tmp_path):
    path = write_tiny(tmp_path, protocol=two_decision_protocol(), decisions=two_decisions())
    pf = load_protocol(path)
    assert [(s.name, s.source_column) for s in pf.protocol.states] == [("bp", "BP"), ("l", "L")]
    result = validate_records(pf)
    summary, d = result.summary, result.decisions
    assert summary["defaulted_columns"] == DEFAULTED  # both said, with what stands in
    assert "each episode is its own patient" in summary["defaulted_columns"]["patient_id"]
    assert "decision index" in summary["defaulted_columns"]["day"]
    assert summary["episodes"] == summary["patients"] == 30  # exact: 30 episodes, one patient each
    assert (d["patient_id"] == d["episode_id"]).all() and (d["day"] == d["step"]).all()
    assert list(d.columns) == ["episode_id", "patient_id", "step", "day", "bp", "l", "action", "reward"]
    assert summary["extra_columns_ignored"] == []


def test_records_with_both_columns_default_nothing(tmp_path):
    result = validate_records(load_protocol(write_tiny(tmp_path)))
    assert result.summary["defaulted_columns"] == {}
    assert result.summary["patients"] == 20  # tiny_decisions: two episodes per patient


def test_a_column_the_protocol_names_stays_required(tmp_path):
    protocol = two_decision_protocol()
    protocol["data"]["columns"] = {"patient_id": "patient", "day": "visit_day"}
    path = write_tiny(tmp_path, protocol=protocol, decisions=two_decisions())
    with pytest.raises(DataValidationError) as err:
        validate_records(load_protocol(path))
    assert {(f.rule, f.column) for f in err.value.errors} == {
        ("missing_column", "patient"),
        ("missing_column", "visit_day"),
    }


def test_null_patient_column_ignores_the_file_column(tmp_path):
    protocol = tiny_protocol_dict()
    protocol["data"]["columns"] = {"patient_id": None}
    result = validate_records(load_protocol(write_tiny(tmp_path, protocol=protocol)))
    assert result.summary["patients"] == result.summary["episodes"] == 40
    assert list(result.summary["defaulted_columns"]) == ["patient_id"]
    assert result.summary["extra_columns_ignored"] == ["patient_id"]


def test_survival_without_days_is_refused_in_one_line(tmp_path):
    decisions = tiny_decisions()
    episodes = tiny_episodes(decisions)
    protocol = tiny_protocol_dict(episodes="episodes.csv")
    protocol["survival"] = {"horizon_days": 365}
    path = write_tiny(tmp_path, protocol=protocol, decisions=decisions.drop(columns=["day"]), episodes=episodes)
    with pytest.raises(DataValidationError) as err:
        validate_records(load_protocol(path))
    message = str(err.value)
    assert "\n" not in message and "survival section needs real days" in message
    protocol["data"]["columns"] = {"day": None}
    path = write_tiny(tmp_path, protocol=protocol, decisions=decisions, episodes=episodes)
    with pytest.raises(ProtocolError, match="survival needs real days"):
        load_protocol(path)


def test_report_says_what_was_defaulted(tmp_path):
    pf = load_protocol(write_tiny(tmp_path, protocol=two_decision_protocol(), decisions=two_decisions()))
    validation = validate_records(pf).summary
    html = (
        template_environment(pf.protocol)
        .get_template("sections/validation.html")
        .render(validation=validation, p=pf.protocol)
    )
    assert "Contract columns the records do not have" in html
    assert "each episode is its own patient" in html and "is used as the day" in html


# ---------------------------------------------------------------------------------------------- ages by name
@pytest.mark.parametrize("name", ["age", "age_at_index", "AgeYears", "patient_age"])
def test_names_that_say_age(name):
    assert is_age_column(name)


@pytest.mark.parametrize("name", ["age_sq", "age_squared", "ageSq", "age_x_bp", "age_log", "stage", "usage_days"])
def test_derived_and_other_names_do_not_say_age(name):
    assert not is_age_column(name)


def test_derived_age_square_no_longer_reads_as_an_age(tmp_path):
    """The issue's case: age_sq of ages 25-74, values up to 5,476, undeclared: no finding at all."""
    decisions = tiny_decisions()
    ages = np.resize(np.arange(25, 75), len(decisions))
    decisions["age_sq"] = ages**2
    assert decisions["age_sq"].max() == 5476
    result = validate_records(load_protocol(write_tiny(tmp_path, decisions=decisions)))
    assert result.summary["extra_columns_ignored"] == ["age_sq"]


def test_a_square_of_small_ages_gets_the_hint_to_declare_or_drop(tmp_path):
    """Squares of ages 0-10 (0-100, whole) still look like ages by content: the message says how to proceed."""
    decisions = tiny_decisions()
    decisions["age_sq"] = np.resize(np.arange(0, 11), len(decisions)) ** 2
    pf = load_protocol(write_tiny(tmp_path, decisions=decisions))
    findings = identifier_findings("decisions.csv", decisions, pf)
    assert findings and {f.rule for f in findings} == {"age_over_89"}
    assert "declare it as a state, drop it, or list it in data.acknowledged_columns" in findings[0].fix
    assert "\n" not in findings[0].one_line()


def test_a_state_declared_as_age_is_read_as_ages_whatever_its_column(tmp_path):
    """Declared meaning: the state `age` read from column AGEYRS (a name the heuristic misses) still refuses 92."""
    decisions = tiny_decisions()
    decisions["AGEYRS"] = np.resize([40, 61, 77, 92], len(decisions))
    protocol = tiny_protocol_dict()
    protocol["states"].append(
        {"name": "age", "column": "AGEYRS", "label": "Age", "kind": "integer", "plausible_range": [18, 120]}
    )
    assert not is_age_column("AGEYRS") and find_identifiers(decisions[["AGEYRS"]], declared=["AGEYRS"]) == []
    pf = load_protocol(write_tiny(tmp_path, protocol=protocol, decisions=decisions))
    findings = identifier_findings("decisions.csv", decisions, pf)
    assert findings and {(f.rule, f.column) for f in findings} == {("age_over_89", "AGEYRS")}
