"""What the Snakemake rules need at parse time: the validated settings of a run.

The Snakefile calls :func:`load_settings` once; a malformed protocol stops the workflow before any job runs.
Each rule's code fingerprint comes from :mod:`regimewise.workflow.fingerprint`.

Snakemake reads ``{name}`` in any input path as a wildcard, with no escape, so a protocol or records file whose
path has a brace is named in the rules by a stand-in (:func:`stand_in`) and the stages read the real path back
(:func:`real_input`).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

from regimewise.errors import UserInputError
from regimewise.io import require_file, write_text
from regimewise.protocol.loading import load_protocol
from regimewise.protocol.model import sweep_specifications

# Where the stand-ins live, relative to the working directory (the results folder of `regimewise run`).
STAND_INS = Path(".snakemake") / "regimewise" / "inputs"


@dataclass(frozen=True)
class Settings:
    """Paths the rules use: the protocol, the records it names, and where results, logs and benchmarks go.

    ``command`` is the command line that started the run and ``reproduce`` the one that reruns it, as the
    regimewise command line hands them over (config keys ``command`` and ``reproduce``; empty when Snakemake was
    started directly). Only the report (``reproduce``) and the appendix (both) record them.

    ``stand_ins`` maps a protocol or records path that has a brace to the stand-in the rules name instead.

    ``learned_regime_table``: which temporary table of the regime stage holds the regime the evaluation scores,
    ``"crossfit"`` (the cross-fitted fold regimes), ``"fitted"`` (one fold: the regime learned on all records) or
    None (no regime is learned).
    """

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
    selfcheck_cohorts: int = 0
    selfcheck_replicates: int = 0
    selfcheck_reference_decisions: int = 0  # at most: reference_episodes × horizon (the summary job's reference rule)
    survival: bool = False
    learned_regime_table: str | None = "crossfit"  # the regime stage's temporary table the evaluation scores
    command: str = ""
    reproduce: str = ""
    stand_ins: dict[str, str] = field(default_factory=dict)

    def rule_input(self, path: str) -> str:
        """``path`` as a rule's input names it: itself, or its stand-in."""
        return self.stand_ins.get(path, path)

    @property
    def protocol_input(self) -> str:
        return self.rule_input(self.protocol)

    @property
    def replicates_per_shard(self) -> int:
        """Most bootstrap replicates any one shard job runs (for its resource request)."""
        return -(-self.bootstrap_replicates // max(self.bootstrap_shards, 1))

    @property
    def record_inputs(self) -> dict:
        inputs = {"protocol": self.protocol_input, "decisions_file": self.rule_input(self.decisions_file)}
        if self.episodes_file is not None:
            inputs["episodes_file"] = self.rule_input(self.episodes_file)
        return inputs


def load_settings(config: dict) -> Settings:
    """Validate the workflow config and the protocol it names (relative paths from the working directory)."""
    missing = [key for key in ("protocol", "results", "logs", "benchmarks") if not config.get(key)]
    if missing:
        raise UserInputError(f"workflow config lacks {missing}; see config/workflow.yaml")
    pf = load_protocol(config["protocol"])
    episodes = pf.episodes_path
    files = {"protocol": pf.path, "decisions": pf.decisions_path, "episodes": episodes}
    braced = {what: path for what, path in files.items() if path is not None and ("{" in str(path) or "}" in str(path))}
    return Settings(
        protocol=str(pf.path),
        results=str(config["results"]).rstrip("/"),
        logs=str(config["logs"]).rstrip("/"),
        benchmarks=str(config["benchmarks"]).rstrip("/"),
        decisions_file=str(pf.decisions_path),
        episodes_file=None if episodes is None else str(episodes),
        bootstrap_shards=pf.protocol.evaluation.shards if pf.protocol.evaluation.replicates else 0,
        sweep_specs=tuple(spec.id for spec in sweep_specifications(pf.protocol)),
        survival=pf.protocol.survival is not None,
        learned_regime_table=(
            None
            if not pf.protocol.analysis.learn_regime
            else "crossfit"
            if pf.protocol.evaluation.cross_fit_folds > 1
            else "fitted"
        ),
        bootstrap_replicates=pf.protocol.evaluation.replicates,
        sweep_replicates=0 if pf.protocol.sweeps is None else pf.protocol.sweeps.replicates,
        selfcheck_cohorts=0 if pf.protocol.selfcheck is None else pf.protocol.selfcheck.cohorts,
        selfcheck_replicates=0 if pf.protocol.selfcheck is None else pf.protocol.selfcheck.replicates,
        selfcheck_reference_decisions=0
        if pf.protocol.selfcheck is None
        else pf.protocol.selfcheck.reference_episodes * pf.protocol.horizon,
        command=str(config.get("command") or ""),
        reproduce=str(config.get("reproduce") or ""),
        stand_ins={str(path): stand_in(path, what) for what, path in braced.items()},
    )


def stand_in(path: Path, what: str) -> str:
    """A brace-free file the rules name instead of ``path``, written under :data:`STAND_INS` when it changes.

    It holds the real path, size and modification time (nothing of the file's content), so it changes, and
    Snakemake reruns, whenever the real file is rewritten or touched; its name ends in a hash of the real path,
    so pointing the protocol at another file counts as a changed input too.
    """
    if what != "protocol":
        require_file(path, what)
    status = path.stat()
    digest = hashlib.sha256(str(path).encode("utf-8")).hexdigest()[:16]
    target = STAND_INS / f"{what}-{digest}.json"
    stamp = {"path": str(path), "size": status.st_size, "mtime_ns": status.st_mtime_ns}
    text = json.dumps(stamp, ensure_ascii=False, sort_keys=True) + "\n"
    if not target.is_file() or target.read_text(encoding="utf-8") != text:
        write_text(target, text)
    return str(target)


def real_input(path: str) -> str:
    """The file a rule's input stands for: the path itself, or the real path a stand-in holds."""
    if not isinstance(path, str) or Path(path).parent != STAND_INS:
        return path
    return json.loads(Path(path).read_text(encoding="utf-8"))["path"]
