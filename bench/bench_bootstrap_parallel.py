"""Benchmark: parallel efficiency of the sharded bootstrap (2 cores against 1, same run).

A cohort of ``--episodes`` episodes is simulated and the workflow is run once up to the point estimates
(untimed). Then the bootstrap rules alone (every shard and the combine step) are forced to rerun with
``--cores 1`` and with ``--cores 2`` on the same results folder, and the wall-clock times are compared; the
two runs must also write the same intervals.json bytes. Target of issue 6: 2 cores at least 1.7× faster.

The machine's load average is printed before each timing: other processes on a shared machine slow the
2-core run more than the 1-core run, so read the speed-up together with it.

Full size (the demo: 3,000 episodes, 200 replicates, 4 shards; about 10 minutes):
    python bench/bench_bootstrap_parallel.py --episodes 3000 --replicates 200 --shards 4
Invented simulator, research use only, not medical advice.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

REPOSITORY = Path(__file__).resolve().parents[1]

from regimewise.demo.files import write_cohort  # noqa: E402


def parse(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=3000)
    parser.add_argument("--replicates", type=int, default=40)
    parser.add_argument("--shards", type=int, default=4)
    parser.add_argument("--seed", type=int, default=61)
    return parser.parse_args(argv)


def study(folder: Path, args) -> Path:
    write_cohort(folder / "data", n_episodes=args.episodes, seed=args.seed, confounding_strength=0.0, n_truth=1000)
    protocol = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    protocol["data"] = {"decisions": "data/decisions.csv", "episodes": "data/episodes.csv"}
    protocol["evaluation"].update({"replicates": args.replicates, "shards": args.shards})
    path = folder / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


# The evaluate jobs' parts and the bounds curves, which the combine rule joins with the shards: made by the untimed
# run and kept (--notemp) for the timed reruns of the shards and the combine rule.
POINT_ESTIMATES = ("evaluate/learned.json", "evaluate/fixed.json", "evaluate/side.json", "sensitivity/curves.json")


def snakemake(protocol: Path, out: Path, cores: int, targets, forcerun=()) -> float:
    command = [
        sys.executable,
        "-m",
        "snakemake",
        *targets,
        "--snakefile",
        str(REPOSITORY / "Snakefile"),
        "--directory",
        str(out),
        "--cores",
        str(cores),
        "--quiet",
        "--notemp",
        *(["--forcerun", *forcerun] if forcerun else []),
        "--config",
        f"protocol={protocol}",
        "results=.",
        "logs=logs",
        "benchmarks=benchmarks",
    ]
    start = time.perf_counter()
    finished = subprocess.run(command, capture_output=True, text=True, check=False)
    if finished.returncode != 0:
        raise SystemExit(f"snakemake failed:\n{finished.stdout[-3000:]}{finished.stderr[-3000:]}")
    return time.perf_counter() - start


def main(argv=None) -> None:
    args = parse(argv)
    print(f"sharded bootstrap: {args.episodes} episodes, {args.replicates} replicates in {args.shards} shards")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        protocol = study(folder, args)
        out = folder / "out"
        snakemake(protocol, out, 2, POINT_ESTIMATES)
        times, outputs = {}, {}
        for cores in (1, 2):
            print(f"load average before the {cores}-core run: {os.getloadavg()[0]:.2f}")
            times[cores] = snakemake(
                protocol, out, cores, ["bootstrap/intervals.json"], forcerun=("bootstrap_shard", "combine")
            )
            outputs[cores] = (out / "bootstrap" / "intervals.json").read_bytes()
            print(f"{cores} core(s): {times[cores]:.1f} s wall clock")
    speedup = times[1] / times[2]
    print(
        f"speed-up 2 vs 1 core: {speedup:.2f}x (parallel efficiency {speedup / 2:.0%}); target >= 1.7x: "
        f"{'met' if speedup >= 1.7 else 'NOT met'}"
    )
    print(f"intervals.json identical in both runs: {outputs[1] == outputs[2]}")


if __name__ == "__main__":
    main()
