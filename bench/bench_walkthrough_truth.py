"""Benchmark: the true penalty points of usual care and of the walkthrough's adherence-first rule (README, "Your own
records"), to read the walkthrough report's estimates against.

The rule is the walkthrough protocol's comparator itself (synthetic_cohort/walkthrough/protocol.yaml), acting on the
simulator's states with adherence cut into bands by the walkthrough's own prepare.py; its value is the Monte Carlo
mean of the simulator's returns on ``--truth-episodes`` fresh episodes (``regimewise.demo.truth.true_returns``), with
common random numbers for the contrast. Penalty points are minus the demo's reward, so each value is minus the
simulator's. The default seed is the truth seed of `regimewise simulate`'s default cohort (its seed + 1, as in
truth.json), so usual care's figure is minus truth.json's. Invented simulator, research use only, not medical advice.

    OMP_NUM_THREADS=1 python bench/bench_walkthrough_truth.py
"""

from __future__ import annotations

import argparse
import importlib.util
import time
from pathlib import Path

import numpy as np

from regimewise.demo.truth import true_returns
from regimewise.protocol import load_protocol

REPOSITORY = Path(__file__).resolve().parents[1]
WALKTHROUGH = REPOSITORY / "synthetic_cohort" / "walkthrough"


def load_prepare():
    """The walkthrough's prepare.py as a module (it is a script, not part of the package)."""
    spec = importlib.util.spec_from_file_location("walkthrough_prepare", WALKTHROUGH / "prepare.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--truth-episodes", type=int, default=100_000)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--strength", type=float, default=1.0)
    args = parser.parse_args()
    protocol = load_protocol(WALKTHROUGH / "protocol.yaml").protocol
    rule = protocol.comparators[0]
    prepare = load_prepare()

    def rule_codes(states):
        columns = {name: states[name].to_numpy(dtype=float) for name in protocol.state_names if name in states}
        columns["adherence_band"] = prepare.adherence_band(states["adherence"]).to_numpy(dtype=object)
        return rule.action_codes(columns, len(states), protocol.action_labels)

    start = time.time()
    common = dict(n=args.truth_episodes, seed=args.seed, confounding_strength=args.strength)
    usual = -true_returns("usual_care", **common)
    ruled = -true_returns(rule_codes, **common)
    for name, points in (("usual care", usual), (rule.label, ruled), (f"{rule.label} - usual care", ruled - usual)):
        se = points.std(ddof=1) / np.sqrt(len(points))  # episodes as the units (truth.json clusters by patient)
        print(f"{name}: {points.mean():.3f} penalty points per episode (SE {se:.3f})")
    print(f"{args.truth_episodes} episodes, seed {args.seed}, strength {args.strength:g}; {time.time() - start:.0f} s")


if __name__ == "__main__":
    main()
