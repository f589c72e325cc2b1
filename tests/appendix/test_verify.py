"""``regimewise verify`` (issue 17) on copies of the shared runs: identity, an edited input named before anything
reruns, an edited artifact named. The whole-rerun mode runs the workflow again (minutes); these tests use
``--against`` (the second shared run is a rerun) and ``--report-only``."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from support.cli import run_cli


@pytest.fixture
def run_copy(two_runs, tmp_path) -> Path:
    """A copy of the first shared run (verify writes verification.json into the run it checks)."""
    copy = tmp_path / "run"
    shutil.copytree(two_runs[0][0], copy, symlinks=True)
    return copy


def flip_one_byte(path: Path, offset: int = 100) -> None:
    data = bytearray(path.read_bytes())
    data[offset] = ord("x") if data[offset] != ord("x") else ord("y")
    path.write_bytes(bytes(data))


def verification(run: Path) -> dict:
    return json.loads((run / "appendix" / "verification.json").read_text(encoding="utf-8"))


def test_an_untouched_run_verifies_against_its_rerun(run_copy, two_runs):
    result = run_cli("verify", run_copy, "--against", two_runs[0][1])  # protocol from the run's workflow config
    assert result.returncode == 0, result.stdout + result.stderr
    assert result.stdout.strip().count("\n") == 0 and result.stdout.startswith("verified:")
    record = verification(run_copy)
    manifest = json.loads((run_copy / "appendix" / "manifest.json").read_text(encoding="utf-8"))
    assert record["files_compared"] == record["identical"] == len(manifest["files"])
    assert record["differing"] == record["changed_since_run"] == record["environment_differences"] == []
    assert record["verdict"] == "identical"


def test_report_only_rerenders_the_same_report(run_copy, study):
    result = run_cli("verify", run_copy, "--report-only", "--protocol", study)
    assert result.returncode == 0, result.stdout + result.stderr
    record = verification(run_copy)
    assert (record["mode"], record["files_compared"], record["identical"]) == ("report", 3, 3)


@pytest.mark.parametrize("target", ["data/decisions.csv", "protocol.yaml"])
def test_an_edited_input_is_named_before_anything_reruns(run_copy, study, tmp_path, target):
    edited = tmp_path / "study"
    shutil.copytree(study.parent, edited)
    if target == "protocol.yaml":  # a changed comment keeps the protocol valid but not the same file
        (edited / target).write_text((edited / target).read_text(encoding="utf-8") + "# edited\n", encoding="utf-8")
    else:
        flip_one_byte(edited / target, offset=200)
    result = run_cli("verify", run_copy, "--protocol", edited / "protocol.yaml")
    assert result.returncode == 1
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and Path(target).name in lines[0] and "nothing was rerun" in lines[0]
    assert "running" not in result.stdout  # the workflow never started
    assert not (run_copy / "appendix" / "verification.json").exists()


@pytest.mark.parametrize("artifact", ["report/report.html", "regime/regime.json"])
def test_an_edited_artifact_is_named(run_copy, study, artifact):
    flip_one_byte(run_copy / artifact)
    result = run_cli("verify", run_copy, "--report-only", "--protocol", study)
    assert result.returncode == 1, result.stdout + result.stderr
    assert artifact in result.stdout and result.stdout.startswith("NOT identical")
    assert verification(run_copy)["changed_since_run"] == [{"path": artifact, "problem": "different bytes"}]


def test_an_artifact_differing_in_the_rerun_is_named(run_copy, two_runs, tmp_path):
    rerun = tmp_path / "rerun"
    shutil.copytree(two_runs[0][1], rerun, symlinks=True)
    flip_one_byte(rerun / "evaluate" / "values.json")
    result = run_cli("verify", run_copy, "--against", rerun)
    assert result.returncode == 1
    assert "evaluate/values.json" in result.stdout
    record = verification(run_copy)
    assert record["differing"] == [{"path": "evaluate/values.json", "problem": "different bytes"}]
    assert record["identical"] == record["files_compared"] - 1


def test_verify_refuses_a_folder_without_an_appendix(tmp_path):
    result = run_cli("verify", tmp_path)
    assert result.returncode == 1 and "appendix/manifest.json" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1


def test_rerun_into_a_folder_that_is_not_empty_is_refused(run_copy, study, tmp_path):
    (tmp_path / "old").mkdir()
    (tmp_path / "old" / "x").write_text("old", encoding="utf-8")
    result = run_cli("verify", run_copy, "--protocol", study, "--rerun-into", tmp_path / "old")
    assert result.returncode == 1 and "is not empty" in result.stderr
