"""The whole workflow through the command line: outputs, byte-for-byte reruns, lint, and bad inputs.

These tests run the real Snakemake workflow on a small invented cohort (400 episodes from the demo
simulator) and take about a minute on 2 cores.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from support.cli import CLI, run_cli
from support.tiny import REPOSITORY, set_cell

from regimewise.evaluation.strategies import protocol_strategies
from regimewise.protocol import load_protocol


def test_run_writes_report_and_summary(two_runs, study):
    (out, _), (result, _) = two_runs
    assert result.returncode == 0, result.stderr
    assert "Research use only" in result.stdout
    # progress: one line per job Snakemake reports finished, counted in order, then the warning count (issue 15)
    steps = [re.match(r"^\[(\d+)/(\d+)\] (.+) done \(\d+ s\)$", line) for line in result.stdout.splitlines()]
    steps = [m for m in steps if m]
    assert [int(m[1]) for m in steps] == list(range(1, len(steps) + 1)) and len(steps) == int(steps[0][2])
    assert [m[3] for m in steps if "shard" in m[3]] != [] and all(
        m[3].endswith(" of 2") for m in steps if "shard" in m[3]
    )
    # the warning count is read from the stage logs, which keep the warnings as long as their outputs stand
    count = sum(
        line.startswith("WARNING StatisticalWarning: ")
        for log in (out / "logs").glob("*.log")
        if log.name != "workflow.log"
        for line in log.read_text(encoding="utf-8").splitlines()
    )
    expected = "no statistical warnings" if count == 0 else rf"{count} statistical warnings? .* listed in .*\.log"
    assert re.search(rf"^{expected}$", result.stdout, re.M)
    assert result.stdout.index("] report done") < result.stdout.index("report:  ")
    summary = json.loads((out / "report" / "summary.json").read_text(encoding="utf-8"))
    assert summary["cohort"]["episodes"] == 400
    assert set(summary["values"]) == {
        "learned",
        "usual_care",
        "always_hold",
        "always_step_down",
        "always_step_up",
        "always_add_agent",
        *(s.name for s in protocol_strategies(load_protocol(study).protocol.strategies)),
        "guideline",  # the demo protocol's comparator
    }
    html_text = (out / "report" / "report.html").read_text(encoding="utf-8")
    assert "step up when systolic blood pressure &gt; 140 mmHg" in html_text  # the comparator in clinical words
    # the headline names the protocol's pre-specified strategy, with its verdict (issue 13)
    assert summary["strategies"]["headline"]["verdict"] in summary["headline"]["sentence"]
    assert summary["headline"]["strategy"] == summary["strategies"]["headline"]["name"]
    assert summary["strategies"]["prespecified"] is True
    # Usual care evaluated against itself: every weight is 1, so PDWIS is the observed mean return and ESS = n
    # (identity of self-normalised importance sampling; METHODS.md).
    usual = summary["values"]["usual_care"]["pdwis"]
    assert usual["value"] == pytest.approx(summary["usual_care_observed"]["mean_return"], abs=1e-9)
    assert usual["ess"] == pytest.approx(400)
    html = (out / "report" / "report.html").read_text(encoding="utf-8")
    assert html.index("Research use only") < html.index("1. Protocol")
    # Self-contained: no external images, style sheets, scripts or links to fetch.
    for external in ('src="http', "<link", 'href="http', "<script", "<img"):
        assert external not in html
    assert (out / "report" / "appendix" / "provenance.json").is_file()


def test_rerun_gives_identical_bytes(two_runs):
    (first, second), results = two_runs
    assert all(r.returncode == 0 for r in results)
    for name in ("summary.json", "report.html"):
        assert (first / "report" / name).read_bytes() == (second / "report" / name).read_bytes(), name
    assert str(first) not in (first / "report" / "report.html").read_text(encoding="utf-8")


def test_snakemake_lint_passes():
    result = subprocess.run(
        [sys.executable, "-m", "snakemake", "--lint"], capture_output=True, text=True, cwd=REPOSITORY, check=False
    )
    assert result.returncode == 0, result.stdout + result.stderr


def _dry_run(protocol, folder):
    result = subprocess.run(
        [
            sys.executable,
            "-m",
            "snakemake",
            "-n",
            "--snakefile",
            REPOSITORY / "Snakefile",
            "--directory",
            folder,
            "--config",
            f"protocol={protocol}",
            "results=.",
            "logs=logs",
            "benchmarks=benchmarks",
        ],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 0, result.stdout + result.stderr
    return result.stdout


def test_dry_run_lists_every_stage(study, tmp_path):
    stdout = _dry_run(study, tmp_path)
    for rule in ("validate", "behaviour", "regime", "evaluate_learned", "bootstrap_shard", "combine", "report"):
        assert rule in stdout


def _job_inputs(stdout, rule):
    """The input line of ``rule``'s job in a dry run's listing."""
    block = stdout.split(f"rule {rule}:", 1)[1]
    return next(line for line in block.splitlines() if line.strip().startswith("input:"))


@pytest.mark.parametrize(("folds", "table"), [(2, "regime/crossfit.parquet"), (1, "regime/fitted.parquet")])
def test_the_learned_regime_is_evaluated_from_the_table_that_holds_it(study, tmp_path, folds, table):
    # cross-fitted: the fold regimes' table, so evaluate_learned need not wait for regime_fit; one fold: the regime
    # learned on all records, regime_fit's table
    raw = yaml.safe_load(study.read_text(encoding="utf-8"))
    raw["evaluation"]["cross_fit_folds"] = folds
    protocol = study.parent / f"folds_{folds}.yaml"
    protocol.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    inputs = _job_inputs(_dry_run(protocol, tmp_path), "evaluate_learned")
    other = {"regime/crossfit.parquet", "regime/fitted.parquet"} - {table}
    assert table in inputs and other.pop() not in inputs, inputs


def test_no_shard_jobs_without_replicates(study, tmp_path):
    raw = yaml.safe_load(study.read_text(encoding="utf-8"))
    raw["evaluation"]["replicates"] = 0
    protocol = study.parent / "no_replicates.yaml"
    protocol.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    stdout = _dry_run(protocol, tmp_path)
    assert "bootstrap_shard" not in stdout
    for rule in ("combine", "survival", "report"):
        assert f"rule {rule}:" in stdout or f"localrule {rule}:" in stdout, stdout


def test_check_command_on_the_demo():
    result = run_cli("check", REPOSITORY / "config" / "protocol.yaml")
    assert result.returncode == 0, result.stderr
    assert "24000 decisions in 3000 episodes" in result.stdout


# ---------------------------------------------------------------------------------------------- bad inputs
def _protocol_with(study: Path, tmp_path: Path, change) -> Path:
    protocol = yaml.safe_load(study.read_text(encoding="utf-8"))
    change(protocol)
    protocol["data"]["decisions"] = str(study.parent / protocol["data"]["decisions"])
    protocol["data"]["episodes"] = str(study.parent / protocol["data"]["episodes"])
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


def _records_with(study: Path, tmp_path: Path, change) -> Path:
    import pandas as pd

    frame = pd.read_csv(study.parent / "data" / "decisions.csv")
    change(frame)
    frame.to_csv(tmp_path / "decisions.csv", index=False)
    protocol = yaml.safe_load(study.read_text(encoding="utf-8"))
    protocol["data"]["decisions"] = "decisions.csv"
    protocol["data"]["episodes"] = None
    protocol.pop("survival", None)  # no episodes table here
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


BAD_PROTOCOLS = {
    "unknown key": (lambda p: p.update(sneaky=True), "sneaky: unknown key 'sneaky'"),
    "threshold out of range": (lambda p: p["constraints"].update(support_threshold=2), "support_threshold"),
    "duplicate action": (lambda p: p["actions"].append(dict(p["actions"][0])), "declared twice"),
    "state declared twice": (lambda p: p["states"].append(dict(p["states"][0])), "declared twice"),
    "discount zero": (lambda p: p.update(discount=0), "discount"),
    "horizon text": (lambda p: p.update(horizon="eight"), "horizon"),
    "missing decisions file": (lambda p: p["data"].update(decisions="nowhere.csv"), "not found"),
}

BAD_RECORDS = {
    "state out of range": (set_cell(10, "sbp", 400.0), "column 'sbp'"),
    "unknown action": (set_cell(3, "action", "double_dose"), "[rule action_label]"),
    "duplicate decision": (set_cell(1, "step", 0), "[rule duplicate_decision]"),
    "missing column": (lambda f: f.drop(columns=["potassium"], inplace=True), "[rule missing_column]"),
}


def _assert_one_clear_line(result, expected):
    assert result.returncode == 1
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("regimewise error: ")
    assert expected in lines[0]
    assert "Traceback" not in result.stderr + result.stdout


@pytest.mark.parametrize("case", sorted(BAD_PROTOCOLS))
def test_bad_protocol_fails_cleanly(study, tmp_path, case):
    change, expected = BAD_PROTOCOLS[case]
    out = tmp_path / "out"
    result = run_cli("run", _protocol_with(study, tmp_path, change), "--out", out)
    _assert_one_clear_line(result, expected)
    assert not out.exists() or not any(out.rglob("*.json"))


@pytest.mark.parametrize("case", sorted(BAD_RECORDS))
def test_bad_records_fail_cleanly_and_leave_no_stage_output(study, tmp_path, case):
    change, expected = BAD_RECORDS[case]
    out = tmp_path / "out"
    result = run_cli("run", _records_with(study, tmp_path, change), "--out", out)
    _assert_one_clear_line(result, expected)
    assert not (out / "validate").exists() or not any((out / "validate").iterdir())
    assert not (out / "report").exists()


def test_debug_shows_the_traceback(tmp_path):
    path = tmp_path / "protocol.yaml"
    path.write_text("study: {}\n", encoding="utf-8")
    result = subprocess.run([*CLI, "--debug", "check", path], capture_output=True, text=True, check=False)
    assert result.returncode == 1
    assert "Traceback" in result.stderr and "regimewise error: " in result.stderr
