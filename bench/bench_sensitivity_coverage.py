"""Benchmark: do the confounding bounds cover the learned regime's true value when a hidden confounder acts?

For each of ``--cohorts`` cohorts simulated with hidden frailty (confounding strength ``--strength``), the
simulator reports the Γ its frailty induces (:func:`regimewise.demo.truth.induced_gamma`: the largest odds ratio
between the true usual-care probability with and without the frailty). The demo protocol's regime is learned
(pessimism off unless ``--pessimism``, to keep the cost down), and ``--replicates`` patient-bootstrap
replicates refit usual care, the Q-models and the regime (:func:`regimewise.bootstrap.replicates.resample_patients` with
the package's per-replicate seeds). At that Γ, the sharp bounds of the regime's weighted importance-sampling
value (Zhao, Small & Bhattacharya 2019) give the percentile-bootstrap interval [α/2 quantile of the
replicates' lower bounds, 1 − α/2 quantile of their upper bounds] — the interval the sensitivity stage reports.
The regime is evaluated as the workflow evaluates it, cross-fitted by patient (``evaluation.cross_fit_folds``),
so the truth is the episode-weighted mean Monte Carlo value of the fold regimes (the data-adaptive target);
coverage of the true value of the regime learned from all patients is printed beside it.

Printed: the coverage of that interval (target of issue 7: at least 95%), its mean width, and beside it the
coverage of the unadjusted (Γ = 1) percentile interval of the same estimator, which hidden confounding is
expected to push below 95%. With C cohorts a coverage near 95% is known to about ±sqrt(0.05·0.95/C).

Full size (several hours on 2 cores):
    python bench/bench_sensitivity_coverage.py --cohorts 100 --episodes 3000 --replicates 200
Invented simulator, research use only, not medical advice.
"""

from __future__ import annotations

import argparse
import os
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

REPOSITORY = Path(__file__).resolve().parents[1]

from regimewise.bootstrap.replicates import (  # noqa: E402
    patient_groups,
    replicate_rng,
    resample_patients,
)
from regimewise.data.records import clean_decisions  # noqa: E402
from regimewise.demo.simulate import simulate_cohort  # noqa: E402
from regimewise.demo.truth import induced_gamma, true_value  # noqa: E402
from regimewise.protocol import load_protocol  # noqa: E402
from regimewise.regime.learning import (  # noqa: E402
    cross_fitted_recommendations,
    crossfit_folds,
    fold_regimes,
    learn_regime,
)
from regimewise.sensitivity.analysis import regime_curve  # noqa: E402
from regimewise.usual_care.fitting import fit_usual_care  # noqa: E402


