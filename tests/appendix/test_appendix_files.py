"""The appendix of a run (issue 17): manifest, environment, resolved protocol, seeds, commands; read from the
shared two runs of the small study (``two_runs`` in tests/conftest.py)."""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import socket
import subprocess
from importlib import metadata
from pathlib import Path

import numpy as np
import pytest
import yaml
from support.tiny import REPOSITORY

from regimewise.appendix.assemble import appendix_outputs
from regimewise.appendix.manifest import ARTIFACT_FOLDERS
from regimewise.appendix.records import shown_command
from regimewise.cli import _command_record, _write_workflow_config, build_parser
from regimewise.protocol.loading import load_protocol
from regimewise.protocol.model import Protocol


def appendix_files(out: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted((out / "appendix").iterdir()) if p.is_file()}


def test_two_runs_give_identical_appendix_bytes(two_runs):
    (first, second), results = two_runs
    assert all(r.returncode == 0 for r in results), [r.stderr for r in results]
    a, b = appendix_files(first), appendix_files(second)
    assert set(a) == {Path(p).name for p in appendix_outputs().values()}
    assert a == b  # same machine, same environment: every byte, the manifest included


def test_manifest_lists_every_artifact_with_its_size_and_hash(two_runs):
    out = two_runs[0][0]
    manifest = yaml.safe_load((out / "appendix" / "manifest.json").read_text(encoding="utf-8"))
    on_disk = set()
    for folder in ARTIFACT_FOLDERS:  # walked here with os.walk, independently of the stage's rglob
        for here, _, names in os.walk(out / folder):
            on_disk |= {(Path(here) / n).relative_to(out).as_posix() for n in names if not n.startswith(".")}
    listed = {entry["path"]: entry for entry in manifest["files"]}
    assert set(listed) == on_disk
    assert "report/report.html" in listed and "report/summary.json" in listed
    assert [e["path"] for e in manifest["files"]] == sorted(listed)
    for path, entry in listed.items():  # sizes from the operating system, hashes from hashlib
        assert entry["bytes"] == (out / path).stat().st_size
        assert entry["sha256"] == hashlib.sha256((out / path).read_bytes()).hexdigest()
    assert not any(p.startswith(("appendix/", "logs/", "benchmarks/")) for p in listed)


def test_artifact_folders_are_the_folders_the_rules_write():
    written = set()
    for rule in (REPOSITORY / "rules").glob("*.smk"):
        written |= set(re.findall(r'results\("([a-z_]+)/', rule.read_text(encoding="utf-8")))
    written |= {path.split("/")[0] for path in appendix_outputs().values()}
    assert written == {*ARTIFACT_FOLDERS, "appendix"}


def test_no_absolute_path_host_name_or_time_in_the_appendix(two_runs):
    out = two_runs[0][0]
    host = socket.gethostname()
    for name, data in appendix_files(out).items():
        text = data.decode("utf-8")
        assert str(out) not in text and str(REPOSITORY) not in text and "/tmp/" not in text, name
        assert len(host) < 4 or host not in text, name
        assert not re.search(r"\b20\d\d-\d\d-\d\d[T ]\d\d:\d\d", text), name  # no ISO date-time stamp


def test_resolved_protocol_fills_defaults_and_its_hash_checks_with_sha256sum(two_runs, study):
    out = two_runs[0][0]
    folder = out / "appendix"
    resolved = yaml.safe_load((folder / "protocol.resolved.yaml").read_text(encoding="utf-8"))
    original = yaml.safe_load(study.read_text(encoding="utf-8"))
    assert Protocol.model_validate(resolved) == load_protocol(study).protocol  # the same protocol, defaults written
    assert set(resolved) == set(Protocol.model_fields) and set(resolved) > set(original)
    assert (folder / "protocol.yaml").read_bytes() == study.read_bytes()
    if shutil.which("sha256sum") is None:
        pytest.skip("sha256sum (GNU coreutils) not installed")
    check = subprocess.run(["sha256sum", "-c", "protocol.resolved.yaml.sha256"], cwd=folder, capture_output=True)
    assert check.returncode == 0, check.stdout + check.stderr


def test_seeds_record_the_streams_numpy_derives(two_runs, study):
    seeds = yaml.safe_load((two_runs[0][0] / "appendix" / "seeds.json").read_text(encoding="utf-8"))
    root = load_protocol(study).protocol.seed
    assert seeds["root_seed"] == root
    for entry in seeds["streams"]:
        if not entry["index"]:  # recomputed with numpy's SeedSequence directly, as the rule in the file says
            words = np.random.SeedSequence(root, spawn_key=(entry["number"],)).generate_state(2)
            assert entry["first_state_words"] == [int(w) for w in words]
    numbers = [e["number"] for e in seeds["streams"]]
    assert len(set(numbers)) == len(numbers) and not set(numbers) & set(seeds["retired_numbers"])


