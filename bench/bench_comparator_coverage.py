"""Benchmark: coverage of the demo protocol's guideline comparator over simulated cohorts.

For each of ``--cohorts`` cohorts of ``--episodes`` episodes (hidden confounding ``--strength``, default 0), the
demo protocol (without its ``strategies`` and ``survival`` sections) is evaluated as the workflow evaluates it
and ``--replicates`` patient-bootstrap replicates give percentile intervals (the bootstrap shards' code). The
guideline's truth is its Monte Carlo value on ``--truth-episodes`` simulated episodes, the rule acting on the
simulator's states (the protocol's comparator itself, which tests/evaluation/test_comparators.py checks against
the rule written out in numpy), and its contrast with usual care uses common random numbers. Printed per
estimator: coverage of the value's and of the contrast's interval, bias, RMSE, mean width and the share of
cohorts where the value is supported. With C cohorts a coverage near 95% is known to about ±sqrt(0.05·0.95/C).
Invented simulator, research use only, not medical advice.

    OMP_NUM_THREADS=1 python bench/bench_comparator_coverage.py --cohorts 20 --episodes 1000 --replicates 30
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

import numpy as np

from regimewise.bootstrap.intervals import combine
from regimewise.bootstrap.replicates import fit_replicate, run_shard
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import true_returns
from regimewise.evaluation.values import evaluate_all
from regimewise.protocol import load_protocol

REPOSITORY = Path(__file__).resolve().parents[1]
ESTIMATORS = ["is", "wis", "pdis", "pdwis", "dr", "wdr", "fqe"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohorts", type=int, default=20)
    parser.add_argument("--episodes", type=int, default=1000)
    parser.add_argument("--replicates", type=int, default=30)
    parser.add_argument("--strength", type=float, default=0.0)
    parser.add_argument("--truth-episodes", type=int, default=100_000)
    args = parser.parse_args()
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    spec = pf.protocol.evaluation.model_copy(
        update={"estimators": ESTIMATORS, "replicates": args.replicates, "shards": 1}
    )
    protocol = pf.protocol.model_copy(update={"evaluation": spec, "strategies": None, "survival": None})
    guideline = protocol.comparators[0]

    def rule(states):
        columns = {name: states[name].to_numpy(dtype=float) for name in protocol.state_names if name in states}
        return guideline.action_codes(columns, len(states), protocol.action_labels)

    start = time.time()
    strength = args.strength
    value_truth = true_returns(rule, n=args.truth_episodes, seed=1, confounding_strength=strength)
    usual_truth = true_returns("usual_care", n=args.truth_episodes, seed=1, confounding_strength=strength)
    truth = {"value": float(value_truth.mean()), "contrast": float((value_truth - usual_truth).mean())}
    rows = []
    for c in range(args.cohorts):
        cohort = simulate_cohort(args.episodes, seed=1000 + c, confounding_strength=strength)
        decisions = clean_decisions(pf, cohort.decisions)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            proba, recommended, q, folds = fit_replicate(decisions, protocol)
            point = evaluate_all(decisions, proba, recommended, protocol, learned_folds=folds, learned_q=q)
            intervals = combine(point, [run_shard(decisions, protocol, 0)], protocol)
        estimates = next(r["estimates"] for r in point["regimes"] if r["name"] == guideline.name)
        contrasts = {
            x["estimator"]: x
            for x in intervals["contrasts"]
            if (x["regime"], x["versus"]) == (guideline.name, "usual_care")
        }
        rows.append(
            {
                est: {
                    "value": intervals["values"][guideline.name][est],
                    "contrast": contrasts[est],
                    "supported": estimates[est]["verdict"] == "supported",
                }
                for est in ESTIMATORS
            }
        )
    print(
        f"{args.cohorts} cohorts × {args.episodes} episodes × {args.replicates} replicates, strength {strength:g}; "
        f"truth on {args.truth_episodes} episodes: value {truth['value']:.3f}, contrast {truth['contrast']:.3f}; "
        f"{time.time() - start:.0f} s"
    )
    for est in ESTIMATORS:
        parts = []
        for what, key in (("value", "value"), ("contrast", "difference")):
            got = [r[est][what] for r in rows if r[est][what][key] is not None and r[est][what]["low"] is not None]
            if not got:
                parts.append(f"{what}: undefined")
                continue
            points = np.array([g[key] for g in got])
            cover = np.mean([g["low"] <= truth[what] <= g["high"] for g in got])
            width = np.mean([g["high"] - g["low"] for g in got])
            bias, rmse = points.mean() - truth[what], np.sqrt(np.mean((points - truth[what]) ** 2))
            parts.append(
                f"{what}: coverage {100 * cover:.1f}% of {len(got)}, bias {bias:+.3f}, RMSE {rmse:.3f}, "
                f"width {width:.3f}"
            )
        supported = np.mean([r[est]["supported"] for r in rows])
        print(f"{est:6s} " + "; ".join(parts) + f"; supported in {100 * supported:.0f}% of cohorts")


if __name__ == "__main__":
    main()