def parse(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohorts", type=int, default=100)
    parser.add_argument("--episodes", type=int, default=3000)
    parser.add_argument("--replicates", type=int, default=200)
    parser.add_argument("--strength", type=float, default=1.0, help="confounding strength of the simulator")
    parser.add_argument("--truth-episodes", type=int, default=20_000)
    parser.add_argument("--pessimism", type=float, default=0.0, help="k of the pessimistic ranking (0 = off)")
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    return parser.parse_args(argv)


def bench_protocol(args):
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    p = pf.protocol
    constraints = p.constraints.model_copy(update={"pessimism": args.pessimism})
    return pf, p.model_copy(update={"constraints": constraints})


def evaluated_bounds(decisions, protocol, gammas):
    """Bounds at each Γ (array (len, 2)) and ESS of the learned regime as the workflow evaluates it (cross-fitted)."""
    proba = fit_usual_care(decisions, protocol).record_proba
    recommended = cross_fitted_recommendations(decisions, proba, protocol)
    curve = regime_curve(decisions, proba, recommended, protocol, gammas=gammas)
    return curve["bounded"], curve["ess"]


def true_values(decisions, protocol, seed, args):
    """True value of the regime learned from all patients, and the episode-weighted mean true value of the
    cross-fitted fold regimes (what the cross-fitted estimate targets)."""

    def truth(learned):
        return true_value(learned, n=args.truth_episodes, seed=700_000 + seed, confounding_strength=args.strength).value

    full = truth(learn_regime(decisions, protocol))
    folds = crossfit_folds(decisions, protocol)
    if folds is None:
        return full, full
    first = decisions["step"].to_numpy() == 0
    folded = sum(np.mean(rows[first]) * truth(learned) for rows, learned in fold_regimes(decisions, protocol, folds))
    return full, folded


def one_cohort(job):
    seed, args = job
    pf, protocol = bench_protocol(args)
    cohort = simulate_cohort(args.episodes, seed=seed, confounding_strength=args.strength)
    decisions = clean_decisions(pf, cohort.decisions)
    gamma = induced_gamma(cohort).maximum
    gammas = [1.0, gamma]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        point, ess = evaluated_bounds(decisions, protocol, gammas)
        groups = patient_groups(decisions)
        draws = []
        for r in range(args.replicates):
            resample = resample_patients(decisions, groups, replicate_rng(protocol.seed + seed, r), len(groups))
            try:
                draws.append(evaluated_bounds(resample, protocol, gammas)[0])
            except Exception as err:  # a resample the models cannot be fitted to is skipped, as in the workflow
                print(f"cohort {seed} replicate {r} skipped: {str(err).splitlines()[0]}", flush=True)
        full, folded = true_values(decisions, protocol, seed, args)
    draws = np.stack(draws)
    limits = {
        name: (np.nanquantile(draws[:, i, 0], 0.025), np.nanquantile(draws[:, i, 1], 0.975))
        for i, name in enumerate(["unadjusted", "bounds"])
    }
    return {
        "seed": seed,
        "gamma": gamma,
        "truth": folded,
        "truth_full": full,
        "point": point[0, 0],
        "limits": limits,
        "ess": ess,
        "replicates": len(draws),
    }


def main(argv=None):
    args = parse(argv)
    started = time.perf_counter()
    print(
        f"size run: {args.cohorts} cohorts x {args.episodes} episodes, {args.replicates} replicates, strength "
        f"{args.strength}, truth on {args.truth_episodes} episodes, pessimism k={args.pessimism}, "
        f"{args.workers} workers",
        flush=True,
    )
    jobs = [(seed, args) for seed in range(1, args.cohorts + 1)]
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        results = []
        for res in pool.map(one_cohort, jobs):
            results.append(res)
            u, b = res["limits"]["unadjusted"], res["limits"]["bounds"]
            print(
                f"cohort {res['seed']:3d} induced gamma {res['gamma']:.2f} truth {res['truth']:8.3f} "
                f"WIS {res['point']:8.3f} (ESS {res['ess']:5.1f}) unadjusted [{u[0]:8.3f}, {u[1]:8.3f}] "
                f"bounds [{b[0]:8.3f}, {b[1]:8.3f}]",
                flush=True,
            )
    print()
    gammas = np.array([r["gamma"] for r in results])
    ess = np.array([r["ess"] for r in results])
    print(f"induced gamma: median {np.median(gammas):.2f}, range {gammas.min():.2f} to {gammas.max():.2f}")
    print(
        f"ESS of the learned regime's weighted value: median {np.median(ess):.1f}, range {ess.min():.1f} to "
        f"{ess.max():.1f} (a small ESS makes every interval here wide; read the coverage with it)"
    )
    ok = True
    for name in ["unadjusted", "bounds"]:
        lo = np.array([r["limits"][name][0] for r in results])
        hi = np.array([r["limits"][name][1] for r in results])
        finite = np.isfinite(lo) & np.isfinite(hi)
        covers = {}
        for target in ("truth", "truth_full"):
            truth = np.array([r[target] for r in results])
            covers[target] = (finite & (lo <= truth) & (truth <= hi)).mean()
        coverage = covers["truth"]
        se = np.sqrt(coverage * (1 - coverage) / len(results))
        line = (
            f"{name:10s} coverage {100 * coverage:5.1f}% (MC se {100 * se:.1f}) of the fold regimes' mean true "
            f"value, {100 * covers['truth_full']:5.1f}% of the full-data regime's; mean width "
            f"{np.mean(hi[finite] - lo[finite]):.3f}; {int((~finite).sum())} cohorts without a finite interval"
        )
        if name == "bounds":
            ok = coverage >= 0.95
            line += f" -> {'PASS' if ok else 'FAIL'} (target >= 95%)"
        print(line)
    print(f"elapsed {time.perf_counter() - started:.0f} s")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
