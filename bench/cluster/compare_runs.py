"""Check a SLURM run of the workflow against a local run: same artifacts to the byte, one SLURM job per job.

Used by ``run_slurm_demo.sh``; also runs on its own on two finished results folders::

    python bench/cluster/compare_runs.py --local L --slurm S --jobcomp JOBCOMP.txt --squeue-log POLL.txt

Three records of the SLURM jobs are read and must agree:

* the executor plugin's logs (``S/.snakemake/slurm_logs/rule_<rule>/<wildcards>/<job id>.log``, kept with
  ``--slurm-keep-successful-logs``): which SLURM job ran which workflow job;
* the controller's job-completion file (``JobCompType=jobcomp/filetxt``): every job the controller finished,
  its name (the workflow run's id), state and exit code — the cluster keeps no accounting database, so
  ``sacct`` has nothing to read;
* a ``squeue --states=all`` poll taken every 2 s during the run: each job's name, comment (the rule and its
  wildcards, as the plugin set it) and state.

Exits 1, listing the differences, when an artifact differs or a job is missing from a record.
"""

from __future__ import annotations

import argparse
import hashlib
import re
import sys
from collections import defaultdict
from pathlib import Path

# The stage folders of a results folder (README, "Outputs"); logs/, benchmarks/ and .snakemake/ hold timings,
# host-dependent paths and Snakemake metadata, not results.
STAGE_FOLDERS = tuple("validate behaviour regime evaluate describe bootstrap sensitivity survival sweep report".split())
SHARD_RULE = "bootstrap_shard"
JOBCOMP_FIELD = re.compile(r"(\w+)=(\S*)")


def sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def artifacts(root: Path) -> dict[str, str]:
    """SHA-256 of every file under the stage folders of a results folder, by path relative to it; hidden files
    (the memory-mapped copies of tables the later jobs read) are intermediates, not artifacts, as in the
    manifest."""
    found = {}
    for folder in STAGE_FOLDERS:
        for path in sorted((root / folder).rglob("*")):
            relative = path.relative_to(root)
            if path.is_file() and not any(part.startswith(".") for part in relative.parts):
                found[relative.as_posix()] = sha256(path)
    return found


def compare_artifacts(local: Path, slurm: Path) -> tuple[int, list[str]]:
    a, b = artifacts(local), artifacts(slurm)
    problems = [f"only in the local run: {p}" for p in sorted(a.keys() - b.keys())]
    problems += [f"only in the SLURM run: {p}" for p in sorted(b.keys() - a.keys())]
    problems += [f"differs: {p}" for p in sorted(a.keys() & b.keys()) if a[p] != b[p]]
    if not a:
        problems.append(f"no artifacts under {local}")
    return len(a.keys() & b.keys()), problems


def plugin_jobs(slurm: Path) -> list[tuple[str, str, str]]:
    """(rule, wildcards, SLURM job id) from the executor plugin's per-job logs."""
    jobs = []
    for log in sorted((slurm / ".snakemake" / "slurm_logs").rglob("*.log")):
        parts = log.relative_to(slurm / ".snakemake" / "slurm_logs").parts
        rule = parts[0].removeprefix("rule_")
        wildcards = "/".join(parts[1:-1])
        jobs.append((rule, wildcards, log.stem))
    return jobs


def jobcomp_records(path: Path) -> dict[str, dict[str, str]]:
    """The controller's job-completion lines by job id."""
    records = {}
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        fields = dict(JOBCOMP_FIELD.findall(line))
        if "JobId" in fields:
            records[fields["JobId"]] = fields
    return records


def squeue_records(path: Path) -> dict[str, dict[str, str]]:
    """Each job's name, comment and last state seen by the squeue poll."""
    records = {}
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        parts = line.strip().split("|")
        if len(parts) == 4 and parts[0].isdigit():
            records[parts[0]] = {"name": parts[1], "comment": parts[2], "state": parts[3]}
    return records


def benchmark_names(root: Path) -> set[str]:
    """One benchmark file per workflow job that ran (the aggregate rule ``all`` has none)."""
    return {p.stem for p in (root / "benchmarks").glob("*.tsv")}


