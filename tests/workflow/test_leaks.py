"""No planted identifier reaches any file under the results folder or the terminal.

A small invented cohort (the demo simulator, 200 episodes) gets one identifier at a time: in an id column, in
an extra numeric or text column, in a header, in a file name, in the protocol's free text and in a line YAML
cannot parse. Each is refused by ``regimewise check`` (in-process, fast); one goes through the real workflow.
Then every file under the results folder and everything printed are searched for the planted text. One full run
of the clean cohort, with the protocol and records in folders and files named with ``: ``, braces and ``=``, into a
results folder named so, shows that any such name works.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml
from support.tiny import REPOSITORY

from regimewise import cli
from regimewise.demo.files import write_cohort

CLI = [sys.executable, "-m", "regimewise.cli"]


@pytest.fixture(scope="module")
def cohort(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("leaks")
    write_cohort(folder / "data", n_episodes=200, seed=5, confounding_strength=1.0, n_truth=500)
    return folder


def _protocol(folder: Path, decisions="data/decisions.csv", episodes="data/episodes.csv", change=None) -> Path:
    p = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    p["data"].update(decisions=decisions, episodes=episodes, root=".")
    p["evaluation"].update(replicates=2, shards=1, estimators=["pdwis", "wis"], fixed_strategies=False)
    p["constraints"].update(pessimism=0.0)
    if change is not None:
        change(p)
    path = folder / "protocol.yaml"
    path.write_text(yaml.safe_dump(p, sort_keys=False, allow_unicode=True), encoding="utf-8")
    return path


def _table_with(cohort: Path, table: str, change) -> pd.DataFrame:
    frame = pd.read_csv(cohort / "data" / f"{table}.csv")
    change(frame)
    return frame


def _cell(column, value, rows=slice(0, 3)):
    def change(frame):
        frame[column] = frame[column].astype(object)
        frame.loc[frame.index[rows], column] = value

    return change


def _extra(column, value):
    def change(frame):
        frame[column] = value

    return change


# planted text -> (table, change of that table) or ("protocol", change of the protocol) or ("file", file name)
PLANTED = {
    "14 March 1950": ("decisions", _cell("episode_id", "14 March 1950", slice(0, 8))),
    "123456789": ("decisions", _cell("patient_id", 123456789, slice(0, 8))),
    "jane roe": ("episodes", _cell("patient_id", "jane roe", slice(0, 1))),
    "2025550143": ("episodes", _extra("contact", 2025550143)),
    "19540314": ("episodes", _extra("born", 19540314)),
    "078 05 1120": ("decisions", _extra("note", "078 05 1120")),
    "(555)201-9876": ("decisions", _cell("action", "(555)201-9876")),
    "jane.roe@example.org": ("decisions", _extra("jane.roe@example.org", 1)),
    "MRN4471203": ("protocol", lambda p: p["study"].update(title="Harbourline MRN4471203")),
    "078-05-1120": ("protocol", lambda p: p["states"][0].update(label="BP of 078-05-1120")),
    "john.doe@example.org": ("file", "john.doe@example.org.csv"),
}


def _study(cohort: Path, folder: Path, planted: str) -> Path:
    where, how = PLANTED[planted]
    folder.mkdir(parents=True)
    decisions, episodes = "../data/decisions.csv", "../data/episodes.csv"
    if where in ("decisions", "episodes"):
        _table_with(cohort, where, how).to_csv(folder / f"{where}.csv", index=False)
        decisions, episodes = (f"{where}.csv", episodes) if where == "decisions" else (decisions, f"{where}.csv")
    elif where == "file":
        (folder / how).write_bytes((cohort / "data" / "decisions.csv").read_bytes())
        decisions = how
    protocol = _protocol(folder, decisions, episodes, how if where == "protocol" else None)
    text = protocol.read_text(encoding="utf-8").replace("root: .", "root: ..")
    protocol.write_text(text, encoding="utf-8")
    return protocol


def _hits(planted: str, folder: Path, *printed: str) -> list[str]:
    texts = {str(p): p.read_bytes().decode("utf-8", "replace") for p in folder.rglob("*") if p.is_file()}
    texts["terminal"] = "\n".join(printed)
    return [name for name, text in texts.items() if planted in text]


@pytest.mark.parametrize("planted", sorted(PLANTED))
def test_planted_identifier_is_refused_and_never_written_or_printed(cohort, tmp_path, capsys, planted):
    protocol = _study(cohort, cohort / f"study_{tmp_path.name}", planted)
    results = tmp_path / "results"
    assert cli.main(["check", str(protocol), "--errors", str(results / "logs")]) == 1
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err + captured.out
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert len(lines) == 1 and "identifier" in lines[0], lines
    assert _hits(planted, results, captured.out, captured.err) == []
    assert not (results / "validate").exists()


def test_yaml_line_with_an_identifier_is_never_echoed(cohort, tmp_path, capsys):
    protocol = _protocol(cohort)
    text = protocol.read_text(encoding="utf-8").replace("study:", "study:\n  x: jane.roe@example.org: [", 1)
    (tmp_path / "broken.yaml").write_text(text, encoding="utf-8")
    assert cli.main(["check", str(tmp_path / "broken.yaml"), "--errors", str(tmp_path / "out" / "e.csv")]) == 1
    captured = capsys.readouterr()
    assert "not valid YAML (line 2" in captured.err
    assert _hits("jane.roe", tmp_path / "out", captured.out, captured.err) == []


def test_planted_identifier_through_the_workflow_and_a_clean_run_into_an_odd_folder_name(cohort, tmp_path):
    # Refused at the validate stage: nothing planted under the results folder, in its logs or on the terminal.
    refused = subprocess.run(
        [*CLI, "run", _study(cohort, cohort / "study_workflow", "19540314"), "--out", tmp_path / "refused"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert refused.returncode == 1 and "full date" in refused.stderr, refused.stderr
    assert _hits("19540314", tmp_path / "refused", refused.stdout, refused.stderr) == []
    assert not (tmp_path / "refused" / "validate").exists() or not any((tmp_path / "refused" / "validate").iterdir())
    # The clean cohort runs to the end from, and into, folders whose names Snakemake's --config parsing or its
    # wildcards would misread: the protocol, the records' folder and the records' names hold ": ", braces and "=".
    study = cohort / "study: {s} a=b"
    (study / "data {d}: e").mkdir(parents=True)
    for table in ("decisions", "episodes"):
        (study / "data {d}: e" / f"{table} {{v}}.csv").write_bytes((cohort / "data" / f"{table}.csv").read_bytes())
    protocol = _protocol(study, "data {d}: e/decisions {v}.csv", "data {d}: e/episodes {v}.csv")
    protocol = protocol.rename(study / "protocol {p}: q.yaml")
    out = tmp_path / "out: {x} a=b"
    done = subprocess.run([*CLI, "run", protocol, "--out", out], capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr
    assert (out / "report" / "report.html").is_file() and (out / "report" / "summary.json").is_file()
    validation = json.loads((out / "validate" / "validation.json").read_text(encoding="utf-8"))
    assert (validation["decisions_file"], validation["episodes_file"]) == ("decisions {v}.csv", "episodes {v}.csv")
    provenance = json.loads((out / "report" / "appendix" / "provenance.json").read_text(encoding="utf-8"))
    assert provenance["protocol"]["file"] == "protocol {p}: q.yaml"
