"""Provenance for the appendix: input hashes, protocol hash, package versions, seed and the commands to rerun.

Nothing here reads the clock or the machine's name, so the same inputs and environment give the same bytes.
"""

from __future__ import annotations

import platform
from importlib import metadata
from pathlib import Path

from regimewise import __version__
from regimewise.io import sha256_file
from regimewise.protocol.loading import ProtocolFile

PACKAGES = (
    "numpy",
    "pandas",
    "scipy",
    "statsmodels",
    "scikit-learn",
    "lifelines",
    "pydantic",
    "snakemake",
    "pyarrow",
    "matplotlib",
    "jinja2",
    "pyyaml",
)


def package_versions() -> dict[str, str]:
    versions = {"python": platform.python_version(), "regimewise": __version__}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def build_provenance(pf: ProtocolFile, reproduce: str = "") -> dict:
    """Everything needed to check that a rerun used the same inputs, settings and software.

    ``reproduce`` is the command that reruns the analysis, as the command line recorded it (``regimewise demo``,
    ``regimewise run protocol.yaml``); empty when Snakemake was started directly.
    """
    inputs = {"decisions": _describe(pf.decisions_path)}
    if pf.episodes_path is not None:
        inputs["episodes"] = _describe(pf.episodes_path)
    return {
        "protocol": {"file": pf.path.name, "sha256": pf.sha256, "version": pf.protocol.study.version},
        "inputs": inputs,
        "root_seed": pf.protocol.seed,
        "acknowledged_columns": [
            {"column": a.column, "justification": a.justification} for a in pf.protocol.data.acknowledged_columns
        ],
        "packages": package_versions(),
        "commands": [
            reproduce or f"snakemake --cores 2 --config protocol={pf.path.name}",
            "regimewise verify RESULTS_DIR",
        ],
    }


def _describe(path: Path) -> dict:
    return {"file": path.name, "sha256": sha256_file(path), "bytes": path.stat().st_size}