def check_jobs(local: Path, slurm: Path, jobcomp: Path, squeue_log: Path) -> tuple[int, int, list[str]]:
    """Check every workflow job ran as its own completed SLURM job; returns (jobs, shard jobs, problems)."""
    problems = []
    jobs = plugin_jobs(slurm)
    ids = [job_id for _, _, job_id in jobs]
    expected = benchmark_names(local)
    if benchmark_names(slurm) != expected:
        problems.append(f"workflow jobs differ: local {sorted(expected)}, SLURM {sorted(benchmark_names(slurm))}")
    if len(jobs) != len(expected):
        problems.append(f"{len(jobs)} SLURM jobs for {len(expected)} workflow jobs (every job should be one)")
    if len(set(ids)) != len(ids):
        problems.append(f"a SLURM job id appears for more than one workflow job: {sorted(ids)}")
    completed = jobcomp_records(jobcomp)
    polled = squeue_records(squeue_log)
    names = {completed[i].get("Name") for i in ids if i in completed}
    if len(names) != 1:
        problems.append(f"the run's jobs should share one name (the workflow run id), found {sorted(names)}")
    run_jobs = [i for i, r in completed.items() if r.get("Name") in names]
    if sorted(run_jobs, key=int) != sorted(ids, key=int):
        problems.append(
            f"controller finished jobs {sorted(run_jobs, key=int)}, plugin logs name {sorted(ids, key=int)}"
        )
    for rule, wildcards, job_id in jobs:
        record = completed.get(job_id, {})
        if record.get("JobState") != "COMPLETED" or record.get("ExitCode") != "0:0":
            problems.append(f"job {job_id} ({rule} {wildcards}): controller record {record or 'missing'}")
        seen = polled.get(job_id)
        if seen is None or not seen["comment"].startswith(f"rule_{rule}"):
            problems.append(f"job {job_id} ({rule} {wildcards}): squeue saw {seen or 'nothing'}")
    shards = _check_shards(local, jobs, problems)
    return len(jobs), shards, problems


def _check_shards(local: Path, jobs: list[tuple[str, str, str]], problems: list[str]) -> int:
    """Every bootstrap shard of the run has exactly one SLURM job of its own."""
    expected = sorted(p.stem.removeprefix("shard_") for p in (local / "bootstrap" / "shards").glob("shard_*.json"))
    by_shard = defaultdict(list)
    for rule, wildcards, job_id in jobs:
        if rule == SHARD_RULE:
            by_shard[wildcards.removeprefix("shard=").removeprefix("shard_")].append(job_id)
    if sorted(by_shard) != expected:
        problems.append(f"shards with a SLURM job: {sorted(by_shard)}; shards of the run: {expected}")
    for shard, job_ids in sorted(by_shard.items()):
        if len(job_ids) != 1:
            problems.append(f"shard {shard} ran as SLURM jobs {job_ids} (expected exactly one)")
    all_ids = [i for ids in by_shard.values() for i in ids]
    if len(set(all_ids)) != len(all_ids):
        problems.append(f"shards share SLURM jobs: {dict(by_shard)}")
    own = {ids[0] for ids in by_shard.values() if len(ids) == 1 and all_ids.count(ids[0]) == 1}
    return len(own)  # shards that ran as one SLURM job of their own


def _job_line(rule: str, wildcards: str, job_id: str, record: dict[str, str]) -> str:
    """One SLURM job as the controller recorded it: state, CPUs, memory and time limit (from the profile)."""
    tres = dict(item.split("=", 1) for item in record.get("Tres", "").split(",") if "=" in item)
    return (
        f"  SLURM job {job_id:>4}  {f'{rule} {wildcards}'.strip():<19} {record.get('JobState', 'NOT RECORDED'):<10} "
        f"cpus={tres.get('cpu', '?')} mem={tres.get('mem', '?')} time_limit={record.get('TimeLimit', '?')} min"
    )


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--local", type=Path, required=True, help="results folder of the local run")
    parser.add_argument("--slurm", type=Path, required=True, help="results folder of the SLURM run")
    parser.add_argument("--jobcomp", type=Path, required=True, help="the controller's JobCompLoc file")
    parser.add_argument("--squeue-log", type=Path, required=True, help="the squeue poll taken during the run")
    args = parser.parse_args(argv)

    compared, problems = compare_artifacts(args.local, args.slurm)
    n_jobs, n_shards, job_problems = check_jobs(args.local, args.slurm, args.jobcomp, args.squeue_log)
    completed = jobcomp_records(args.jobcomp)
    for rule, wildcards, job_id in sorted(plugin_jobs(args.slurm), key=lambda job: int(job[2])):
        print(_job_line(rule, wildcards, job_id, completed.get(job_id, {})))
    for problem in problems + job_problems:
        print(f"  problem: {problem}", file=sys.stderr)
    if problems:
        print(f"SLURM run differs from local run: {len(problems)} problem(s) in {compared} artifacts compared")
    else:
        print(f"SLURM run identical to local run: {compared} artifacts compared")
    print(f"SLURM jobs: {n_jobs} (bootstrap shards as separate jobs: {n_shards})")
    if job_problems:
        print(f"SLURM job checks failed: {len(job_problems)} problem(s), listed above")
    return 1 if problems or job_problems else 0


if __name__ == "__main__":
    sys.exit(main())
