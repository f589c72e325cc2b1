"""Benchmark: coverage of the bootstrap intervals for the true values, by estimator.

For each of ``--cohorts`` cohorts of ``--episodes`` episodes without hidden confounding (strength 0), the demo
protocol's regime is learned, every regime is evaluated by every estimator (the learned regime cross-fitted by
patient, as the workflow does: ``evaluation.cross_fit_folds``), and ``--replicates`` patient
bootstrap replicates (each refitting usual care and the outcome models, and the regime only with
``evaluation.bootstrap_regime: refit``; :mod:`regimewise.bootstrap.replicates`) give percentile intervals. The
truths come from the simulator by Monte Carlo: the value of the regime learned from that cohort
(``--truth-episodes`` simulated patients), the episode-weighted mean value of the fold regimes the cross-fitted
evaluation actually scores, and the value of usual care (once, 200,000 episodes).
Printed per estimator: coverage of the nominal 95% interval, bias, RMSE and mean width, for the learned regime
and for usual care. Targets of issue 6: coverage >= 90% for wdr and fqe on the learned regime, >= 93% for usual
care. With C cohorts a coverage near 95% is known to about ±sqrt(0.05·0.95/C) (±1.5 points at C = 200).

The issue's size with 50 replicates per interval took 6,149 s on 2 cores (one run; ``--results`` lets a
stopped run resume):
    python bench/bench_coverage.py --cohorts 200 --episodes 3000 --replicates 50 --results coverage.jsonl
With the demo protocol's 200 replicates the bootstrap part costs four times as much (about 6 hours; not run).
Invented simulator, research use only, not medical advice.
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

REPOSITORY = Path(__file__).resolve().parents[1]

from regimewise.bootstrap.intervals import combine  # noqa: E402
from regimewise.bootstrap.replicates import run_shard  # noqa: E402
from regimewise.data.records import clean_decisions  # noqa: E402
from regimewise.demo.simulate import simulate_cohort  # noqa: E402
from regimewise.demo.truth import true_value  # noqa: E402
from regimewise.evaluation.values import evaluate_all  # noqa: E402
from regimewise.protocol import load_protocol  # noqa: E402
from regimewise.regime.learning import (  # noqa: E402
    cross_fitted_recommendations,
    crossfit_folds,
    fold_regimes,
    learn_regime,
    record_proba,
)

ESTIMATORS = ["is", "wis", "pdis", "pdwis", "dr", "wdr", "fqe"]


def parse(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohorts", type=int, default=12)
    parser.add_argument("--episodes", type=int, default=600)
    parser.add_argument("--replicates", type=int, default=40)
    parser.add_argument("--truth-episodes", type=int, default=20_000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--interval-method", choices=["percentile", "basic"], default="percentile")
    parser.add_argument(
        "--results",
        type=Path,
        default=None,
        help="JSON-lines file: each cohort's result is appended as it finishes, and cohorts already "
        "in the file are not run again (a long run can be resumed)",
    )
    return parser.parse_args(argv)


def protocol_for(args):
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    spec = pf.protocol.evaluation.model_copy(
        update={
            "estimators": ESTIMATORS,
            "replicates": args.replicates,
            "shards": 1,
            "interval_method": args.interval_method,
        }
    )
    return pf, pf.protocol.model_copy(update={"evaluation": spec})


def one_cohort(task):
    """Point values, intervals and the learned regime's true value for one simulated cohort."""
    from threadpoolctl import threadpool_limits

    seed, args = task
    pf, protocol = protocol_for(args)
    warnings.simplefilter("ignore")
    with threadpool_limits(limits=1):
        decisions = clean_decisions(pf, simulate_cohort(args.episodes, seed=seed, confounding_strength=0.0).decisions)
        seeded = protocol.model_copy(update={"seed": 1000 + seed})
        learned = learn_regime(decisions, seeded)
        proba = record_proba(learned, decisions)
        folds = crossfit_folds(decisions, seeded)
        recommended = cross_fitted_recommendations(decisions, proba, seeded)
        point = evaluate_all(decisions, proba, recommended, seeded, learned_folds=folds)
        shard = run_shard(decisions, seeded, 0)
        intervals = combine(point, [shard], seeded)
        truth = true_value(learned, n=args.truth_episodes, seed=10_000 + seed, confounding_strength=0.0).value
        first = decisions["step"].to_numpy() == 0  # the data-adaptive target: fold regimes, episode-weighted
        fold_truth = (
            truth
            if folds is None
            else sum(
                np.mean(rows[first])
                * true_value(learned_k, n=args.truth_episodes, seed=10_000 + seed, confounding_strength=0.0).value
                for rows, learned_k in fold_regimes(decisions, seeded, folds)
            )
        )
    values = {name: intervals["values"][name] for name in ("learned", "usual_care")}
    return {"seed": seed, "values": values, "truth": truth, "fold_truth": fold_truth}


