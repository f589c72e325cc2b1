"""Survival under each strategy over simulated cohorts: bias, RMSE and interval coverage against the truth.

Each cohort comes from the invented demo simulator without hidden confounding (``--strength 0``, so the
clone–censor–weight assumptions hold). The survival stage's analysis runs on it as the workflow does (usual care
fitted by the protocol's model, the learned regime cross-fitted, the dropout model on), and ``--replicates``
patient-bootstrap replicates give the percentile intervals (usual care and the dropout model refitted, the learned
fold regimes held fixed: the workflow's default ``bootstrap_regime: fixed``,
:func:`regimewise.bootstrap.replicates.fit_replicate`). Truths: the simulator's potential event days under each
fixed strategy and usual care (:func:`regimewise.demo.truth.true_survival`, ``--truth-episodes`` simulated episodes
with common random numbers). The learned regime and the strategies built from it (partial adoption, override,
incremental odds) have each cohort's own truth: the rule learned in that cohort's folds, simulated
(``--learned-truth-episodes`` per fold).

Prints, per strategy: cohorts whose effective sample stayed adequate to the horizon, bias and RMSE of survival at
the horizon and of the restricted mean survival time, and the coverage of their 95% intervals among those cohorts;
and how many cohorts flagged the strategy as unreliable. Target (issue 14): coverage >= 90% where the ESS is
adequate, and every strategy below the ESS rule flagged.

    python bench/bench_survival.py --cohorts 100 --episodes 3000 --replicates 50

A strategy rarely adequate (always hold: in about one cohort in twelve) needs many cohorts before its coverage
means anything; ``--only-adequate always_hold`` bootstraps only the cohorts where it is adequate (the rest cost one
point estimate each, about 2 s) and prints figures conditional on that:

    python bench/bench_survival.py --cohorts 400 --only-adequate always_hold --results hold.jsonl
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import yaml
from bench_strategies import simulator_strategy

from regimewise.bootstrap.replicates import (
    HeldRegime,
    draw_patients,
    fit_replicate,
    patient_groups,
    resample_episodes,
    resample_frame,
)
from regimewise.core.seeds import stream_rng
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import always, true_survival
from regimewise.evaluation.strategies import protocol_strategies
from regimewise.protocol import Protocol
from regimewise.regime.learning import crossfit_folds, fold_regimes
from regimewise.survival.analysis import survival_analysis, survival_intervals, survival_values

REPOSITORY = Path(__file__).resolve().parents[1]
HORIZON = 730.0


def protocol() -> Protocol:
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["survival"] = {"horizon_days": HORIZON, "time_points": [365], "dropout_model": True}
    return Protocol.model_validate(raw)


def truths(n: int, seed: int) -> dict:
    regimes = {
        "usual_care": "usual_care",
        **{f"always_{a}": always(a) for a in ("hold", "step_down", "step_up", "add_agent")},
    }
    return {
        name: true_survival(regime, [HORIZON], HORIZON, n=n, seed=seed, confounding_strength=0.0)
        for name, regime in regimes.items()
    }


def learned_truths(decisions, p: Protocol, pairs, n: int, seed: int) -> dict:
    """True S(horizon) and RMST of the learned regime and of every strategy of the protocol's ``strategies``
    section (partial adoption, override, incremental odds; the headline among them) as the cohort's analysis
    defines them: the episode-weighted mean over cross-fitting folds of the rule learned without each fold
    (``pairs``, :func:`regimewise.regime.learning.fold_regimes`; the data-adaptive target of the cross-fitted
    estimate; common random numbers across folds and strategies)."""
    first = decisions["step"].to_numpy() == 0
    shares = [float(np.sum(rows & first) / np.sum(first)) for rows, _ in pairs]
    makers = {"learned": lambda learned: learned}
    for s in protocol_strategies(p.strategies):
        makers[s.name] = lambda learned, s=s: simulator_strategy(s, learned)
    out = {}
    for name, make in makers.items():
        parts = [
            true_survival(make(learned), [HORIZON], HORIZON, n=n, seed=seed, confounding_strength=0.0)
            for _, learned in pairs
        ]
        out[name] = {
            "survival": sum(w * t.survival[0] for w, t in zip(shares, parts)),
            "rmst": sum(w * t.rmst for w, t in zip(shares, parts)),
        }
    return out


def held_from(decisions, p: Protocol, folds, pairs) -> HeldRegime:
    """The cross-fitted regime as :func:`regimewise.bootstrap.replicates.held_regime` holds it, built from the fold
    regimes already learned (the same computation as :func:`regimewise.regime.learning.cross_fitted_regime`)."""
    recommended = np.empty(len(decisions), dtype=np.int64)
    q = np.empty((len(decisions), len(p.actions)))
    for rows, learned in pairs:
        part = decisions.loc[rows].reset_index(drop=True)
        recommended[rows] = learned.recommend(part)
        q[rows] = learned.q_values(part)
    return HeldRegime(recommended, q, folds)


def one_cohort(seed: int, args, p: Protocol) -> dict:
    """The survival stage's point estimates and bootstrap limits on one simulated cohort.

    The replicates are the bootstrap shards' (``bootstrap_regime: fixed``, the protocol's default): patients
    resampled within their cross-fitting folds, usual care and the dropout model refitted, the learned fold
    regimes held fixed (:func:`regimewise.bootstrap.replicates.run_replicate` without the value estimators, to
    keep the benchmark's cost to the survival part).
    """
    sim = simulate_cohort(args.episodes, seed=seed, confounding_strength=0.0)
    decisions, episodes = sim.decisions, sim.episodes
    folds = crossfit_folds(decisions, p)
    pairs = fold_regimes(decisions, p, folds)
    held = held_from(decisions, p, folds, pairs)
    proba, recommended, q, _ = fit_replicate(decisions, p, held)
    point = survival_analysis(decisions, episodes, proba, recommended, p, q)
    if args.only_adequate and not _adequate(point, args.only_adequate):
        return {"seed": seed, "screened_out": args.only_adequate}
    groups, replicates = patient_groups(decisions), []
    strata = np.array([held.folds[g[0]] for g in groups])
    for r in range(args.replicates):
        draws = draw_patients(groups, stream_rng(seed, "bootstrap", r), len(groups), strata)
        resample = resample_frame(decisions, draws)
        sub = resample_episodes(episodes, resample)
        try:
            rp, rr, rq, _ = fit_replicate(resample, p, held.at(np.concatenate(draws)))
            replicates.append(survival_values(resample, sub, rp, rr, p, rq))
        except Exception as err:  # a resample the models cannot fit: counted, as the workflow does
            print(f"  cohort {seed} replicate {r} failed: {str(err).splitlines()[0]}", file=sys.stderr)
    limits = survival_intervals(point, replicates, p)["strategies"]
    out = {"seed": seed, "truth": learned_truths(decisions, p, pairs, args.learned_truth_episodes, seed + 1)}
    for row in point["strategies"]:
        name = row["name"]
        out[name] = {
            "survival": row["at_times"]["survival"][-1],
            "rmst": row["at_times"]["rmst"],
            "survival_interval": [limits[name]["survival"]["low"][-1], limits[name]["survival"]["high"][-1]],
            "rmst_interval": [limits[name]["rmst"]["low"], limits[name]["rmst"]["high"]],
            "reliable": row["diagnostics"]["unreliable_from"] is None,
        }
    return out


def _adequate(point: dict, name: str) -> bool:
    """Whether strategy ``name``'s effective sample stays adequate to the horizon in a cohort's point estimate."""
    rows = [row for row in point["strategies"] if row["name"] == name]
    if not rows:
        names = [row["name"] for row in point["strategies"]]
        raise SystemExit(f"--only-adequate {name}: no such strategy (one of {', '.join(names)})")
    return rows[0]["diagnostics"]["unreliable_from"] is None


def summarise(results: list[dict], truth: dict) -> None:
    """Per strategy: cohorts with an adequate ESS to the horizon, bias, RMSE and coverage among them.

    Fixed strategies and usual care have one truth; the learned regime and the strategies built from it have their
    cohort's own (:func:`learned_truths`).
    """
    print(
        f"{'strategy':22s} {'adequate':>8s} {'flagged':>7s} {'S(h) bias':>9s} {'RMSE':>7s} {'cover':>6s} "
        f"{'RMST bias':>9s} {'RMSE':>6s} {'cover':>6s}"
    )
    for name in [k for k in results[0] if k not in ("truth", "seed")]:
        pairs = [(r[name], truth.get(name) or r["truth"].get(name)) for r in results]
        good = [(row, t) for row, t in pairs if row["reliable"] and row["survival"] is not None]
        flagged = len(pairs) - len(good)
        if not good or good[0][1] is None:
            print(f"{name:22s} {len(good):8d} {flagged:7d}   (no truth or no cohort with an adequate ESS)")
            continue
        s_true = np.array([_at(t, "survival") for _, t in good])
        m_true = np.array([_at(t, "rmst") for _, t in good])
        s = np.array([row["survival"] for row, _ in good]) - s_true
        m = np.array([row["rmst"] for row, _ in good]) - m_true
        cs = np.mean([_covers(row["survival_interval"], v) for (row, _), v in zip(good, s_true)])
        cm = np.mean([_covers(row["rmst_interval"], v) for (row, _), v in zip(good, m_true)])
        se = np.sqrt(cs * (1 - cs) / len(good))
        print(
            f"{name:22s} {len(good):8d} {flagged:7d} {s.mean():9.4f} {np.sqrt(np.mean(s**2)):7.4f} {cs:6.1%} "
            f"{m.mean():9.2f} {np.sqrt(np.mean(m**2)):6.2f} {cm:6.1%}   (MCSE of S(h) coverage {se:.1%})"
        )


def _at(t, key: str) -> float:
    """A truth's value: a TrueSurvival (fixed strategies) or a dict (cohort-specific truths)."""
    if isinstance(t, dict):
        return float(t[key])
    return float(t.survival[0]) if key == "survival" else float(t.rmst)


def _covers(interval, value) -> bool:
    low, high = interval
    return low is not None and low <= value <= high


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohorts", type=int, default=100)
    parser.add_argument("--episodes", type=int, default=3000)
    parser.add_argument("--replicates", type=int, default=50)
    parser.add_argument("--truth-episodes", type=int, default=200_000)
    parser.add_argument(
        "--learned-truth-episodes",
        type=int,
        default=20_000,
        help="simulated episodes per fold regime for the truths of the learned regime and the strategies built from it",
    )
    parser.add_argument("--results", type=Path, help="append each cohort's result (JSON lines); resume from it")
    parser.add_argument(
        "--first-seed", type=int, default=1000, help="seed of the first cohort (cohort i has seed first + i)"
    )
    parser.add_argument(
        "--only-adequate",
        metavar="STRATEGY",
        help="bootstrap only the cohorts where STRATEGY's effective sample is adequate to the horizon (the others "
        "are screened out after their point estimate and counted): coverage conditional on an adequate ESS, at a "
        "fraction of the cost when the strategy is rarely adequate",
    )
    args = parser.parse_args(argv)
    p = protocol()
    started = time.time()
    truth = truths(args.truth_episodes, seed=999)
    done = (
        [json.loads(line) for line in args.results.read_text().splitlines()]
        if args.results and args.results.exists()
        else []
    )
    for seed in range(len(done), args.cohorts):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = one_cohort(args.first_seed + seed, args, p)
        done.append(result)
        if args.results:
            with args.results.open("a") as stream:
                stream.write(json.dumps(result, sort_keys=True) + "\n")
        print(f"cohort {seed + 1}/{args.cohorts} done ({time.time() - started:.0f} s)", flush=True)
    print(
        f"\n{args.cohorts} cohorts x {args.episodes} episodes, {args.replicates} replicates each, strength 0, "
        f"horizon {HORIZON:g} days; truths from {args.truth_episodes} simulated episodes; {time.time() - started:.0f} s"
    )
    screened = [r for r in done if "screened_out" in r]
    kept = [r for r in done if "screened_out" not in r]
    if args.only_adequate:
        print(
            f"{len(screened)} of {len(done)} cohorts screened out ({args.only_adequate}'s ESS below the rule); the "
            f"{len(kept)} bootstrapped cohorts are those where it is adequate, so every figure below is conditional "
            "on that"
        )
    if not kept:
        print("no cohort was bootstrapped")
        return 1
    summarise(kept, truth)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
