"""What the Snakemake rules need at parse time: validated settings and a code fingerprint per stage.

The Snakefile calls :func:`load_settings` once; a malformed protocol stops the workflow before any job runs.
:func:`stage_code_hash` goes into each rule's ``params`` so that editing a stage's module reruns that stage
(Snakemake does not track modules imported by a script).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

from . import __version__
from .errors import UserInputError
from .protocol import load_protocol, sweep_specifications

PACKAGE_DIR = Path(__file__).resolve().parent

# Modules whose source determines each stage's output (besides errors/io/protocol, shared by all).
STAGE_MODULES = {
    "validate": ("validate.py", "deidentify.py", "missing.py"),
    "behaviour": ("behaviour.py", "features.py", "missing.py", "overlap.py", "regime.py", "weighting.py"),
    "describe": ("describe.py", "overlap.py", "behaviour.py", "features.py", "missing.py", "weighting.py"),
    "regime": ("fqi.py", "features.py", "missing.py", "regime.py", "clinical_rules.py", "distill.py", "pessimism.py"),
    "evaluate": ("ope.py", "fqi.py", "features.py", "missing.py", "evaluate.py", "pessimism.py"),
    "sensitivity": ("sensitivity.py", "features.py", "missing.py"),
    "report": ("report.py", "provenance.py", "describe.py", "overlap.py", "templates/report.html",
               "templates/sections/*.html"),
}
# A bootstrap replicate refits usual care and the regime and evaluates every regime: all of their modules count.
STAGE_MODULES["bootstrap"] = tuple(
    sorted({"bootstrap.py", *STAGE_MODULES["behaviour"], *STAGE_MODULES["regime"], *STAGE_MODULES["evaluate"]})
)
# A specification reruns the bootstrap's refits under other settings and bounds each one's value.
STAGE_MODULES["sweep"] = tuple(sorted({"sweep.py", *STAGE_MODULES["bootstrap"], *STAGE_MODULES["sensitivity"]}))
SHARED_MODULES = ("errors.py", "io.py", "protocol.py", "stages.py")


@dataclass(frozen=True)
class Settings:
    """Paths the rules use: the protocol, the records it names, and where results, logs and benchmarks go."""

    protocol: str
    results: str
    logs: str
    benchmarks: str
    decisions_file: str
    episodes_file: str | None
    bootstrap_shards: int = 1
    sweep_specs: tuple[str, ...] = ()

    @property
    def record_inputs(self) -> dict:
        inputs = {"protocol": self.protocol, "decisions_file": self.decisions_file}
        if self.episodes_file is not None:
            inputs["episodes_file"] = self.episodes_file
        return inputs


def load_settings(config: dict) -> Settings:
    """Validate the workflow config and the protocol it names (relative paths from the working directory)."""
    missing = [key for key in ("protocol", "results", "logs", "benchmarks") if not config.get(key)]
    if missing:
        raise UserInputError(f"workflow config lacks {missing}; see config/workflow.yaml")
    pf = load_protocol(config["protocol"])
    episodes = pf.episodes_path
    return Settings(
        protocol=str(pf.path),
        results=str(config["results"]).rstrip("/"),
        logs=str(config["logs"]).rstrip("/"),
        benchmarks=str(config["benchmarks"]).rstrip("/"),
        decisions_file=str(pf.decisions_path),
        episodes_file=None if episodes is None else str(episodes),
        bootstrap_shards=pf.protocol.evaluation.shards,
        sweep_specs=tuple(spec.id for spec in sweep_specifications(pf.protocol)),
    )


def stage_code_hash(stage: str) -> str:
    """SHA-256 (first 16 hex digits) of the package version and the source of the stage's modules."""
    digest = hashlib.sha256(__version__.encode())
    patterns = sorted(set(STAGE_MODULES[stage]) | set(SHARED_MODULES))
    for path in sorted(p for pattern in patterns for p in PACKAGE_DIR.glob(pattern)):
        digest.update(path.relative_to(PACKAGE_DIR).as_posix().encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()[:16]
