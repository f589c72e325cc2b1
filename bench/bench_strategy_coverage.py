"""Benchmark: coverage, bias and RMSE of the headline strategy's value and contrast over simulated cohorts.

For each of ``--cohorts`` cohorts of ``--episodes`` episodes (the demo's hidden confounding, strength 1, unless
``--strength``), the demo protocol is run as the workflow runs it (usual care, the cross-fitted regime, every
regime and strategy by every estimator) and ``--replicates`` patient-bootstrap replicates give percentile
intervals (:mod:`regimewise.bootstrap.replicates`, the same code as the bootstrap shards; ``--bootstrap-regime``
``fixed``, the protocol's default, holds the learned fold regimes fixed in the replicates, ``refit`` learns them
again in each replicate). The truth of the
protocol's headline strategy is the cross-fitted, data-adaptive target: the episode-weighted mean over folds of
the true value of the strategy built from each fold's regime (``--truth-episodes`` simulated episodes, common
random numbers with usual care; bench_strategies.py). Printed per estimator, for the value and the contrast with
usual care: coverage of the 95% interval, bias, RMSE, mean width, and the share of cohorts where the estimate is
supported. Target of issue 13: coverage ≥ 93% over ≥ 100 cohorts of 3,000 episodes for the estimators the
strategy is supported by. With C cohorts a coverage near 95% is known to about ±sqrt(0.05·0.95/C).

The issue's size (100 cohorts × 3,000 episodes × 200 replicates) takes many hours on 2 cores; ``--results`` (a
JSON-lines file) lets a stopped run resume; it also keeps each cohort's replicate values, so the percentile, basic
and normal intervals are compared on the same replicates after the main table. Invented simulator, research use
only, not medical advice.

    python bench/bench_strategy_coverage.py --cohorts 100 --episodes 3000 --replicates 200 --results cov.jsonl
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from statistics import NormalDist

import numpy as np
from bench_strategies import simulator_strategy
from threadpoolctl import threadpool_limits

from regimewise.bootstrap.intervals import combine, contrast_of, interval
from regimewise.bootstrap.replicates import learn_and_evaluate, run_shard
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import true_returns
from regimewise.protocol import load_protocol
from regimewise.regime.learning import crossfit_folds, fold_regimes
from regimewise.selfcheck.cohort import compared_protocol, headline_strategy

REPOSITORY = Path(__file__).resolve().parents[1]


def parse(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohorts", type=int, default=4)
    parser.add_argument("--episodes", type=int, default=1000)
    parser.add_argument("--replicates", type=int, default=30)
    parser.add_argument("--truth-episodes", type=int, default=20_000)
    parser.add_argument("--strength", type=float, default=1.0)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--results", type=Path, default=None)
    parser.add_argument(
        "--first-seed", type=int, default=1000, help="seed of the first cohort (cohort c has seed first + c)"
    )
    parser.add_argument("--bootstrap-regime", choices=("fixed", "refit"), default="fixed")
    parser.add_argument(
        "--headline-only",
        action="store_true",
        help="evaluate only usual care, the learned regime and the headline strategy (no other strategy of the "
        "grids, no fixed strategies, no comparators): the headline's estimates and replicates are unchanged, the "
        "cost is lower",
    )
    return parser.parse_args(argv)


def one_cohort(task):
    seed, args = task
    warnings.simplefilter("ignore")
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    raw = pf.protocol.evaluation.model_copy(
        update={"replicates": args.replicates, "shards": 1, "bootstrap_regime": args.bootstrap_regime}
    )
    p = pf.protocol.model_copy(update={"evaluation": raw, "seed": seed})
    if args.headline_only:
        p = compared_protocol(p, args.replicates)  # usual care, the learned regime and the headline only
    s = headline_strategy(p)
    with threadpool_limits(limits=1):
        decisions = clean_decisions(
            pf, simulate_cohort(args.episodes, seed=seed, confounding_strength=args.strength).decisions
        )
        values, _ = learn_and_evaluate(decisions, p, strict=True)
        shard = run_shard(decisions, p, 0)
        intervals = combine(values, [shard], p)
        folds = crossfit_folds(decisions, p)
        first = decisions["step"].to_numpy() == 0
        usual = true_returns("usual_care", n=args.truth_episodes, seed=seed + 1, confounding_strength=args.strength)
        truth_value, truth_contrast = 0.0, 0.0
        for rows, learned in fold_regimes(decisions, p, folds):
            share = float(np.sum(rows & first) / np.sum(first))
            returns = true_returns(
                simulator_strategy(s, learned), n=args.truth_episodes, seed=seed + 1, confounding_strength=args.strength
            )
            truth_value += share * returns.mean()
            truth_contrast += share * (returns - usual).mean()
    regime = next(r for r in values["regimes"] if r["name"] == s.name)
    out = {
        "seed": seed,
        "bootstrap_regime": args.bootstrap_regime,
        "truth_value": truth_value,
        "truth_contrast": truth_contrast,
        "estimators": {},
    }
    for est, e in regime["estimates"].items():
        v = intervals["values"][s.name][est]
        c = next(
            c
            for c in intervals["contrasts"]
            if (c["regime"], c["versus"], c["estimator"]) == (s.name, "usual_care", est)
        )
        out["estimators"][est] = {
            "value": e["value"],
            "verdict": e["verdict"],
            "ess": e["ess"],
            "value_interval": [v["low"], v["high"]],
            "difference": c["difference"],
            "contrast_interval": [c["low"], c["high"]],
            # each replicate's value and contrast (None where a replicate failed), so that interval methods can be
            # compared afterwards on the same replicates (summarise)
            "replicate_values": [r["values"][s.name][est] if "values" in r else None for r in shard["replicates"]],
            "replicate_contrasts": [
                contrast_of(r["values"], s.name, "usual_care", est) if "values" in r else None
                for r in shard["replicates"]
            ],
        }
    return out


def summarise(results):
    estimators = list(results[0]["estimators"])
    print(
        f"{'estimator':9s} {'target':8s} {'coverage':>8s} {'bias':>7s} {'RMSE':>7s} {'width':>7s} {'supported':>9s} "
        f"{'coverage where supported':>24s}"
    )
    for est in estimators:
        rows = [r["estimators"][est] for r in results]
        is_supported = np.array([row["verdict"] == "supported" for row in rows])
        supported = np.mean(is_supported)
        for target, key, stored in (
            ("value", "value", "value_interval"),
            ("contrast", "difference", "contrast_interval"),
        ):
            truth = np.array([r[f"truth_{'value' if target == 'value' else 'contrast'}"] for r in results])
            est_values = np.array([np.nan if row[key] is None else row[key] for row in rows])
            low = np.array([np.nan if row[stored][0] is None else row[stored][0] for row in rows])
            high = np.array([np.nan if row[stored][1] is None else row[stored][1] for row in rows])
            hits = (low <= truth) & (truth <= high)
            covered = np.mean(hits)
            where = f"{100 * np.mean(hits[is_supported]):.1f}% of {is_supported.sum()}" if is_supported.any() else "-"
            error = est_values - truth
            print(
                f"{est:9s} {target:8s} {100 * covered:7.1f}% {np.nanmean(error):7.3f} "
                f"{np.sqrt(np.nanmean(error**2)):7.3f} {np.nanmean(high - low):7.3f} {100 * supported:8.0f}% "
                f"{where:>24s}"
            )


def method_limits(estimate, draws, method, level=0.95):
    """(low, high) of one interval method from stored replicates: the project's percentile and basic intervals
    (:func:`regimewise.bootstrap.intervals.interval`), or the normal interval θ̂ ± z·SE with the same bootstrap SE
    (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 13; section from memory)."""
    limits = interval(estimate, draws, level, 1.0, basic=method == "basic")
    if limits["low"] is None:
        return np.nan, np.nan
    if method == "normal":
        half = NormalDist().inv_cdf((1 + level) / 2) * limits["bootstrap_se"]
        return estimate - half, estimate + half
    return limits["low"], limits["high"]


def summarise_methods(results):
    """Coverage of each interval method on the same stored replicates, over all cohorts and where supported."""
    rows = [r for r in results if "replicate_values" in next(iter(r["estimators"].values()))]
    if not rows:
        return
    print(f"\ninterval methods on the same replicates ({len(rows)} cohorts that stored them):")
    print(f"{'estimator':9s} {'target':8s} {'method':10s} {'coverage':>8s} {'where supported':>18s} {'width':>7s}")
    for est in rows[0]["estimators"]:
        is_supported = np.array([r["estimators"][est]["verdict"] == "supported" for r in rows])
        for target, key, draws in (
            ("value", "value", "replicate_values"),
            ("contrast", "difference", "replicate_contrasts"),
        ):
            truth = np.array([r[f"truth_{target}"] for r in rows])
            for method in ("percentile", "basic", "normal"):
                limits = np.array(
                    [method_limits(r["estimators"][est][key], r["estimators"][est][draws], method) for r in rows]
                )
                hits = (limits[:, 0] <= truth) & (truth <= limits[:, 1])
                where = (
                    f"{100 * np.mean(hits[is_supported]):.1f}% of {is_supported.sum()}" if is_supported.any() else "-"
                )
                print(
                    f"{est:9s} {target:8s} {method:10s} {100 * np.mean(hits):7.1f}% {where:>18s} "
                    f"{np.nanmean(limits[:, 1] - limits[:, 0]):7.3f}"
                )


def main(argv=None) -> None:
    args = parse(argv)
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    done = []
    if args.results is not None and args.results.exists():
        done = [json.loads(line) for line in args.results.read_text().splitlines() if line.strip()]
        if any(r.get("bootstrap_regime", args.bootstrap_regime) != args.bootstrap_regime for r in done):
            raise SystemExit(f"{args.results} holds cohorts run with another --bootstrap-regime; use another file")
    seeds = [args.first_seed + c for c in range(args.cohorts) if args.first_seed + c not in {r["seed"] for r in done}]
    start = time.perf_counter()
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        for result in pool.map(one_cohort, [(seed, args) for seed in seeds]):
            done.append(result)
            if args.results is not None:
                with args.results.open("a") as handle:
                    handle.write(json.dumps(result) + "\n")
    p = load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol
    print(
        f"headline strategy {headline_strategy(p).name}: {len(done)} cohorts x {args.episodes} episodes, "
        f"{args.replicates} replicates ({args.bootstrap_regime} regime), strength {args.strength}, truths on "
        f"{args.truth_episodes} episodes{', headline strategy only' if args.headline_only else ''}; "
        f"{time.perf_counter() - start:.0f} s this run"
    )
    summarise(sorted(done, key=lambda r: r["seed"]))
    summarise_methods(sorted(done, key=lambda r: r["seed"]))


if __name__ == "__main__":
    main()
