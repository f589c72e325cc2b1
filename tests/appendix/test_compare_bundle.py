"""``regimewise compare`` and ``regimewise bundle`` (issue 17) on the shared runs and edited copies."""

from __future__ import annotations

import hashlib
import json
import shutil
import zipfile
from pathlib import Path

import yaml
from support.cli import run_cli

from regimewise.appendix.records import resolved_protocol_text, sha256_line
from regimewise.protocol.loading import load_protocol


def amended_copy(run: Path, study: Path, tmp_path: Path) -> Path:
    """A copy of ``run`` whose recorded protocol is the study's with one setting changed (compare reads only the
    records, so this stands for a run of the amended protocol; the record is written by the stage's own writer)."""
    copy = tmp_path / "amended"
    shutil.copytree(run, copy, symlinks=True)
    protocol = yaml.safe_load(study.read_text(encoding="utf-8"))
    protocol["constraints"]["support_threshold"] = 0.07
    amended = tmp_path / "amended.yaml"  # validation does not open the records, so the copy may live here
    amended.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    text = resolved_protocol_text(load_protocol(amended).protocol)
    (copy / "appendix" / "protocol.resolved.yaml").write_text(text, encoding="utf-8")
    (copy / "appendix" / "protocol.resolved.yaml.sha256").write_text(
        sha256_line(text, "protocol.resolved.yaml"), encoding="utf-8"
    )
    return copy


def test_compare_lists_exactly_the_changed_setting(two_runs, study, tmp_path):
    first, second = two_runs[0]
    before = yaml.safe_load(study.read_text(encoding="utf-8"))["constraints"]["support_threshold"]
    assert before != 0.07
    out = tmp_path / "comparison.json"
    result = run_cli("compare", first, amended_copy(second, study, tmp_path), "--out", out)
    assert result.returncode == 0, result.stderr
    comparison = json.loads(out.read_text(encoding="utf-8"))
    assert comparison["protocol"] == [{"key": "constraints.support_threshold", "a": before, "b": 0.07}]
    assert comparison["environment"] == []
    assert all(item["same"] for item in comparison["inputs"])
    assert all(row["a"] == row["b"] for row in comparison["headline"] + comparison["rows"])
    assert "protocol settings changed: 1" in result.stdout and "constraints.support_threshold" in result.stdout


def test_compare_refuses_an_edited_resolved_protocol(two_runs, tmp_path):
    copy = tmp_path / "edited"
    shutil.copytree(two_runs[0][1], copy, symlinks=True)
    path = copy / "appendix" / "protocol.resolved.yaml"
    path.write_text(path.read_text(encoding="utf-8").replace("seed:", "seed: 1 #"), encoding="utf-8")
    result = run_cli("compare", two_runs[0][0], copy)
    assert result.returncode == 1 and "protocol.resolved.yaml does not match" in result.stderr


def test_bundle_is_byte_identical_across_two_runs(two_runs, tmp_path):
    zips = []
    for k, run in enumerate(two_runs[0]):
        target = tmp_path / f"bundle{k}.zip"
        result = run_cli("bundle", run, "--out", target)
        assert result.returncode == 0, result.stderr
        zips.append(target)
    assert hashlib.sha256(zips[0].read_bytes()).digest() == hashlib.sha256(zips[1].read_bytes()).digest()
    run = two_runs[0][0]
    with zipfile.ZipFile(zips[0]) as archive:  # read back with the standard library's zip reader
        assert archive.testzip() is None
        infos = archive.infolist()
        names = [i.filename for i in infos]
        assert names == sorted(names)
        assert all(i.date_time == (1980, 1, 1, 0, 0, 0) and (i.external_attr >> 16) == 0o100644 for i in infos)
        run_name = json.loads((run / "report" / "summary.json").read_text(encoding="utf-8"))["study"]["run_name"]
        assert all(name.startswith(f"{run_name}/") for name in names)
        inside = {name.split("/", 1)[1]: archive.read(name) for name in names}
    assert {"report/report.html", "report/summary.json", "appendix/manifest.json", "appendix/protocol.yaml"} <= set(
        inside
    )
    for relative, data in inside.items():
        assert data == (run / relative).read_bytes(), relative


def test_bundle_refuses_an_edited_report(two_runs, tmp_path):
    copy = tmp_path / "edited"
    shutil.copytree(two_runs[0][0], copy, symlinks=True)
    with open(copy / "report" / "summary.json", "a", encoding="utf-8") as handle:
        handle.write(" ")
    result = run_cli("bundle", copy, "--out", tmp_path / "b.zip")
    assert result.returncode == 1 and "summary.json does not match" in result.stderr
    assert not (tmp_path / "b.zip").exists()
