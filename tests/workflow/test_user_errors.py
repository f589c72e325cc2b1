"""Nothing a user can cause ends in a traceback: wrong-kind and unwritable paths, numeric text forms, a policy
leaving no rows, nested Parquet types, markup in labels; and each message names the real cause in one line.
"""

from __future__ import annotations

import errno
import os

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_decisions, tiny_episodes, tiny_protocol_dict, write_tiny

from regimewise import cli
from regimewise.data.validate import write_error_report
from regimewise.errors import UserInputError
from regimewise.io import write_text
from regimewise.report import figures


def _one_line_failure(capsys, argv) -> str:
    """Run the command line; it must exit 1 with one line on standard error and no traceback."""
    assert cli.main(argv) == 1
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("regimewise error: "), captured.err
    assert "Traceback" not in captured.err + captured.out
    return lines[0]


def _failing_study(tmp_path):
    decisions = tiny_decisions()
    decisions.loc[2, "bp"] = 999.0
    return write_tiny(tmp_path / "study", decisions=decisions)


# ---------------------------------------------------------------------------------------------- paths
def test_error_list_in_the_way_as_a_directory(tmp_path, capsys):
    (tmp_path / "errs" / "validation_errors.csv").mkdir(parents=True)
    line = _one_line_failure(capsys, ["check", str(_failing_study(tmp_path)), "--errors", str(tmp_path / "errs")])
    assert "is a directory" in line and "fix --errors" in line


def test_errors_option_naming_an_existing_file(tmp_path, capsys):
    (tmp_path / "plain").write_text("x", encoding="utf-8")
    line = _one_line_failure(capsys, ["check", str(_failing_study(tmp_path)), "--errors", str(tmp_path / "plain")])
    assert "a part of the path is a file" in line and "fix --errors" in line


@pytest.mark.parametrize("command", ["run", "simulate"])
def test_out_option_pointing_at_an_existing_file(tmp_path, capsys, command):
    target = tmp_path / "taken"
    target.write_text("x", encoding="utf-8")
    argv = ["simulate", "--out", str(target)] if command == "simulate" else ["run", str(write_tiny(tmp_path / "s"))]
    if command == "run":
        argv += ["--out", str(target)]
    line = _one_line_failure(capsys, argv)
    assert "is an existing file, not a folder" in line
    assert target.read_text(encoding="utf-8") == "x"


def test_out_option_in_an_unwritable_place(tmp_path, capsys):
    (tmp_path / "plain").write_text("x", encoding="utf-8")
    line = _one_line_failure(capsys, ["run", str(write_tiny(tmp_path / "s")), "--out", str(tmp_path / "plain" / "o")])
    assert "cannot be created" in line and "is a file, not a directory" in line


@pytest.mark.parametrize("kind", ["directory", "fifo"])
def test_records_path_of_the_wrong_kind_is_named(tmp_path, capsys, kind):
    protocol = write_tiny(tmp_path / "study")
    (protocol.parent / "decisions.csv").unlink()
    if kind == "directory":
        (protocol.parent / "decisions.csv").mkdir()
        expected = "is a directory"
    else:
        os.mkfifo(protocol.parent / "decisions.csv")
        expected = "is not a regular file (a FIFO"
    assert expected in _one_line_failure(capsys, ["check", str(protocol), "--errors", str(tmp_path / "e.csv")])


def test_full_disk_and_permission_are_named(tmp_path, monkeypatch):
    def full(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "replace", full)
    with pytest.raises(UserInputError, match="the disk is full"):
        write_text(tmp_path / "a.txt", "x")
    assert not list(tmp_path.iterdir())  # the temporary file is removed
    log = tmp_path / "workflow.log"
    log.write_text("OSError: [Errno 28] No space left on device: 'x'\n", encoding="utf-8")
    assert "the disk is full" in cli._system_cause(log)


# ---------------------------------------------------------------------------------------------- records
def test_reward_written_with_an_underscore(tmp_path, capsys):
    decisions = tiny_decisions().astype(object)
    decisions.loc[4, "reward"] = "1_000"
    protocol = write_tiny(tmp_path / "study", decisions=decisions)
    line = _one_line_failure(capsys, ["check", str(protocol), "--errors", str(tmp_path / "e.csv")])
    assert "row 5, column 'reward'" in line and "not a plain number" in line


def _with_missing(state, policy):
    p = tiny_protocol_dict()
    p["data"]["missing"] = {state: policy}
    return p


def test_drop_policy_leaving_no_rows(tmp_path, capsys):
    decisions = tiny_decisions()
    decisions.loc[decisions["step"] == 0, "bp"] = np.nan
    protocol = write_tiny(tmp_path / "study", decisions=decisions, protocol=_with_missing("bp", "drop"))
    line = _one_line_failure(capsys, ["check", str(protocol), "--errors", str(tmp_path / "e.csv")])
    assert "the drop policy of data.missing (bp) leaves no decision" in line


def test_all_missing_state_under_the_indicator_policy_is_named(tmp_path, capsys):
    decisions = tiny_decisions()
    decisions["bp"] = np.nan
    protocol = write_tiny(tmp_path / "study", decisions=decisions, protocol=_with_missing("bp", "indicator"))
    line = _one_line_failure(capsys, ["check", str(protocol), "--errors", str(tmp_path / "e.csv")])
    assert "state 'bp' is missing in every decision" in line and "0.0" not in line


