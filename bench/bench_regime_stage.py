"""Benchmark: the regime stage (or the evaluate or survival stage) alone, on a cohort of N episodes x 12 decisions
(issue 18), with output hashes.

The cohort and protocol are those of ``bench_scale.py`` (the invented Harbourline simulator, seed 20261201, the
demo protocol with horizon 12 and no replicates). The validate and behaviour stages run once into the work folder
and are kept, so reruns time the regime stage only. The regime stage function is then called in this process, as
``run_snakemake_job`` calls it, and the script prints its CPU time (``time.process_time`` around the call), its
wall time, the peak resident memory of the process (``getrusage``; the interpreter and imports included) and the
SHA-256 of every output file, so that runs of two trees (``PYTHONPATH=<tree>/pipeline``) can be compared byte for
byte. ``--profile FILE`` writes a cProfile of the call with a CPU-time clock.

``--stage evaluate`` or ``--stage survival`` times that stage instead, on the regime stage's outputs of a first run
kept in ``<workdir>/regime_inputs`` (no bootstrap shards: survival without intervals).

    OMP_NUM_THREADS=1 python bench/bench_regime_stage.py --episodes 100000 --workdir /tmp/regime100k --out after
    OMP_NUM_THREADS=1 python bench/bench_regime_stage.py --workdir /tmp/regime100k --stage evaluate --out after

Invented data, research use only, not medical advice.
"""

from __future__ import annotations

import argparse
import cProfile
import hashlib
import resource
import time
from pathlib import Path

from bench_scale import write_cohort  # the same cohort and protocol (this folder is on sys.path)

from regimewise.workflow.stages import (
    behaviour_stage,
    evaluate_stage,
    regime_stage,
    survival_stage,
    validate_stage,
)


def stage_inputs(workdir: Path, episodes: int) -> dict:
    """The regime stage's inputs, made by the validate and behaviour stages on the first run."""
    protocol = write_cohort(workdir, episodes, replicates=0, shards=1)
    inputs = {
        "protocol": str(protocol),
        "decisions": str(workdir / "valid.parquet"),
        "proba": str(workdir / "proba.parquet"),
    }
    if not Path(inputs["proba"]).is_file():
        validate_stage(
            inputs["protocol"],
            inputs["decisions"],
            str(workdir / "episodes_valid.parquet"),
            str(workdir / "validation.json"),
        )
        behaviour_stage(inputs["protocol"], inputs["decisions"], inputs["proba"], str(workdir / "behaviour.json"))
    return inputs


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--episodes", type=int, default=100_000)
    parser.add_argument("--workdir", type=Path, required=True, help="cohort and stage inputs (kept between runs)")
    parser.add_argument("--out", default="regime", help="folder under --workdir for this run's outputs")
    parser.add_argument("--profile", type=Path, help="write a cProfile (CPU-time clock) of the stage here")
    parser.add_argument("--stage", choices=("regime", "evaluate", "survival"), default="regime")
    args = parser.parse_args()
    inputs = stage_inputs(args.workdir, args.episodes)
    out = args.workdir / args.out
    out.mkdir(parents=True, exist_ok=True)
    stage, outputs = regime_stage, {"table": str(out / "recommendations.parquet"), "regime": str(out / "regime.json")}
    if args.stage != "regime":
        learned = args.workdir / "regime_inputs"
        inputs["table"] = str(learned / "recommendations.parquet")
        if not Path(inputs["table"]).is_file():
            learned.mkdir(exist_ok=True)
            regime_stage(**inputs, regime=str(learned / "regime.json"))
        if args.stage == "evaluate":
            stage, outputs = evaluate_stage, {"values": str(out / "values.json")}
        else:
            inputs.update(episodes=str(args.workdir / "episodes_valid.parquet"), shards=[])
            stage, outputs = survival_stage, {"survival": str(out / "survival.json")}
    wall, cpu = time.perf_counter(), time.process_time()
    if args.profile:
        profile = cProfile.Profile(time.process_time)
        profile.runcall(stage, **inputs, **outputs)
        profile.dump_stats(args.profile)
    else:
        stage(**inputs, **outputs)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kilobytes on Linux
    print(
        f"{args.stage} stage, {args.episodes} episodes x 12: cpu {cpu:.1f} s, wall {wall:.1f} s, peak rss {peak:.0f} MB"
    )
    for path in sorted(out.iterdir()):
        print(hashlib.sha256(path.read_bytes()).hexdigest(), path.name)


if __name__ == "__main__":
    main()
