"""Shared fixtures."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from contextlib import contextmanager
from pathlib import Path

import pytest
from hypothesis import settings
from support.cli import run_cli
from support.tiny import write_tiny

try:  # POSIX; without it each pytest-xdist worker builds the shared fixtures itself
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None

# CI runs property-based tests with a fixed seed so a result can be reproduced; local runs keep exploring.
settings.register_profile("ci", derandomize=True)
if os.environ.get("CI"):
    settings.load_profile("ci")


@pytest.fixture
def tiny(tmp_path) -> Path:
    return write_tiny(tmp_path / "study")


# ---------------------------------------------------------------------------------------------- one shared run
@contextmanager
def _exclusive(lock: Path):
    """Hold an exclusive lock on the file ``lock`` (POSIX ``flock``; elsewhere no lock is needed, see below)."""
    with open(lock, "a+b") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


def _built_once(tmp_path_factory, name: str, build) -> Path:
    """A folder that ``build(folder)`` fills once per test session, shared by every pytest-xdist worker.

    pytest builds a session fixture once per worker process; the workers of one session share the parent of their
    base temporary folders, so the first worker builds there under a lock and the others wait and reuse it (the
    pattern of pytest-xdist's documentation, "Making session-scoped fixtures execute only once"). Without workers,
    or without ``fcntl``, each process builds its own.
    """
    if os.environ.get("PYTEST_XDIST_WORKER") is None or fcntl is None:
        folder = tmp_path_factory.mktemp(name)
        build(folder)
        return folder
    folder = tmp_path_factory.getbasetemp().parent / name
    with _exclusive(folder.with_name(f"{name}.lock")):
        done = folder / ".built"
        if not done.exists():
            shutil.rmtree(folder, ignore_errors=True)  # a worker that failed half-way leaves nothing usable
            folder.mkdir()
            build(folder)
            done.touch()
    return folder


def _write_study(folder: Path) -> None:
    import yaml
    from support.tiny import REPOSITORY

    from regimewise.demo.files import write_cohort

    write_cohort(folder / "data", n_episodes=400, seed=5, confounding_strength=1.0, n_truth=1000)
    protocol = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    protocol["data"]["decisions"] = "data/decisions.csv"
    protocol["data"]["episodes"] = "data/episodes.csv"
    protocol["evaluation"].update(replicates=20, shards=2)  # the demo's 200 replicates are for the demo only
    (folder / "protocol.yaml").write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")


@pytest.fixture(scope="session")
def study(tmp_path_factory) -> Path:
    """A copy of the demo protocol pointing at a small simulated cohort (400 episodes, 20 replicates).

    One per worker, under the worker's own temporary folder (tests write protocols beside their own data that
    point at these records, and a protocol's data root must hold both); every copy is byte-identical.
    """
    folder = tmp_path_factory.mktemp("study")
    _write_study(folder)
    return folder / "protocol.yaml"


@pytest.fixture(scope="session")
def two_runs(study, tmp_path_factory):
    """Two full workflow runs of ``study`` into separate folders (the report tests read the first), and the
    completed ``regimewise run`` processes. Built once for all workers, from the ``study`` of the worker that
    builds them (the others' copies are byte-identical). Tests read these folders and copy them before changing
    anything."""

    def run_twice(folder: Path) -> None:
        results = [run_cli("run", study, "--out", folder / f"run{k}" / "out", "--cores", 2) for k in range(2)]
        kept = [{"args": r.args, "returncode": r.returncode, "stdout": r.stdout, "stderr": r.stderr} for r in results]
        (folder / "results.json").write_text(json.dumps(kept), encoding="utf-8")

    folder = _built_once(tmp_path_factory, "two_runs", run_twice)
    results = json.loads((folder / "results.json").read_text(encoding="utf-8"))
    return [folder / f"run{k}" / "out" for k in range(2)], [subprocess.CompletedProcess(**r) for r in results]
