"""Benchmark: the demo's strategies against the simulator's truth, and the verdicts of the fixed strategies.

Reads a finished demo run (``regimewise demo --out RUN``: its values.json and bootstrap shards, recombined here with
the current code) and computes, by Monte Carlo with common random numbers (``--truth-episodes`` episodes, seed
``--seed``), the true value of every strategy of the protocol's ``strategies`` section and of the learned regime.
The evaluation is cross-fitted, so the truth is the data-adaptive target it estimates: the episode-weighted mean
over the cross-fitting folds of the value of the strategy built from each fold's regime (the regime learned
without that fold; its Q-values for the override strategies), as in bench_coverage.py.

Printed: for each strategy (each family and grid value) the true value and contrast with usual care, the ESS, and
every estimator's estimate with the headline estimator's contrast interval; then the checks of issue 13 for the
protocol's headline strategy (verdict supported, i.e. ESS at least the minimum; 95% contrast interval excludes 0
and contains the true contrast; true contrast at least half the deterministic learned regime's true gain), and
the fixed-strategy table (every 'not identified' verdict is one where fqe's interval misses the truth or the ESS
is below 1). Invented simulator, research use only, not medical advice.

    regimewise demo --out /tmp/demo_run
    python bench/bench_strategies.py --run /tmp/demo_run --truth-episodes 20000
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

import numpy as np

from regimewise.bootstrap.intervals import combine
from regimewise.demo.truth import always, true_returns
from regimewise.evaluation.strategies import protocol_strategies
from regimewise.evaluation.values import headline_estimator
from regimewise.io import read_json, read_parquet
from regimewise.protocol import load_protocol
from regimewise.regime.learning import crossfit_folds, fold_regimes
from regimewise.selfcheck.cohort import strategy_policy as simulator_strategy  # the strategy built from a regime

REPOSITORY = Path(__file__).resolve().parents[1]


def parse(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--run", type=Path, required=True, help="folder of a finished `regimewise demo --out` run")
    parser.add_argument("--truth-episodes", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=20261202)
    return parser.parse_args(argv)


def fold_truth(make, folds_and_regimes, shares, usual, n, seed):
    """Episode-weighted mean over folds of the true value and of the paired contrast with usual care (with SEs)."""
    value, contrast, var_v, var_c = 0.0, 0.0, 0.0, 0.0
    for (_, learned), share in zip(folds_and_regimes, shares):
        returns = true_returns(make(learned), n=n, seed=seed)
        value += share * returns.mean()
        contrast += share * (returns - usual).mean()
        var_v += share**2 * returns.var(ddof=1) / n
        var_c += share**2 * (returns - usual).var(ddof=1) / n
    return {"value": value, "value_se": np.sqrt(var_v), "contrast": contrast, "contrast_se": np.sqrt(var_c)}


def truths(p, decisions, n, seed):
    """True values and contrasts of the learned regime, every strategy and every fixed strategy."""
    folds = crossfit_folds(decisions, p)
    pairs = fold_regimes(decisions, p, folds)
    first = decisions["step"].to_numpy() == 0
    shares = [float(np.sum(rows & first) / np.sum(first)) for rows, _ in pairs]
    usual = true_returns("usual_care", n=n, seed=seed)
    out = {"usual_care": {"value": usual.mean(), "value_se": usual.std(ddof=1) / np.sqrt(n), "contrast": 0.0}}
    out["learned"] = fold_truth(lambda learned: learned, pairs, shares, usual, n, seed)
    for s in protocol_strategies(p.strategies):
        out[s.name] = fold_truth(lambda learned, s=s: simulator_strategy(s, learned), pairs, shares, usual, n, seed)
    for a in p.action_labels:
        returns = true_returns(always(a), n=n, seed=seed)
        out[f"always_{a}"] = {"value": returns.mean(), "contrast": (returns - usual).mean()}
    return out


def contrast_of(intervals, regime, estimator):
    for c in intervals["contrasts"]:
        if (c["regime"], c["versus"], c["estimator"]) == (regime, "usual_care", estimator):
            return c
    return None


def covers(contrast, truth) -> bool:
    return contrast["low"] is not None and contrast["low"] <= truth <= contrast["high"]


def print_strategy_table(p, values, intervals, truth):
    name = headline_estimator(p)
    print(f"\nStrategies (contrast interval by {name}; truths ± Monte Carlo SE)")
    print(f"{'strategy':24s} {'true value':>16s} {'true contrast':>16s} {'ESS':>7s} {'changed':>7s}  estimates")
    for r in values["regimes"]:
        if "family" not in r and r["name"] != "learned":
            continue
        t, e = truth[r["name"]], r["estimates"]
        c = contrast_of(intervals, r["name"], name)
        estimates = " ".join(f"{k}={v['value']:.2f}" for k, v in e.items() if v["value"] is not None)
        interval = "—" if c["low"] is None else f"[{c['low']:.2f}, {c['high']:.2f}]"
        print(
            f"{r['name']:24s} {t['value']:9.2f}±{t['value_se']:.2f} {t['contrast']:9.2f}±{t['contrast_se']:.2f} "
            f"{e[name]['ess']:7.1f} {r.get('share_changed') or 1.0:7.2f}  {estimates}; {name} contrast "
            f"{c['difference']:.2f} {interval} covers truth: {covers(c, t['contrast'])} verdict {e[name]['verdict']}"
        )


def headline_checks(p, values, intervals, truth):
    name = headline_estimator(p)
    h = p.strategies.headline
    s = next(s for s in protocol_strategies(p.strategies) if (s.family, s.parameter) == (h.family, h.value))
    r = next(r for r in values["regimes"] if r["name"] == s.name)
    c = contrast_of(intervals, s.name, name)
    t, gain = truth[s.name]["contrast"], truth["learned"]["contrast"]
    print(f"\nHeadline strategy {s.name} by {name}: {s.words}")
    checks = {
        f"ESS {r['estimates'][name]['ess']:.1f} >= minimum {values['minimum_reliable_ess']:.0f} (verdict "
        f"{r['estimates'][name]['verdict']})": r["estimates"][name]["verdict"] == "supported",
        f"95% contrast interval [{c['low']:.2f}, {c['high']:.2f}] excludes 0": c["low"] > 0 or c["high"] < 0,
        f"interval contains the true contrast {t:.2f}": c["low"] <= t <= c["high"],
        f"true contrast {t:.2f} >= half the learned regime's true gain {gain:.2f}": t >= 0.5 * gain,
    }
    for text, ok in checks.items():
        print(f"  {'PASS' if ok else 'FAIL'}  {text}")


def fixed_table(values, intervals, truth):
    print("\nNot-identified verdicts: fqe's (unreported) interval against the truth, and the ESS")
    print(f"{'regime':22s} {'estimator':9s} {'truth':>8s} {'fqe value':>9s} {'fqe interval':>20s} {'ESS':>6s}  holds")
    for r in values["regimes"]:
        for est, e in r["estimates"].items():
            if e["verdict"] != "not identified":
                continue
            fqe = intervals["values"][r["name"]].get("fqe", {})
            low, high = fqe.get("unreported_interval") or [fqe.get("low"), fqe.get("high")]
            misses = low is not None and not (low <= truth[r["name"]]["value"] <= high)
            holds = misses or e["ess"] is None or e["ess"] < 1
            shown = "—" if low is None else f"[{low:.1f}, {high:.1f}]"
            fqe_value = fqe.get("value")
            print(
                f"{r['name']:22s} {est:9s} {truth[r['name']]['value']:8.2f} "
                f"{'—' if fqe_value is None else f'{fqe_value:9.2f}':>9s} {shown:>20s} {e['ess'] or 0:6.1f}  {holds}"
            )


def main(argv=None) -> None:
    args = parse(argv)
    warnings.simplefilter("ignore")
    p = load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol
    decisions = read_parquet(args.run / "validate" / "decisions.parquet")
    values = read_json(args.run / "evaluate" / "values.json")
    shards = [read_json(path) for path in sorted((args.run / "bootstrap" / "shards").glob("shard_*.json"))]
    intervals = combine(values, shards, p)
    start = time.perf_counter()
    truth = truths(p, decisions, args.truth_episodes, args.seed)
    print(
        f"demo cohort {values['episodes']} episodes, {intervals['replicates_used']} bootstrap replicates; truths on "
        f"{args.truth_episodes} simulated episodes per regime (seed {args.seed}), {time.perf_counter() - start:.0f} s"
    )
    print(
        f"usual care true value {truth['usual_care']['value']:.2f}; learned regime true gain "
        f"{truth['learned']['contrast']:.2f} ± {truth['learned']['contrast_se']:.2f}"
    )
    print_strategy_table(p, values, intervals, truth)
    headline_checks(p, values, intervals, truth)
    fixed_table(values, intervals, truth)


if __name__ == "__main__":
    main()
