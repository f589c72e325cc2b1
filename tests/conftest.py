"""Shared fixtures."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from hypothesis import settings
from support.cli import run_cli
from support.tiny import write_tiny

# CI runs property-based tests with a fixed seed so a result can be reproduced; local runs keep exploring.
settings.register_profile("ci", derandomize=True)
if os.environ.get("CI"):
    settings.load_profile("ci")


@pytest.fixture
def tiny(tmp_path) -> Path:
    return write_tiny(tmp_path / "study")


# ---------------------------------------------------------------------------------------------- one shared run
@pytest.fixture(scope="session")
def study(tmp_path_factory) -> Path:
    """A copy of the demo protocol pointing at a small simulated cohort (400 episodes, 20 replicates)."""
    import yaml
    from support.tiny import REPOSITORY

    from regimewise.demo.files import write_cohort

    folder = tmp_path_factory.mktemp("study")
    write_cohort(folder / "data", n_episodes=400, seed=5, confounding_strength=1.0, n_truth=1000)
    protocol = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    protocol["data"]["decisions"] = "data/decisions.csv"
    protocol["data"]["episodes"] = "data/episodes.csv"
    protocol["evaluation"].update(replicates=20, shards=2)  # the demo's 200 replicates are for the demo only
    (folder / "protocol.yaml").write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return folder / "protocol.yaml"


@pytest.fixture(scope="session")
def two_runs(study, tmp_path_factory):
    """Two full workflow runs of ``study`` into separate folders (the report tests read the first)."""
    outs = [tmp_path_factory.mktemp("run") / "out" for _ in range(2)]
    results = [run_cli("run", study, "--out", out, "--cores", 2) for out in outs]
    return outs, results