@pytest.mark.parametrize("nested", ["list", "struct"])
def test_parquet_columns_of_lists_or_structs(tmp_path, capsys, nested):
    frame = tiny_decisions()
    frame["extra"] = [[1, 2]] * len(frame) if nested == "list" else [{"a": 1}] * len(frame)
    folder = tmp_path / "study"
    protocol = write_tiny(folder)
    frame.to_parquet(folder / "decisions.parquet", index=False)
    text = protocol.read_text(encoding="utf-8").replace("decisions.csv", "decisions.parquet")
    protocol.write_text(text, encoding="utf-8")
    line = _one_line_failure(capsys, ["check", str(protocol), "--errors", str(tmp_path / "e.csv")])
    assert "column 9 holds lists, structs or maps" in line


def test_formula_cells_are_neutralised_in_the_error_list(tmp_path, capsys):
    decisions = tiny_decisions().astype(object)
    decisions.loc[1, "action"] = "=HYPERLINK(1)"
    decisions.loc[3, "bp"] = -5.0
    protocol = write_tiny(tmp_path / "study", decisions=decisions)
    errors = tmp_path / "errors"
    _one_line_failure(capsys, ["check", str(protocol), "--errors", str(errors)])
    listed = pd.read_csv(errors / "validation_errors.csv", dtype=str, keep_default_na=False)
    values = set(listed["value"])
    assert "'=HYPERLINK(1)" in values and "=HYPERLINK(1)" not in values
    assert "-5.0" in values  # a number stays a number
    assert not any(cell.startswith(("=", "+", "@")) for cell in listed.to_numpy().ravel())


def test_nul_byte_is_refused_with_its_line(tmp_path, capsys):
    protocol = write_tiny(tmp_path / "study")
    text = (protocol.parent / "decisions.csv").read_bytes().replace(b"hold", b"ho\x00ld", 1)
    (protocol.parent / "decisions.csv").write_bytes(text)
    line = _one_line_failure(capsys, ["check", str(protocol), "--errors", str(tmp_path / "e.csv")])
    assert "holds a NUL byte" in line and "line " in line


def test_shown_values_escape_control_characters():
    from regimewise.data.findings import clip_text

    assert clip_text("ho\x00ld") == "ho\\x00ld"


def test_error_report_neutralises_every_text_cell(tmp_path):
    from regimewise.data.findings import Finding

    finding = Finding(file="d.csv", row=1, column="@x", value="+1+cmd", rule="number", message="-m", fix="=f")
    write_error_report(tmp_path / "e.csv", [finding])
    listed = pd.read_csv(tmp_path / "e.csv", dtype=str, keep_default_na=False)
    assert list(listed.iloc[0]) == ["number", "d.csv", "1", "'@x", "'+1+cmd", "'-m", "'=f"]


# ---------------------------------------------------------------------------------------------- figures
@pytest.mark.parametrize("label", ["$5 to $10", r"$\frac{", "50% of $x_1$", "{braces}"])
def test_labels_reach_the_figures_as_plain_text(label):
    fig, axes = figures.panel_grid(1)
    ax = next(iter(axes))
    ax.set_title(label)
    ax.set_yticks([0], [label])
    svg = figures.svg_text(fig, "a figure with plain-text labels")
    escaped = label.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    assert escaped in svg  # the text itself, never rendered as a formula


def test_state_named_in_the_spline_message(tmp_path):
    from regimewise.core.terms import spline_basis

    with pytest.raises(UserInputError, match="state 'potassium': a spline with 4 degrees of freedom"):
        spline_basis(np.array([1.0, 2.0, 1.0]), 4, "potassium")


def test_episodes_table_is_checked_with_the_same_guard(tmp_path, capsys):
    episodes = tiny_episodes()
    episodes["code"] = 19540314
    protocol = write_tiny(tmp_path / "study", episodes=episodes)
    line = _one_line_failure(capsys, ["check", str(protocol), "--errors", str(tmp_path / "e.csv")])
    assert "episodes.csv" in line and "full date" in line and "19540314" not in line


# ---------------------------------------------------------------------------------------------- --profile
def test_profile_option_naming_no_folder_or_a_folder_without_a_profile(tmp_path, capsys):
    study = str(write_tiny(tmp_path / "s"))
    line = _one_line_failure(capsys, ["run", study, "--profile", str(tmp_path / "nowhere")])
    assert "--profile" in line and "no such folder" in line
    (tmp_path / "empty").mkdir()
    line = _one_line_failure(capsys, ["run", study, "--profile", str(tmp_path / "empty")])
    assert "has no profile.yaml" in line


def test_profile_option_reaches_snakemake_as_an_absolute_folder(tmp_path, capsys, monkeypatch):
    profile = tmp_path / "site"
    profile.mkdir()
    (profile / "profile.yaml").write_text("cores: 1\n", encoding="utf-8")
    seen = []
    monkeypatch.setattr(cli, "_run_logged", lambda command, *rest: seen.append(command) or 0)
    monkeypatch.chdir(tmp_path)
    out = tmp_path / "out"
    assert cli.main(["run", str(write_tiny(tmp_path / "s")), "--out", str(out), "--profile", "site"]) == 0
    (command,) = seen
    assert command[command.index("--profile") + 1] == str(profile.resolve())
    assert f"into {out} through the profile {profile.resolve()}" in capsys.readouterr().out
