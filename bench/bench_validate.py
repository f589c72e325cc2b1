"""Benchmark: full validation of a large decisions table against reading it with pandas alone.

Writes an invented 12-state decisions table as Parquet (default 1,000,000 rows: 125,000 episodes x 8 steps),
then, each in a fresh subprocess so that peak memory is the task's own:

- ``read``: ``pandas.read_parquet`` of the file;
- ``validate``: ``regimewise.data.validate.validate_records`` (reading included: de-identification guard, missing-data
  policy, field rules, row-spanning checks, cleaning).

Prints wall time of both and their ratio (target: at most 3), and the validation's peak resident memory above
the interpreter's baseline (ru_maxrss of the child minus its RSS before the work) against the table's in-memory
size (``DataFrame.memory_usage(deep=True)``; target: at most 4).

Full size:   python bench/bench_validate.py
Quick check: python bench/bench_validate.py --rows 200000
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

N_STATES = 12
HORIZON = 8


def make_table(rows: int, seed: int = 1) -> pd.DataFrame:
    """An invented, valid decisions table (not realistic data)."""
    rng = np.random.default_rng(seed)
    episodes = rows // HORIZON
    n = episodes * HORIZON
    frame = pd.DataFrame(
        {
            "episode_id": np.repeat([f"E{i:07d}" for i in range(episodes)], HORIZON),
            "patient_id": np.repeat([f"P{i // 2:07d}" for i in range(episodes)], HORIZON),
            "step": np.tile(np.arange(HORIZON), episodes),
            "day": np.tile(np.arange(HORIZON) * 91, episodes) + np.repeat(rng.integers(0, 7, episodes), HORIZON),
        }
    )
    for k in range(N_STATES):
        frame[f"x{k}"] = np.round(rng.normal(50, 10, n).clip(0, 100), 2)
    frame["action"] = np.array(["hold", "up", "down", "add"])[rng.integers(0, 4, n)]
    frame["reward"] = np.round(rng.normal(0, 1, n), 3)
    return frame


def write_study(folder: Path, rows: int) -> Path:
    make_table(rows).to_parquet(folder / "decisions.parquet", index=False)
    protocol = {
        "study": {"title": "Benchmark", "question": "How fast is validation?", "version": "0", "run_name": "bench"},
        "data": {"decisions": "decisions.parquet"},
        "states": [
            {"name": f"x{k}", "label": f"state {k}", "kind": "continuous", "plausible_range": [0, 100]}
            for k in range(N_STATES)
        ],
        "actions": [{"label": a, "description": a} for a in ("hold", "up", "down", "add")],
        "reward": {"description": "invented"},
        "horizon": HORIZON,
        "seed": 1,
    }
    path = folder / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


CHILD = r"""
import json, resource, sys, time
import pandas as pd
from regimewise.protocol import load_protocol
from regimewise.data.validate import validate_records
import psutil
task, protocol, table = sys.argv[1:4]
base = psutil.Process().memory_info().rss
start = time.perf_counter()
if task == "read":
    frame = pd.read_parquet(table, engine="pyarrow")
    size = int(frame.memory_usage(deep=True).sum())
else:
    result = validate_records(load_protocol(protocol))
    size = int(result.summary["rows_kept"])
seconds = time.perf_counter() - start
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps({"seconds": seconds, "peak_above_base": peak - base, "size": size}))
"""


def run_child(task: str, protocol: Path) -> dict:
    table = protocol.parent / "decisions.parquet"
    out = subprocess.run(
        [sys.executable, "-c", CHILD, task, str(protocol), str(table)], capture_output=True, text=True, check=True
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--repeats", type=int, default=3, help="best of this many runs of each task")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        protocol = write_study(Path(tmp), args.rows)
        reads = [run_child("read", protocol) for _ in range(args.repeats)]
        checks = [run_child("validate", protocol) for _ in range(args.repeats)]
    read_s = min(r["seconds"] for r in reads)
    check_s = min(c["seconds"] for c in checks)
    table_bytes = reads[0]["size"]
    peak = min(c["peak_above_base"] for c in checks)
    print(f"rows: {checks[0]['size']:,} ({N_STATES} states, Parquet); best of {args.repeats}")
    print(f"pandas read: {read_s:.2f} s; full validation (reading included): {check_s:.2f} s")
    print(f"time ratio validation / read: {check_s / read_s:.2f} (target <= 3)")
    print(f"table in memory: {table_bytes / 2**20:.0f} MiB; validation peak above baseline: {peak / 2**20:.0f} MiB")
    print(f"memory ratio peak / table: {peak / table_bytes:.2f} (target <= 4)")


if __name__ == "__main__":
    main()