def run_cohorts(args):
    """Every cohort's result, reading finished ones from ``--results`` and appending new ones as they finish."""
    done = {}
    if args.results is not None and args.results.exists():
        for line in args.results.read_text().splitlines():
            record = json.loads(line)
            if record["settings"] == settings(args):
                done[record["seed"]] = record
    todo = [(seed, args) for seed in range(args.cohorts) if seed not in done]
    if done:
        print(f"{len(done)} cohorts read from {args.results}, {len(todo)} to run", flush=True)
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        for record in pool.map(one_cohort, todo):
            done[record["seed"]] = record
            if args.results is not None:
                with args.results.open("a") as out:
                    out.write(json.dumps({**record, "settings": settings(args)}) + "\n")
            if len(done) % 10 == 0:
                print(f"  {len(done)} of {args.cohorts} cohorts", flush=True)
    return [done[seed] for seed in range(args.cohorts)]


def settings(args):
    """The arguments that change a cohort's result (a results file is only reused for the same ones)."""
    return [args.episodes, args.replicates, args.truth_episodes, args.interval_method]


def summarise(name, truth, rows):
    """Coverage, bias, RMSE and mean width of one regime's intervals, per estimator."""
    print(
        f"\n{name}: coverage of the 95% interval, bias, RMSE, mean width, share of intervals that hold their "
        "own point estimate (cohorts with a defined interval)"
    )
    print(f"{'estimator':>10} {'coverage':>9} {'bias':>8} {'RMSE':>8} {'width':>8} {'own':>6} {'n':>4}")
    for est in ESTIMATORS:
        ok = [(r[est], t) for r, t in zip(rows, truth) if r[est]["low"] is not None and r[est]["value"] is not None]
        if not ok:
            print(f"{est:>10} {'—':>9}")
            continue
        err = np.array([e["value"] - t for e, t in ok])
        cover = np.mean([e["low"] <= t <= e["high"] for e, t in ok])
        width = np.mean([e["high"] - e["low"] for e, _ in ok])
        own = np.mean([e["low"] <= e["value"] <= e["high"] for e, _ in ok])
        print(
            f"{est:>10} {cover:9.1%} {err.mean():8.3f} {np.sqrt(np.mean(err**2)):8.3f} {width:8.3f} {own:6.0%} "
            f"{len(ok):4d}"
        )


def main(argv=None) -> None:
    args = parse(argv)
    full = args.cohorts >= 200 and args.episodes >= 3000
    print(
        f"{'ISSUE' if full else 'REDUCED'} size: {args.cohorts} cohorts × {args.episodes} episodes (issue 6: "
        f"200 × 3000), {args.replicates} bootstrap replicates per interval (the demo protocol: 200); "
        f"{args.interval_method} intervals, limits at the (R + 1)α-th ordered replicate"
    )
    start = time.perf_counter()
    usual_truth = true_value("usual_care", n=200_000, seed=7, confounding_strength=0.0).value
    results = run_cohorts(args)
    learned_rows = [r["values"]["learned"] for r in results]
    usual_rows = [r["values"]["usual_care"] for r in results]
    summarise(
        "learned regime (truth: Monte Carlo value of the regime learned from all patients)",
        [r["truth"] for r in results],
        learned_rows,
    )
    summarise(
        "learned regime (truth: mean value of the cross-fitted fold regimes, the data-adaptive target)",
        [r["fold_truth"] for r in results],
        learned_rows,
    )
    summarise("usual care", [usual_truth] * len(usual_rows), usual_rows)
    print(
        f"\nC = {args.cohorts}: a coverage of 95% is known to about ±{100 * np.sqrt(0.05 * 0.95 / args.cohorts):.1f} "
        f"points; wall clock {time.perf_counter() - start:.0f} s with {args.workers} workers "
        f"(load average now {os.getloadavg()[0]:.1f})"
    )


if __name__ == "__main__":
    main()
