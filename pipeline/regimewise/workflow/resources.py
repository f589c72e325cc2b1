"""Resource requests of each workflow rule (memory, run time, threads), scaled by the number of decisions.

A scheduler (SLURM through Snakemake's executor, or ``--resources mem_mb=...`` locally) needs honest requests:
too little memory kills a job, too much keeps it queued. Each rule's peak resident memory and run time grow
about linearly with the decisions in the records (measured by ``bench/bench_scale.py`` at 100k and 1M
episodes of 12 decisions; figures in ``bench/RESULTS.md``), so a request is ``base + slope × millions of
decisions``, with a safety factor, doubled on each retry (Snakemake's ``attempt``).

On one machine, ``regimewise run`` and ``demo`` hand Snakemake ``--resources mem_mb=`` with the memory this
process may use (:func:`machine_memory_mb`, or ``--memory``): Snakemake then starts a job only when its request
fits beside the running jobs' requests, so two heavy stages of a large cohort do not run together and exhaust the
machine, and a job asking for more than the whole is given the whole (Snakemake 9 lowers such a request to the
limit; it runs alone).

The number of decisions is the ``rows_kept`` of ``validate/validation.json`` once validation has run (Snakemake
re-evaluates resource functions just before it schedules a job); before that (the validate rule itself, or a
dry run), it is estimated from the records file's size, erring high.

Threads (:data:`STAGE_THREADS`): every rule runs one process, and BLAS is held to one thread in every stage
(:func:`regimewise.workflow.stages.run_snakemake_job`), so the numbers never depend on the cores. Every rule but
the report asks for one thread (:data:`STAGE_THREADS` says why; the regime and evaluate stages can run their
independent fits on two threads of their process, :mod:`regimewise.core.concurrency`, when a rule asks for them;
the report, alone at the end, draws its figures in two processes). Bootstrap shards are
separate jobs; ``behaviour_diagnostics`` (behaviour.json) runs beside the jobs after ``behaviour``; the
``crossfit`` rule (the cross-fitted fold regimes) runs beside ``behaviour`` and ``regime_fit``
(the side-by-side regimes; the ``regime`` rule joins the two), ``evaluate_fixed`` (the values of usual care, the
fixed strategies and the comparators) beside ``regime_fit``, ``evaluate_learned`` (the cross-fitted regime and its
strategies) as soon as ``crossfit`` ends and ``evaluate_side`` (the side-by-side regimes) as soon as ``regime_fit``
ends, and ``sensitivity_curves`` (the bounds curves) needs only the regime stage's table, so it runs beside
``describe`` and ``survival`` without waiting for the bootstrap; one ``combine`` job then joins the evaluate jobs'
parts into values.json, the shards into the bootstrap intervals and the curves into sensitivity.json. Snakemake
gives a rule no more threads than ``--cores``.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True)
class StageCost:
    """Peak memory (MB) and run time (minutes) of a rule: ``base + per_million × decisions / 10**6``.

    ``per_replicate_minutes`` and ``per_replicate_mb`` apply per bootstrap replicate run in the job
    (bootstrap and sweep shards), per million decisions.
    """

    base_mb: float
    mb_per_million: float
    minutes_per_million: float
    per_replicate_minutes: float = 0.0


# Interpreter and libraries: about 300 MB before any data (measured: the bootstrap combine stage peaks there).
BASE_MB = 400.0

# Slopes from bench/bench_scale.py at 1,000,000 episodes x 12 decisions (12M decisions), the whole workflow on
# 2 cores: peak RSS above the interpreter's 300 MB, and CPU time, per million decisions, rounded up to 100 MB and
# 0.1 minute (bench/RESULTS.md, 2026-12-04, at fd68800: every rule on one thread, large arrays kept on the heap;
# peaks regime_fit 7.7 GB, behaviour 6.9, crossfit 6.9, evaluate_learned 6.3, survival 6.0, evaluate_side 5.9,
# evaluate_fixed 5.6, behaviour_diagnostics 4.8, regime 4.2, sensitivity_curves 4.1, validate 3.7, describe
# 3.6 GB); rules measured lower keep the figures of earlier runs. Times: the larger of that run's and of the run
# at 63f4457 (2026-12-05) on a machine of the same size whose jobs took 2.1-3.8 times the CPU (behaviour 0.4,
# crossfit 0.5, regime_fit 0.3 and survival 0.2 minutes per million decisions come from the slower one). A
# shard's per-replicate time is at most that of the model-fitting stages together (behaviour, crossfit,
# regime_fit and the evaluate jobs: about 0.9 CPU minutes per million decisions at 1M at fd68800, 1.4
# on the slower); shards were not measured at 1M, so theirs keep a wide margin (at 100k on the slower machine,
# 0.7 minutes per replicate per million decisions).
STAGE_COSTS = {
    "validate": StageCost(BASE_MB, 400.0, 0.2),
    "behaviour": StageCost(BASE_MB, 600.0, 0.4),
    "behaviour_diagnostics": StageCost(BASE_MB, 400.0, 0.1),
    "crossfit": StageCost(BASE_MB, 600.0, 0.5),
    "regime_fit": StageCost(BASE_MB, 700.0, 0.3),
    "regime": StageCost(BASE_MB, 400.0, 0.1),
    "evaluate_fixed": StageCost(BASE_MB, 500.0, 0.1),
    "evaluate_learned": StageCost(BASE_MB, 600.0, 0.2),
    "evaluate_side": StageCost(BASE_MB, 500.0, 0.1),
    "describe": StageCost(BASE_MB, 400.0, 0.1),
    "bootstrap_shard": StageCost(BASE_MB, 1600.0, 0.1, per_replicate_minutes=2.5),
    "sensitivity_curves": StageCost(BASE_MB, 400.0, 0.1),
    "combine": StageCost(BASE_MB, 0.0, 0.0),  # joins JSON files
    "survival": StageCost(BASE_MB, 500.0, 0.2),
    "sweep_spec": StageCost(BASE_MB, 1600.0, 2.5, per_replicate_minutes=2.5),
    "sweep": StageCost(BASE_MB, 0.0, 0.0),
    # not measured at scale: a cohort job simulates a cohort of the records' size and analyses it like a shard
    "selfcheck_cohort": StageCost(BASE_MB, 1600.0, 2.5, per_replicate_minutes=2.5),
    "selfcheck": StageCost(BASE_MB, 600.0, 0.5),
    "report": StageCost(BASE_MB, 0.0, 0.0),
    # not measured at scale: reads each artifact once to hash it (a few seconds per GB), holds none in memory
    "appendix": StageCost(BASE_MB, 0.0, 0.1),
}

# Threads each rule asks for (1 where not listed). The regime and evaluate stages can run their independent fits on
# two threads (their functions' ``threads``), and did until the crossfit and sensitivity_curves rules were split
# off; now a second core is better spent on the jobs that can run beside them (behaviour beside crossfit;
# sensitivity_curves, survival and describe beside evaluate), and at 1M episodes x 12 two concurrent fits held
# about 1.6 GB more than one, taking the regime stage above 8 GB (bench/RESULTS.md). The report runs alone at the
# end of every run, so its figures are drawn in two processes (a few MB each; the same bytes).
STAGE_THREADS: dict[str, int] = {"report": 2}


def stage_threads(rule: str) -> int:
    """Threads to request for ``rule`` (:data:`STAGE_THREADS`; 1 for the others).

    >>> stage_threads("evaluate_learned"), stage_threads("regime"), stage_threads("report")
    (1, 1, 2)
    """
    if rule not in STAGE_COSTS:
        raise KeyError(f"no resource figures for rule {rule!r}")
    return STAGE_THREADS.get(rule, 1)


SAFETY = 1.5  # margin over the measured peak and time (machines and data differ)
MIN_RUNTIME_MINUTES = 5  # schedulers round short requests up anyway; keeps start-up time covered

# Bytes per decision in a records file, low ends (so the estimate errs high): Parquet compresses the repeated
# identifiers; CSV spends about 60 bytes per row on the demo's 14 columns.
BYTES_PER_DECISION = {".parquet": 6.0, ".pq": 6.0}
CSV_BYTES_PER_DECISION = 40.0


def recorded_decisions(validation: str | Path, records: str | Path) -> int:
    """Decisions kept by validation (``rows_kept`` of validation.json), or estimated from the records file size.

    Returns 0 when neither file exists yet (a dry run before the records are in place).
    """
    validation = Path(validation)
    if validation.is_file():
        try:
            return int(json.loads(validation.read_text(encoding="utf-8"))["rows_kept"])
        except (ValueError, KeyError, TypeError):
            pass  # an unreadable summary: fall back to the records' size
    records = Path(records)
    if not records.is_file():
        return 0
    per_decision = BYTES_PER_DECISION.get(records.suffix.lower(), CSV_BYTES_PER_DECISION)
    return int(records.stat().st_size / per_decision)


def stage_resources(rule: str, decisions: int, replicates: int = 0, attempt: int = 1) -> dict:
    """``mem_mb`` and ``runtime`` (minutes) to request for ``rule`` on ``decisions`` decisions.

    Parameters
    ----------
    rule : str, a key of :data:`STAGE_COSTS`.
    decisions : int, decisions in the records (:func:`recorded_decisions`).
    replicates : int, bootstrap replicates run in this job (shards only).
    attempt : int, Snakemake's attempt number; each retry doubles both requests.

    Examples
    --------
    >>> stage_resources("regime_fit", 12_000_000)
    {'mem_mb': 13200, 'runtime': 6}
    """
    cost = STAGE_COSTS[rule]
    millions = decisions / 1e6
    scale = SAFETY * 2 ** (max(attempt, 1) - 1)
    memory = (cost.base_mb + cost.mb_per_million * millions) * scale
    minutes = (cost.minutes_per_million + cost.per_replicate_minutes * replicates) * millions * scale
    return {"mem_mb": int(math.ceil(memory / 100) * 100), "runtime": max(MIN_RUNTIME_MINUTES, int(math.ceil(minutes)))}


# Control groups (containers, batch-system job slots, systemd scopes) can hold a process to less memory than the
# machine has. Version 2 writes a group's limit in memory.max ("max": none); version 1 in the memory controller's
# memory.limit_in_bytes (a number beyond the machine: none). A group's ancestors limit it too.
CGROUP_ROOT = Path("/sys/fs/cgroup")
PROC_CGROUP = Path("/proc/self/cgroup")


def cgroup_limit_files(proc_cgroup: Path = PROC_CGROUP, root: Path = CGROUP_ROOT) -> list[Path]:
    """The files that may hold a memory limit of this process's control groups, from ``/proc/self/cgroup``: the
    group of each hierarchy (version 2 ``0::PATH``, version 1 ``N:memory:PATH``) and every ancestor of it. Files
    that do not exist are listed too (the caller skips them); none when ``proc_cgroup`` cannot be read."""
    try:
        lines = Path(proc_cgroup).read_text(encoding="ascii").splitlines()
    except OSError:
        return []
    files = []
    for line in lines:
        _, controllers, path = line.split(":", 2) if line.count(":") >= 2 else ("", "", "")
        groups = [Path(path.lstrip("/")), *Path(path.lstrip("/")).parents] if path.startswith("/") else []
        if controllers == "":  # version 2 (also mounted at unified/ on hybrid systems)
            files += [base / g / "memory.max" for g in groups for base in (root, root / "unified")]
        elif "memory" in controllers.split(","):
            files += [root / "memory" / g / "memory.limit_in_bytes" for g in groups]
    return files


def machine_memory_mb(limits=None) -> int | None:
    """Memory this process may use, in MB: the machine's physical memory, or the lowest limit of its control
    groups when that is lower (a container, a batch-system job slot). ``limits``: the files to read for group
    limits (default :func:`cgroup_limit_files`). None when the system reports neither (then no limit is set).
    """
    found = []
    try:
        found.append(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, ValueError, OSError):
        pass  # a system without sysconf (Windows) or without these names
    for path in cgroup_limit_files() if limits is None else limits:
        try:
            found.append(int(Path(path).read_text(encoding="ascii").strip()))
        except (OSError, ValueError):
            pass  # no such file, or "max": no limit there
    found = [value for value in found if value > 0]
    return min(found) // 10**6 if found else None
