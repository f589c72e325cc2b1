"""A protocol's selfcheck section runs the self-check inside the workflow: one job per cohort, the summary, the
report's section, summary.json's block and the manifest; the same bytes as the command."""

import json
import subprocess
import sys

import yaml
from support.tiny import REPOSITORY

from regimewise.demo.files import write_cohort


def test_workflow_runs_the_selfcheck_into_the_report(tmp_path):
    write_cohort(tmp_path / "data", n_episodes=400, seed=6, confounding_strength=1.0, n_truth=10)
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"].update(root=".", decisions="data/decisions.csv", episodes="data/episodes.csv")
    raw["evaluation"].update(replicates=2, shards=1)
    raw["constraints"]["ensemble_size"] = 5
    raw["selfcheck"] = {"cohorts": 2, "replicates": 20, "truth_episodes": 1000, "reference_episodes": 2000}
    protocol = tmp_path / "protocol.yaml"
    protocol.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    out = tmp_path / "out"
    run = [sys.executable, "-m", "regimewise.cli", "run", protocol, "--out", out, "--cores", "2"]
    result = subprocess.run(run, capture_output=True, text=True, check=False)
    assert result.returncode == 0, result.stderr
    assert "self-check cohort 1 done" in result.stdout and "self-check on look-alike cohorts done" in result.stdout
    assert sorted(p.name for p in (out / "selfcheck" / "cohorts").iterdir()) == ["cohort_0.json", "cohort_1.json"]
    summary = json.loads((out / "report" / "summary.json").read_text(encoding="utf-8"))
    assert summary["selfcheck"]["settings"]["cohorts"] == 2
    assert summary["selfcheck"]["summary"]["usual_care_value"]["all"]["n_used"] == 2
    html = (out / "report" / "report.html").read_text(encoding="utf-8")
    assert "Self-check on look-alike cohorts" in html and "Regret of the learned regime" in html
    manifest = json.loads((out / "appendix" / "manifest.json").read_text(encoding="utf-8"))
    listed = {entry["path"] for entry in manifest["files"]}
    assert {"selfcheck/selfcheck.json", "selfcheck/selfcheck.html", "selfcheck/cohorts/cohort_0.json"} <= listed
    # the command with the protocol's settings writes the same bytes
    command = [sys.executable, "-m", "regimewise.cli", "selfcheck", protocol, "--out", tmp_path / "command"]
    result = subprocess.run(command, capture_output=True, text=True, check=False)
    assert result.returncode == 0, result.stderr
    for name in ("selfcheck.json", "selfcheck.html"):
        assert (tmp_path / "command" / name).read_bytes() == (out / "selfcheck" / name).read_bytes(), name
