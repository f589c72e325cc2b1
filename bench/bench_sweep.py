"""Benchmark: wall-clock time of a specification sweep through the workflow (issue 7: 5 Γ × 8 specifications
on the demo cohort with 2 cores in under 10 minutes).

The demo protocol gets a sweep of ``constraints.support_threshold`` (0.02, 0.05, 0.1, 0.2) × ``constraints.pessimism``
(0, 1): 8 specifications, the pre-specified analysis (0.05, 1) among them, each bootstrapped with ``--replicates``
resamples (default 50, the protocol's default) and bounded at 5 Γ values. The workflow is asked for
``sweep/sweep.json`` only, so the timing covers validation, the 8 specification jobs and the combine step (the
rest of the analysis does not feed the sweep). Per-job times come from the workflow's benchmark files. The load
average is printed before the run: other processes on a shared machine slow it down.

Full size (the committed demo cohort, 3,000 episodes, 50 replicates per specification):
    python bench/bench_sweep.py
Reduced: python bench/bench_sweep.py --replicates 10
Invented data, research use only, not medical advice.
"""

from __future__ import annotations

import argparse
import csv
import json
import os
import tempfile
from pathlib import Path

import yaml
from bench_bootstrap_parallel import (  # the same workflow call (this folder is on sys.path)
    REPOSITORY,
    snakemake,
)

TARGET_SECONDS = 600.0


def parse(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=50, help="bootstrap replicates per specification")
    parser.add_argument("--cores", type=int, default=2)
    return parser.parse_args(argv)


def study(folder: Path, replicates: int) -> Path:
    """The demo protocol on the committed demo cohort, with the benchmark's 8-specification sweep."""
    protocol = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    cohort = REPOSITORY / "synthetic_cohort"
    protocol["data"].update(
        root=str(cohort), decisions=str(cohort / "decisions.csv"), episodes=str(cohort / "episodes.csv")
    )
    protocol["sweeps"] = {
        "axes": {"constraints.support_threshold": [0.02, 0.05, 0.1, 0.2], "constraints.pessimism": [0.0, 1.0]},
        "replicates": replicates,
        "gammas": [1.0, 1.25, 1.5, 2.0, 3.0],
    }
    path = folder / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


def job_seconds(out: Path) -> dict[str, float]:
    """Seconds of each job, from the workflow's benchmark files."""
    times = {}
    for path in sorted((out / "benchmarks").glob("*.tsv")):
        with path.open(encoding="utf-8") as handle:
            times[path.stem] = float(next(csv.DictReader(handle, delimiter="\t"))["s"])
    return times


def main(argv=None) -> None:
    args = parse(argv)
    print(
        f"specification sweep: demo cohort (3000 episodes), 8 specifications x {args.replicates} replicates, "
        f"5 gamma values, {args.cores} cores"
    )
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        protocol = study(folder, args.replicates)
        print(f"load average before the run: {os.getloadavg()[0]:.2f}")
        elapsed = snakemake(protocol, folder / "out", args.cores, "sweep/sweep.json")
        for job, seconds in job_seconds(folder / "out").items():
            print(f"  {job:24s} {seconds:8.1f} s")
        sweep = json.loads((folder / "out" / "sweep" / "sweep.json").read_text(encoding="utf-8"))
    print(
        f"elapsed (validation, {sweep['n_specifications']} specification jobs, combine): {elapsed:.1f} s "
        f"(target < {TARGET_SECONDS:.0f} s at 50 replicates: {'met' if elapsed < TARGET_SECONDS else 'missed'}"
        f"{'' if args.replicates == 50 else ', but this run used ' + str(args.replicates) + ' replicates'})"
    )
    print(sweep["sentence"])
    for row in sweep["specifications"]:
        print(
            f"  {row['id']}{' (pre-specified)' if row['prespecified'] else '':16s} {row['settings']} "
            f"difference {row['difference']} interval [{row['low']}, {row['high']}] tipping point "
            f"{row['tipping_point']}"
        )


if __name__ == "__main__":
    main()
