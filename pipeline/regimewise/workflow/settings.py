"""What the Snakemake rules need at parse time: the validated settings of a run.

The Snakefile calls :func:`load_settings` once; a malformed protocol stops the workflow before any job runs.
Each rule's code fingerprint comes from :mod:`regimewise.workflow.fingerprint`.
"""

from __future__ import annotations

from dataclasses import dataclass

from regimewise.errors import UserInputError
from regimewise.protocol.loading import load_protocol
from regimewise.protocol.model import sweep_specifications


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
    bootstrap_replicates: int = 0
    sweep_replicates: int = 0
    survival: bool = False

    @property
    def replicates_per_shard(self) -> int:
        """Most bootstrap replicates any one shard job runs (for its resource request)."""
        return -(-self.bootstrap_replicates // self.bootstrap_shards)

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
        survival=pf.protocol.survival is not None,
        bootstrap_replicates=pf.protocol.evaluation.replicates,
        sweep_replicates=0 if pf.protocol.sweeps is None else pf.protocol.sweeps.replicates,
    )
