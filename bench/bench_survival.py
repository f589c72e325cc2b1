"""Survival under each strategy over simulated cohorts: bias, RMSE and interval coverage against the truth.

Each cohort comes from the invented demo simulator without hidden confounding (``--strength 0``, so the
clone–censor–weight assumptions hold). The survival stage's analysis runs on it as the workflow does (usual care
fitted by the protocol's model, the learned regime cross-fitted, the dropout model on), and ``--replicates``
patient-bootstrap replicates (every model refitted, :func:`regimewise.bootstrap.replicates.fit_replicate`) give the
percentile intervals. Truths: the simulator's potential event days under each fixed strategy and usual care
(:func:`regimewise.demo.truth.true_survival`, ``--truth-episodes`` simulated episodes with common random numbers).
The learned regime's truth would depend on the rule learned in each cohort; it is reported with its effective
sample only.

Prints, per strategy: cohorts whose effective sample stayed adequate to the horizon, bias and RMSE of survival at
the horizon and of the restricted mean survival time, and the coverage of their 95% intervals among those cohorts;
and how many cohorts flagged the strategy as unreliable. Target (issue 14): coverage >= 90% where the ESS is
adequate, and every strategy below the ESS rule flagged.

    python bench/bench_survival.py --cohorts 100 --episodes 3000 --replicates 50
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

from regimewise.bootstrap.replicates import fit_replicate, patient_groups, resample_episodes, resample_patients
from regimewise.core.seeds import stream_rng
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import always, true_survival
from regimewise.protocol import Protocol
from regimewise.survival.analysis import survival_analysis, survival_intervals, survival_values

REPOSITORY = Path(__file__).resolve().parents[1]
HORIZON = 730.0


def protocol() -> Protocol:
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["survival"] = {"horizon_days": HORIZON, "time_points": [365], "dropout_model": True}
    raw["constraints"]["pessimism"] = 0.0  # the learned regime only needs to exist here; keep replicates cheap
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


def one_cohort(seed: int, args, p: Protocol) -> dict:
    sim = simulate_cohort(args.episodes, seed=seed, confounding_strength=0.0)
    decisions, episodes = sim.decisions, sim.episodes
    proba, recommended, q, _ = fit_replicate(decisions, p)
    point = survival_analysis(decisions, episodes, proba, recommended, p, q)
    groups, replicates = patient_groups(decisions), []
    for r in range(args.replicates):
        resample = resample_patients(decisions, groups, stream_rng(seed, "bootstrap", r), len(groups))
        sub = resample_episodes(episodes, resample)
        try:
            rp, rr, rq, _ = fit_replicate(resample, p)
            replicates.append(survival_values(resample, sub, rp, rr, p, rq))
        except Exception as err:  # a resample the models cannot fit: counted, as the workflow does
            print(f"  cohort {seed} replicate {r} failed: {str(err).splitlines()[0]}", file=sys.stderr)
    limits = survival_intervals(point, replicates, p)["strategies"]
    out = {}
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


def summarise(results: list[dict], truth: dict) -> None:
    print(
        f"{'strategy':18s} {'adequate':>8s} {'flagged':>7s} {'S(h) bias':>9s} {'RMSE':>7s} {'cover':>6s} "
        f"{'RMST bias':>9s} {'RMSE':>6s} {'cover':>6s}"
    )
    for name in results[0]:
        rows = [r[name] for r in results]
        good = [r for r in rows if r["reliable"] and r["survival"] is not None]
        flagged = len(rows) - len(good)
        if name not in truth or not good:
            print(f"{name:18s} {len(good):8d} {flagged:7d}   (no truth or no cohort with an adequate ESS)")
            continue
        t = truth[name]
        s = np.array([r["survival"] for r in good]) - t.survival[0]
        m = np.array([r["rmst"] for r in good]) - t.rmst
        cs = np.mean(
            [lo is not None and lo <= t.survival[0] <= hi for lo, hi in (r["survival_interval"] for r in good)]
        )
        cm = np.mean([lo is not None and lo <= t.rmst <= hi for lo, hi in (r["rmst_interval"] for r in good)])
        print(
            f"{name:18s} {len(good):8d} {flagged:7d} {s.mean():9.4f} {np.sqrt(np.mean(s**2)):7.4f} {cs:6.1%} "
            f"{m.mean():9.2f} {np.sqrt(np.mean(m**2)):6.2f} {cm:6.1%}"
        )


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohorts", type=int, default=100)
    parser.add_argument("--episodes", type=int, default=3000)
    parser.add_argument("--replicates", type=int, default=50)
    parser.add_argument("--truth-episodes", type=int, default=200_000)
    parser.add_argument("--results", type=Path, help="append each cohort's result (JSON lines); resume from it")
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
            result = one_cohort(1000 + seed, args, p)
        done.append(result)
        if args.results:
            with args.results.open("a") as stream:
                stream.write(json.dumps(result, sort_keys=True) + "\n")
        print(f"cohort {seed + 1}/{args.cohorts} done ({time.time() - started:.0f} s)", flush=True)
    print(
        f"\n{args.cohorts} cohorts x {args.episodes} episodes, {args.replicates} replicates each, strength 0, "
        f"horizon {HORIZON:g} days; truths from {args.truth_episodes} simulated episodes; {time.time() - started:.0f} s"
    )
    summarise(done, truth)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
