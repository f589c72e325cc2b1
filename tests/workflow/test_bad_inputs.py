"""Every defect in tests/bad_inputs/ fails with one clear line, no traceback and no stage output.

Each case is run twice in-process (fast): through the command line's ``check`` (exit status, one line on
standard error naming the place, the error list written to the logs folder) and through the validate stage
(nothing under the results folder). One defect goes through the real Snakemake workflow, and an interrupted
workflow run, killed hard and resumed by ``regimewise run`` alone (it removes the dead run's lock itself and
reruns incomplete outputs), must give the same bytes as an uninterrupted one.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
import yaml
from support.bad_inputs.cases import CASES, DEFECTS
from support.tiny import REPOSITORY, tiny_episodes, write_tiny

from regimewise import cli
from regimewise.demo.files import write_cohort
from regimewise.errors import UserInputError
from regimewise.workflow.stages import validate_stage


def test_the_catalogue_has_at_least_forty_defects_across_all_parts():
    parts = {d.part for d in DEFECTS}
    assert len(DEFECTS) >= 40
    assert parts == {"decisions", "episodes", "protocol", "file"}


def test_the_base_study_passes(tmp_path, capsys):
    path = write_tiny(tmp_path / "study", episodes=tiny_episodes())
    assert cli.main(["check", str(path), "--errors", str(tmp_path / "logs" / "e.csv")]) == 0
    assert "pass validation" in capsys.readouterr().out
    assert not (tmp_path / "logs").exists()


@pytest.mark.parametrize("name", sorted(CASES))
def test_defect_fails_with_one_line_and_no_output(tmp_path, capsys, name):
    defect = CASES[name]
    protocol = defect.build(tmp_path / "study")
    errors = tmp_path / "logs" / "validation_errors.csv"
    assert cli.main(["check", str(protocol), "--errors", str(errors.parent)]) == 1
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1, captured.err
    assert lines[0].startswith("regimewise error: ")
    for text in defect.expected:
        assert text in lines[0], lines[0]
    assert "Traceback" not in captured.err + captured.out
    if defect.part in {"decisions", "episodes"}:  # row-level findings go to the error list in the logs folder
        listed = pd.read_csv(errors, dtype=str, keep_default_na=False)
        assert set(listed.columns) == {"rule", "file", "row", "column", "value", "problem", "how_to_fix"}
        assert lines[0].split("[rule ")[-1].split("]")[0] in set(listed["rule"])

    results = tmp_path / "results"
    outputs = [results / "validate" / n for n in ("decisions.parquet", "episodes.parquet", "validation.json")]
    with pytest.raises(UserInputError):
        validate_stage(str(protocol), *map(str, outputs), errors=str(tmp_path / "logs" / "stage_errors.csv"))
    assert not results.exists() or not any(p.is_file() for p in results.rglob("*"))


def test_error_list_is_capped_per_rule_with_totals(tmp_path):
    from support.tiny import tiny_decisions

    from regimewise.data.findings import MAX_FINDINGS_PER_RULE
    from regimewise.data.validate import collect_findings, write_error_report
    from regimewise.protocol import load_protocol

    frame = tiny_decisions(n_episodes=60)
    frame["bp"] = 999.0  # every one of the 180 rows is out of range
    findings, result = collect_findings(load_protocol(write_tiny(tmp_path, decisions=frame)))
    assert result is None
    write_error_report(tmp_path / "errors.csv", findings)
    listed = pd.read_csv(tmp_path / "errors.csv", dtype=str, keep_default_na=False)
    rows = listed[listed["rule"] == "number"]
    assert len(rows) == MAX_FINDINGS_PER_RULE + 1  # the capped list plus its total line
    # exact by construction: 180 rows fail; all but the last listed entry are rows, that one counts the rest
    assert (
        rows["problem"].iat[-1]
        == f"total: 180 problem(s) of this rule ({MAX_FINDINGS_PER_RULE - 1} listed above row by row)"
    )
    assert rows["problem"].iat[-2].startswith(f"{180 - (MAX_FINDINGS_PER_RULE - 1)} more row(s) fail this rule")


# ---------------------------------------------------------------------------------------------- real workflow
CLI = [sys.executable, "-m", "regimewise.cli"]


@pytest.fixture(scope="module")
def small_study(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("study")
    write_cohort(folder / "data", n_episodes=150, seed=11, confounding_strength=1.0, n_truth=500)
    protocol = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    protocol["data"].update(decisions="data/decisions.csv", episodes="data/episodes.csv", root=".")
    (folder / "protocol.yaml").write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return folder / "protocol.yaml"


def test_workflow_failure_leaves_error_list_in_logs_and_no_stage_output(small_study, tmp_path):
    frame = pd.read_csv(small_study.parent / "data" / "episodes.csv")
    frame.loc[3, "event"] = 7
    frame.to_csv(small_study.parent / "data" / "episodes_bad.csv", index=False)
    protocol = yaml.safe_load(small_study.read_text(encoding="utf-8"))
    protocol["data"]["episodes"] = "data/episodes_bad.csv"
    path = small_study.parent / "protocol_bad.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    out = tmp_path / "out"
    result = subprocess.run([*CLI, "run", path, "--out", out], capture_output=True, text=True, check=False)
    assert result.returncode == 1
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "episodes_bad.csv, row 4, column 'event'" in lines[0], result.stderr
    assert "[whole_number] episodes_bad.csv, row 4" in result.stdout  # first lines of the list, by rule
    listed = pd.read_csv(out / "logs" / "validation_errors.csv", dtype=str, keep_default_na=False)
    assert list(listed["rule"]) == ["whole_number", "whole_number"]  # the finding and its total line
    assert not (out / "validate").exists() or not any((out / "validate").iterdir())


def _quick_protocol(small_study: Path) -> Path:
    """The small study with a handful of bootstrap replicates, so a whole run takes seconds.

    Resuming is what is tested here, so the evaluation is kept lean: weighted estimators only (on 150 episodes a
    rare action can be missing at some step within a cross-fitting fold, where the fitted-Q evaluation refuses
    to extrapolate).
    """
    protocol = yaml.safe_load(small_study.read_text(encoding="utf-8"))
    protocol["evaluation"].update(replicates=4, shards=2, estimators=["pdwis", "wis"], fixed_strategies=False)
    path = small_study.parent / "protocol_quick.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


def _start_run(protocol: Path, out: Path) -> subprocess.Popen:
    """``regimewise run`` in its own process group (so a test can kill the run and all its children at once)."""
    env = {**os.environ, "PYTHONHASHSEED": "0"}
    return subprocess.Popen(
        [*CLI, "run", str(protocol), "--out", str(out)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
        env=env,
    )


def _artifacts(out: Path) -> dict[str, bytes]:
    """Every stage output (logs, timings and Snakemake's own records excluded; so is the appendix's record of the
    command line, which names each run's own --out)."""
    skip = {"logs", "benchmarks", ".snakemake"}
    files = sorted(
        p
        for p in out.rglob("*")
        if p.is_file() and p.relative_to(out).parts[0] not in skip and p.relative_to(out).as_posix() != COMMANDS
    )
    return {str(p.relative_to(out)): p.read_bytes() for p in files}


COMMANDS = "appendix/commands.txt"


def test_killed_run_resumes_by_itself_to_the_same_bytes(small_study, tmp_path):
    protocol = _quick_protocol(small_study)
    whole = tmp_path / "whole"
    finished = _start_run(protocol, whole)
    assert finished.wait(timeout=600) == 0, finished.communicate()[1]
    interrupted = tmp_path / "interrupted"
    job = _start_run(protocol, interrupted)
    deadline = time.monotonic() + 600
    while not (interrupted / "behaviour" / "behaviour.json").exists() and job.poll() is None:
        assert time.monotonic() < deadline
        time.sleep(0.05)
    os.killpg(job.pid, signal.SIGKILL)  # as a power cut would: no clean-up by the CLI, Snakemake or the stage
    job.communicate()
    assert not (interrupted / "report" / "summary.json").exists()  # killed before the workflow finished
    assert any((interrupted / cli.SNAKEMAKE_LOCKS).glob("*.lock"))  # the killed Snakemake left its lock behind
    # The next `regimewise run` alone removes the dead run's lock and resumes; no manual step.
    resumed = _start_run(protocol, interrupted)
    out, err = resumed.communicate(timeout=600)
    assert resumed.returncode == 0, err
    assert "removing the lock a stopped run left" in out
    assert not list(interrupted.rglob("*.partial"))
    expected = _artifacts(whole)
    assert {"validate/decisions.parquet", "regime/regime.json", "report/summary.json"} <= set(expected)
    assert _artifacts(interrupted) == expected
    ran = [(folder / COMMANDS).read_text(encoding="utf-8").splitlines()[1] for folder in (whole, interrupted)]
    assert [line.replace("interrupted", "whole") for line in ran] == [ran[0], ran[0]]  # only --out differs


def test_a_live_run_holding_the_folder_is_refused_in_one_line(small_study, tmp_path, capsys):
    fcntl = pytest.importorskip("fcntl")  # POSIX only, as the CLI's run lock
    out = tmp_path / "busy"
    (out / cli.RUN_LOCK).parent.mkdir(parents=True)
    with open(out / cli.RUN_LOCK, "a+b") as held:  # stands for a live run: the CLI's own kind of lock
        fcntl.flock(held.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        assert cli.main(["run", str(small_study), "--out", str(out)]) == 1
    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1 and "another regimewise run is writing into" in lines[0], captured.err
    assert not (out / "logs" / "workflow.log").exists()  # refused before starting Snakemake
