"""Validation of the decisions table: clean records pass, and each defect is named precisely."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError
from support.tiny import set_cell, tiny_decisions, write_tiny

from regimewise.data.findings import _failing_rows, decision_rules, row_model
from regimewise.data.validate import validate_records
from regimewise.errors import DataValidationError, UserInputError
from regimewise.protocol import load_protocol


def test_clean_records_pass_and_are_sorted_and_typed(tmp_path):
    frame = tiny_decisions().sample(frac=1.0, random_state=1)  # shuffled rows
    result = validate_records(load_protocol(write_tiny(tmp_path, decisions=frame)))
    d = result.decisions
    assert list(d.columns) == ["episode_id", "patient_id", "step", "day", "bp", "flag", "action", "reward"]
    assert d["step"].dtype == np.int64 and d["bp"].dtype == np.float64
    assert (
        d.groupby("episode_id")["step"].apply(list) == pd.Series([[0, 1, 2]] * 40, index=d["episode_id"].unique())
    ).all()
    assert result.summary["episodes"] == 40 and result.summary["patients"] == 20
    assert result.summary["rows_kept"] == 120
    assert sum(result.summary["actions"].values()) == 120
    assert list(result.episodes.columns) == ["episode_id", "patient_id", "n_decisions"]


def _corrupt(change):
    frame = tiny_decisions()
    change(frame)
    return frame


# (change, rule expected, the 1-based data row named, the column named)
DEFECTS = {
    "missing column": (lambda f: f.drop(columns=["bp"], inplace=True), "missing_column", None, "bp"),
    "text in a numeric state": (set_cell(4, "bp", "high"), "number", 5, "bp"),
    "state above its plausible range": (set_cell(7, "bp", 300.0), "number", 8, "bp"),
    "binary state not 0/1": (set_cell(2, "flag", 2), "whole_number", 3, "flag"),
    "unknown action label": (set_cell(5, "action", "double"), "action_label", 6, "action"),
    "missing state value": (set_cell(9, "bp", np.nan), "missing_value", 10, "bp"),
    "missing action": (set_cell(3, "action", np.nan), "missing_value", 4, "action"),
    "infinite reward": (set_cell(11, "reward", np.inf), "number", 12, "reward"),
    "fractional step": (set_cell(1, "step", 1.5), "whole_number", 2, "step"),
    "step beyond the horizon": (set_cell(2, "step", 3), "whole_number", 3, "step"),
    "negative day": (set_cell(0, "day", -4), "whole_number", 1, "day"),
    "duplicate decision": (set_cell(1, "step", 0), "duplicate_decision", 2, "step"),
    "gap in steps": (set_cell(5, "step", 1), "duplicate_decision", 6, "step"),
    "day goes backwards": (set_cell(2, "day", 1), "day_order", 3, "day"),
    "two patients in one episode": (set_cell(1, "patient_id", "P999"), "patient_per_episode", 1, "patient_id"),
}


@pytest.mark.parametrize("case", sorted(DEFECTS))
def test_each_defect_is_named(tmp_path, case):
    change, rule, row, column = DEFECTS[case]
    path = write_tiny(tmp_path, decisions=_corrupt(change))
    with pytest.raises(DataValidationError) as info:
        validate_records(load_protocol(path))
    message = str(info.value)
    assert "\n" not in message
    assert "decisions.csv" in message
    assert f"[rule {rule}]" in message
    assert f"column {column!r}" in message
    if row is not None:
        assert f"row {row}:" in message or f"row {row}," in message


def test_step_sequence_must_start_at_zero(tmp_path):
    frame = tiny_decisions()
    frame = frame[~((frame["episode_id"] == "E005") & (frame["step"] == 0))]
    with pytest.raises(DataValidationError, match=r"expected step 0.*\[rule step_sequence\]"):
        validate_records(load_protocol(write_tiny(tmp_path, decisions=frame)))


def test_empty_and_header_only_files(tmp_path):
    path = write_tiny(tmp_path)
    (tmp_path / "decisions.csv").write_text("", encoding="utf-8")
    with pytest.raises(UserInputError, match="is empty"):
        validate_records(load_protocol(path))
    (tmp_path / "decisions.csv").write_text("episode_id,patient_id,step,day,bp,flag,action,reward\n")
    with pytest.raises(UserInputError, match="header but no records"):
        validate_records(load_protocol(path))


def test_missing_decisions_file(tmp_path):
    path = write_tiny(tmp_path)
    (tmp_path / "decisions.csv").unlink()
    with pytest.raises(UserInputError, match="not found"):
        validate_records(load_protocol(path))


# The pydantic row model and the vectorised check come from the same field rules; they must agree on every
# value (property-based test with hypothesis).
@settings(max_examples=60, deadline=None)
@given(
    bp=st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=5), st.integers(-10, 400)),
    flag=st.one_of(st.integers(-2, 3), st.floats(-1, 2)),
    action=st.sampled_from(["hold", "up", "down", "sideways", ""]),
)
def test_row_model_agrees_with_vectorised_check(tmp_path_factory, bp, flag, action):
    path = write_tiny(tmp_path_factory.mktemp("p"))
    rules = decision_rules(load_protocol(path))
    frame = tiny_decisions(n_episodes=1).iloc[[0]].astype(object)
    frame.iloc[0, frame.columns.get_loc("bp")] = bp
    frame.iloc[0, frame.columns.get_loc("flag")] = flag
    frame.iloc[0, frame.columns.get_loc("action")] = action
    vectorised_bad = any(_failing_rows(frame, rule)[0] for rule in rules)
    record = {
        f"c{i}": (None if isinstance(v := frame[r.column].iat[0], float) and np.isnan(v) else v)
        for i, r in enumerate(rules)
    }
    try:
        row_model(rules).model_validate(record)
        model_bad = False
    except ValidationError:
        model_bad = True
    assert vectorised_bad == model_bad


# ---------------------------------------------------------------------------------------------- episodes table
def test_episodes_table_checked_and_joined(tmp_path):
    from support.tiny import tiny_episodes

    decisions = tiny_decisions()
    episodes = tiny_episodes(decisions)
    # Data contract (synthetic_cohort/README.md): the event is non-fatal, so an episode with an event may end its
    # follow-up before its last decision; tiny_episodes gives every fifth episode an event on day 100 < day 180.
    assert (
        episodes.loc[episodes["event"] == 1, "followup_days"] < decisions.groupby("episode_id")["day"].max().max()
    ).all()
    result = validate_records(load_protocol(write_tiny(tmp_path, decisions=decisions, episodes=episodes)))
    assert list(result.episodes.columns) == ["episode_id", "patient_id", "n_decisions", "followup_days", "event"]
    assert result.episodes["event"].sum() == 8 and (result.episodes["n_decisions"] == 3).all()


def test_validated_episodes_validate_again_to_the_same_table(tmp_path):
    # an episodes file with its own n_decisions (here the validated table given again as records, each count
    # wrong by one in the file): the records' count replaces it, instead of a join that would have named both
    # columns n_decisions_x and n_decisions_y and left none named n_decisions
    from support.tiny import tiny_episodes

    decisions = tiny_decisions()
    first = validate_records(
        load_protocol(write_tiny(tmp_path / "first", decisions=decisions, episodes=tiny_episodes(decisions)))
    )
    again = first.episodes.assign(n_decisions=first.episodes["n_decisions"] + 1)
    second = validate_records(load_protocol(write_tiny(tmp_path / "again", decisions=first.decisions, episodes=again)))
    pd.testing.assert_frame_equal(second.episodes, first.episodes)
    pd.testing.assert_frame_equal(second.decisions, first.decisions)


# ---------------------------------------------------------------------------------------------- missing data
def _with_missing(tmp_path, policy):
    from support.tiny import tiny_protocol_dict

    frame = tiny_decisions()
    frame["bp"] = frame["bp"].astype(object)
    frame.loc[[1, 4, 5], "bp"] = np.nan  # E000 step 1; E001 steps 1 and 2
    frame.loc[3, "bp"] = np.nan if policy != "carry_forward" else frame.loc[3, "bp"]  # E001 step 0
    protocol = tiny_protocol_dict()
    protocol["data"]["missing"] = {"bp": policy}
    return frame, validate_records(load_protocol(write_tiny(tmp_path, protocol=protocol, decisions=frame)))


def test_missing_drop_removes_the_rest_of_the_episode(tmp_path):
    frame, result = _with_missing(tmp_path, "drop")
    # By hand: E000 loses steps 1-2 (2 rows); E001 loses all 3 rows (its step 0 is missing): 5 rows, 1 episode.
    assert result.summary["missing_data"]["bp"] == {
        "policy": "drop",
        "missing": 4,
        "decisions_dropped": 5,
        "episodes_emptied": 1,
    }
    assert result.summary["rows_kept"] == 115 and result.summary["episodes"] == 39
    assert result.decisions.loc[result.decisions["episode_id"] == "E000", "step"].tolist() == [0]


def test_missing_carry_forward_uses_the_episode_s_last_value(tmp_path):
    frame, result = _with_missing(tmp_path, "carry_forward")
    d = result.decisions.set_index(["episode_id", "step"])["bp"]
    assert d[("E000", 1)] == float(frame.loc[0, "bp"])  # filled from step 0 of the same episode
    assert d[("E001", 1)] == d[("E001", 2)] == float(frame.loc[3, "bp"])
    assert result.summary["missing_data"]["bp"] == {"policy": "carry_forward", "missing": 3, "filled": 3}


def test_missing_indicator_fills_with_the_median_and_flags(tmp_path):
    frame, result = _with_missing(tmp_path, "indicator")
    observed = pd.to_numeric(frame["bp"]).dropna()
    d = result.decisions.set_index(["episode_id", "step"])
    assert d.loc[("E000", 1), "bp"] == pytest.approx(float(np.median(observed)))  # numpy's median, independent
    assert d["bp_missing"].sum() == 4 and d.loc[("E000", 0), "bp_missing"] == 0
    assert result.summary["missing_data"]["bp"]["filled"] == 4


# ---------------------------------------------------------------------------------------------- reading
@pytest.mark.parametrize(("delimiter", "bom"), [(",", False), (",", True), (";", True), ("\t", False)])
def test_csv_delimiters_and_byte_order_mark(tmp_path, delimiter, bom):
    from support.tiny import tiny_protocol_dict

    protocol = tiny_protocol_dict()
    protocol["data"]["delimiter"] = delimiter
    path = write_tiny(tmp_path, protocol=protocol)
    text = tiny_decisions().to_csv(index=False, sep=delimiter)
    (tmp_path / "decisions.csv").write_bytes(("\ufeff" if bom else "").encode() + text.encode("utf-8"))
    assert validate_records(load_protocol(path)).summary["rows_kept"] == 120


def test_parquet_records_read_like_csv(tmp_path):
    from support.tiny import tiny_protocol_dict

    tiny_decisions().to_parquet(tmp_path / "decisions.parquet", index=False)
    protocol = tiny_protocol_dict(decisions="decisions.parquet")
    path = write_tiny(tmp_path, protocol=protocol)
    from_parquet = validate_records(load_protocol(path)).decisions
    from_csv = validate_records(load_protocol(write_tiny(tmp_path / "csv"))).decisions
    pd.testing.assert_frame_equal(from_parquet, from_csv)
