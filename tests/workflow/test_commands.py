"""The commands as a user types them: schema anywhere and to standard output, --debug on either side of the
command, helps with a purpose, the caution and every default, simulate refusing a non-empty folder, and check
writing its error list where asked and removing a stale one."""

from __future__ import annotations

import json
import re
import subprocess
import sys

import pytest
from support.cli import run_cli
from support.tiny import REPOSITORY, tiny_decisions, write_tiny

from regimewise.cautions import TERMINAL_CAUTION
from regimewise.cli import build_parser
from regimewise.protocol import protocol_schema


def test_the_command_line_starts_without_the_report_and_model_libraries():
    # Every `regimewise` command (and every Snakefile read) imports the command line; the plotting and model
    # libraries load only where a command or a stage needs them, so `--help`, `check` and `verify` start quickly.
    code = (
        "import sys, regimewise.cli, regimewise.appendix.assemble, regimewise.appendix.verify; "
        "print(sorted(m for m in ('matplotlib', 'statsmodels', 'sklearn', 'lifelines') if m in sys.modules))"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=False)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"


def test_schema_goes_to_standard_output_from_any_folder(tmp_path):
    committed = REPOSITORY / "config" / "protocol.schema.json"
    before = committed.read_bytes()
    result = run_cli("schema", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert json.loads(result.stdout) == protocol_schema()
    assert list(tmp_path.iterdir()) == []  # nothing written where it ran
    assert committed.read_bytes() == before  # the tracked file is never rewritten by default
    assert result.stdout == before.decode("utf-8")  # the committed schema is this export


def test_schema_out_writes_the_named_file(tmp_path):
    result = run_cli("schema", "--out", tmp_path / "s.json", cwd=tmp_path)
    assert result.returncode == 0 and result.stdout == ""
    assert json.loads((tmp_path / "s.json").read_text(encoding="utf-8")) == protocol_schema()


@pytest.mark.parametrize("where", ["before", "after"])
def test_debug_is_accepted_before_or_after_the_command(tmp_path, where):
    args = ["check", tmp_path / "nope.yaml"]
    result = run_cli(*(["--debug", *args] if where == "before" else [*args, "--debug"]))
    assert result.returncode == 1
    assert "Traceback" in result.stderr and "not found" in result.stderr  # --debug shows the traceback


def _helps():
    parser = build_parser()
    commands = next(a for a in parser._actions if a.dest == "command")  # noqa: SLF001 - argparse keeps them here
    return {"regimewise": parser, **commands.choices}


@pytest.mark.parametrize("name", ["regimewise", "demo", "run", "check", "simulate", "schema"])
def test_every_help_has_a_purpose_the_caution_and_every_default(name):
    parser = _helps()[name]
    text = " ".join(parser.format_help().split())
    assert parser.description and len(parser.description) > 30  # a purpose line, not a module docstring
    assert TERMINAL_CAUTION in text
    for action in parser._actions:  # noqa: SLF001
        if action.option_strings and action.dest not in ("help", "version"):
            assert re.search(r"\((default|required)[:)]", action.help or "") or "default:" in (action.help or ""), (
                name,
                action.option_strings,
            )


def test_simulate_refuses_a_folder_that_is_not_empty_unless_forced(tmp_path):
    (tmp_path / "mine.txt").write_text("keep", encoding="utf-8")
    refused = run_cli("simulate", "--out", tmp_path, "--episodes", "5")
    assert refused.returncode == 1
    assert refused.stderr.strip().startswith("regimewise error: simulate --out") and "--force" in refused.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine.txt"]
    forced = run_cli("simulate", "--out", tmp_path, "--episodes", "5", "--force")
    assert forced.returncode == 0, forced.stderr
    assert (tmp_path / "decisions.csv").is_file()


def test_check_writes_its_error_list_beside_the_protocol_and_a_pass_removes_it(tmp_path):
    bad = tiny_decisions()
    bad.loc[2, "bp"] = 999.0
    protocol = write_tiny(tmp_path / "study", decisions=bad)
    failed = run_cli("check", protocol, cwd=tmp_path)  # run from another folder: the list goes beside the protocol
    assert failed.returncode == 1
    listed = tmp_path / "study" / "validation_errors.csv"
    assert listed.is_file() and not (tmp_path / "logs").exists()
    write_tiny(tmp_path / "study")  # the records fixed
    passed = run_cli("check", protocol, cwd=tmp_path)
    assert passed.returncode == 0, passed.stderr
    assert not listed.exists() and "removed the old error list" in passed.stdout


def test_check_writes_into_the_folder_named(tmp_path):
    bad = tiny_decisions()
    bad.loc[2, "bp"] = 999.0
    protocol = write_tiny(tmp_path / "study", decisions=bad)
    assert run_cli("check", protocol, "--errors", tmp_path / "mine").returncode == 1
    assert (tmp_path / "mine" / "validation_errors.csv").is_file()
    assert not (tmp_path / "study" / "validation_errors.csv").exists()
