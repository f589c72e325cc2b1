"""A protocol and records whose paths hold braces, ``: `` or ``=`` work like any other path.

Snakemake reads ``{name}`` in an input path as a wildcard and has no escape for it, so the workflow names such a
file by a stand-in (:func:`regimewise.workflow.settings.stand_in`). These tests check the stand-ins at parse time,
the validate stage through the real Snakemake on the tiny made-up cohort of ``tests/support/tiny.py`` (including
when it reruns), and ``regimewise check``. The full run from such folders into such a results folder is the clean
run of ``test_leaks.py``.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from support.tiny import REPOSITORY, tiny_decisions, tiny_episodes, tiny_protocol_dict, write_tiny

from regimewise import cli
from regimewise.workflow.settings import STAND_INS, load_settings, real_input

RECORDS = "records {y}: z=1"


@pytest.fixture
def odd_study(tmp_path) -> Path:
    """The tiny study with braces, ``: `` and ``=`` in the protocol's folder and name and in the records' folder and
    names."""
    folder = tmp_path / "study: {x} a=b"
    (folder / RECORDS).mkdir(parents=True)
    tiny_decisions().to_csv(folder / RECORDS / "decisions {v}.csv", index=False)
    tiny_episodes().to_csv(folder / RECORDS / "episodes {v}.csv", index=False)
    protocol = tiny_protocol_dict(decisions=f"{RECORDS}/decisions {{v}}.csv", episodes=f"{RECORDS}/episodes {{v}}.csv")
    path = folder / "protocol {p}: q.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


def _settings(protocol: Path, workdir: Path, monkeypatch):
    workdir.mkdir(exist_ok=True)
    monkeypatch.chdir(workdir)
    return load_settings({"protocol": str(protocol), "results": ".", "logs": "logs", "benchmarks": "benchmarks"})


def test_paths_with_braces_are_named_by_brace_free_stand_ins(odd_study, tmp_path, monkeypatch):
    settings = _settings(odd_study, tmp_path / "work", monkeypatch)
    real = {
        "protocol": odd_study,
        "decisions_file": odd_study.parent / RECORDS / "decisions {v}.csv",
        "episodes_file": odd_study.parent / RECORDS / "episodes {v}.csv",
    }
    inputs = settings.record_inputs
    assert set(inputs) == set(real) and settings.protocol_input == inputs["protocol"]
    for key, path in real.items():
        stand_in = Path(inputs[key])
        assert stand_in.parent == STAND_INS and not {"{", "}"} & set(str(stand_in)), stand_in
        assert real_input(str(stand_in)) == str(path.resolve())  # the stage reads the real file
        stamp = json.loads(stand_in.read_text(encoding="utf-8"))  # the path, size and time; nothing of the records
        assert stamp == {"path": str(path.resolve()), "size": path.stat().st_size, "mtime_ns": path.stat().st_mtime_ns}
    # the resource estimate still reads the real records file (its size and suffix)
    assert settings.decisions_file == str(real["decisions_file"].resolve())
    # parsing again (every Snakemake start) keeps the same stand-ins, untouched
    before = {key: Path(value).stat().st_mtime_ns for key, value in inputs.items()}
    again = _settings(odd_study, tmp_path / "work", monkeypatch).record_inputs
    assert again == inputs and before == {key: Path(value).stat().st_mtime_ns for key, value in again.items()}
    # rewriting a records file rewrites its stand-in, which is how Snakemake learns of the change
    tiny_decisions(n_episodes=39).to_csv(real["decisions_file"], index=False)
    rewritten = _settings(odd_study, tmp_path / "work", monkeypatch).record_inputs
    assert rewritten == inputs
    assert (
        json.loads(Path(inputs["decisions_file"]).read_text(encoding="utf-8"))["size"]
        == real["decisions_file"].stat().st_size
    )
    assert real_input("validate/validation.json") == "validate/validation.json"


def test_paths_without_braces_are_named_as_they_are(tmp_path, monkeypatch):
    protocol = write_tiny(tmp_path / "plain: a=b")
    settings = _settings(protocol, tmp_path / "work", monkeypatch)
    assert settings.record_inputs == {
        "protocol": str(protocol),
        "decisions_file": str(protocol.parent / "decisions.csv"),
    }
    assert not (tmp_path / "work" / STAND_INS).exists()


def _snakemake(out: Path, config: Path) -> subprocess.CompletedProcess:
    command = [sys.executable, "-m", "snakemake", "--snakefile", REPOSITORY / "Snakefile", "--directory", out]
    command += ["--configfile", config, "--cores", "1", "validate/validation.json"]
    return subprocess.run([str(c) for c in command], capture_output=True, text=True, check=False)


def test_validate_stage_reads_odd_paths_and_reruns_only_when_the_records_change(odd_study, tmp_path):
    out = tmp_path / "out: {o} a=b"
    out.mkdir()
    config = cli._write_workflow_config(out, odd_study)  # the config file `regimewise run` hands to Snakemake
    first = _snakemake(out, config)
    assert first.returncode == 0, first.stdout + first.stderr
    summary = json.loads((out / "validate" / "validation.json").read_text(encoding="utf-8"))
    assert summary["rows_kept"] == 120  # 40 episodes x 3 steps of tiny_decisions()
    assert (summary["decisions_file"], summary["episodes_file"]) == ("decisions {v}.csv", "episodes {v}.csv")
    second = _snakemake(out, config)
    assert second.returncode == 0 and "Nothing to be done" in second.stdout + second.stderr
    # records rewritten after the run (one episode fewer) rerun validation, which sees the new records
    decisions = tiny_decisions()
    decisions[decisions["episode_id"] != "E039"].to_csv(odd_study.parent / RECORDS / "decisions {v}.csv", index=False)
    tiny_episodes(decisions[decisions["episode_id"] != "E039"]).to_csv(
        odd_study.parent / RECORDS / "episodes {v}.csv", index=False
    )
    third = _snakemake(out, config)
    assert third.returncode == 0, third.stdout + third.stderr
    assert json.loads((out / "validate" / "validation.json").read_text(encoding="utf-8"))["rows_kept"] == 117


def test_check_command_reads_odd_paths(odd_study, tmp_path, capsys):
    assert cli.main(["check", str(odd_study), "--errors", str(tmp_path / "errors {e}: f.csv")]) == 0
    assert "protocol {p}: q.yaml: protocol valid; 120 decisions in 40 episodes" in capsys.readouterr().out