def test_environment_names_the_installed_software(two_runs):
    env = yaml.safe_load((two_runs[0][0] / "appendix" / "environment.json").read_text(encoding="utf-8"))
    for name in ("numpy", "scipy", "pandas", "snakemake"):
        assert env["distributions"][name] == metadata.version(name)
    assert any(lib["user_api"] == "blas" for lib in env["thread_libraries"])
    package = Path(__import__("regimewise").__file__).parent
    if shutil.which("sha256sum") is None:
        pytest.skip("sha256sum (GNU coreutils) not installed")
    # the documented recomputation: sha256sum of every file (sorted by path), then sha256sum of that listing
    listing = subprocess.run(
        "find . -type f ! -path '*/__pycache__/*' ! -name '*.pyc' | sed 's|^\\./||' | LC_ALL=C sort "
        "| xargs sha256sum | sha256sum",
        shell=True,
        cwd=package,
        capture_output=True,
        text=True,
        check=True,
    )
    assert env["regimewise"]["source_sha256"] == listing.stdout.split()[0]
    if env["git"] is not None:
        head = subprocess.run(["git", "rev-parse", "HEAD"], cwd=REPOSITORY, capture_output=True, text=True)
        assert env["git"]["commit"] == head.stdout.strip()


def test_commands_record_what_was_run_and_what_reproduces_it(two_runs):
    out = two_runs[0][0]
    lines = (out / "appendix" / "commands.txt").read_text(encoding="utf-8").splitlines()
    commands = [line for line in lines if not line.startswith("#")]
    assert commands == [
        "regimewise run .../protocol.yaml --out .../out --cores 2",  # tests/conftest.py's command, paths shortened
        "regimewise run protocol.yaml",
        "regimewise verify RESULTS_DIR",
    ]
    provenance = yaml.safe_load((out / "report" / "appendix" / "provenance.json").read_text(encoding="utf-8"))
    assert provenance["commands"] == ["regimewise run protocol.yaml", "regimewise verify RESULTS_DIR"]


def test_the_demo_records_regimewise_demo(tmp_path):
    args = build_parser().parse_args(["demo"])
    args.argv = ["demo"]
    record = _command_record(args, demo=True)
    assert record == {"command": "regimewise demo", "reproduce": "regimewise demo"}
    config = yaml.safe_load(_write_workflow_config(tmp_path, Path("p.yaml"), record).read_text(encoding="utf-8"))
    assert (config["command"], config["reproduce"]) == ("regimewise demo", "regimewise demo")


@pytest.mark.parametrize(
    ("argv", "shown"),
    [
        (["demo"], "regimewise demo"),
        (["run", "/work/study/p.yaml", "--out", "/work/res"], "regimewise run study/p.yaml --out res"),
        (["run", "/elsewhere/p.yaml", "--out=/elsewhere/r"], "regimewise run .../p.yaml --out=.../r"),
        (["run", "my protocol.yaml"], "regimewise run 'my protocol.yaml'"),
    ],
)
def test_shown_command_keeps_relative_paths_and_hides_absolute_ones(argv, shown):
    assert shown_command(argv, Path("/work")) == shown


def test_report_links_every_appendix_file(two_runs):
    out = two_runs[0][0]
    html = (out / "report" / "report.html").read_text(encoding="utf-8")
    links = re.findall(r'href="\.\./(appendix/[^"]+)"', html)
    assert {"appendix/manifest.json", "appendix/environment.json", "appendix/commands.txt"} <= set(links)
    for link in links:
        assert (out / link).is_file(), link


def test_software_fingerprint_follows_every_source_file(tmp_path):
    from regimewise.appendix.environment import PACKAGE_DIR, software_fingerprint

    copy = tmp_path / "pipeline" / "regimewise"
    shutil.copytree(PACKAGE_DIR, copy, ignore=shutil.ignore_patterns("__pycache__"))
    before = software_fingerprint(copy)
    assert software_fingerprint(copy) == before
    cli = copy / "cli.py"  # a module no stage imports: stage fingerprints miss it, this one must not
    cli.write_text(cli.read_text(encoding="utf-8") + "\n# edited\n", encoding="utf-8")
    assert software_fingerprint(copy) != before
