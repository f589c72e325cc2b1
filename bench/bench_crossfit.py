"""Benchmark: cross-fitted gradient boosting versus the scikit-learn fits it is made of; recovery of the truth.

Part 1 (issue 4 target): on ``--decisions`` decisions with ``--folds`` folds split by patient, time
``regimewise.usual_care.crossfit.cross_fit_proba`` with :class:`GradientBoostingBehaviour` and, in the same run, the
``--folds`` bare ``HistGradientBoostingClassifier`` fits on the same training folds (plus their predictions
of the held-out fold). Prints the ratio; the target is at most 1.3.

Part 2: mean absolute error of the cross-fitted probabilities against the simulator's true usual-care
probabilities (``regimewise.demo.simulate.simulate_cohort(..., confounding_strength=0)``) for the logistic and the
boosting models.

Full size (issue 4)::

    python bench/bench_crossfit.py --decisions 1000000 --folds 5 --episodes 5000

The decisions of part 1 are synthetic (12 numeric covariates, 4 actions from a multinomial logit, 8 decisions
per patient): the timing concerns the fitting machinery, not the scenario. Both timings use the same number of
OpenMP threads (``--threads``, default 1 as in the package).
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from sklearn.ensemble import HistGradientBoostingClassifier
from threadpoolctl import threadpool_limits

from regimewise.core.folds import patient_folds
from regimewise.usual_care.boosting import GradientBoostingBehaviour
from regimewise.usual_care.crossfit import cross_fit_proba


def synthetic(n, seed):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 12))
    eta = np.column_stack([np.zeros(n), X[:, :3] @ rng.normal(size=(3, 3))])
    p = np.exp(eta - eta.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    action = (rng.random(n)[:, None] > np.cumsum(p, axis=1)).sum(axis=1)
    patients = np.arange(n) // 8
    return X, np.minimum(action, 3), patients


def time_crossfit(n, folds, max_iter, threads, seed=0):
    X, action, patients = synthetic(n, seed)
    fold = patient_folds(patients, folds, seed=seed)
    started = time.perf_counter()
    cross_fit_proba(
        lambda: GradientBoostingBehaviour(max_iter=max_iter, random_state=seed, n_threads=threads), X, action, 4, fold
    )
    ours = time.perf_counter() - started
    started = time.perf_counter()
    with threadpool_limits(limits=threads, user_api="openmp"):
        for k in range(folds):
            test = fold == k
            model = HistGradientBoostingClassifier(max_iter=max_iter, early_stopping=False, random_state=seed)
            model.fit(X[~test], action[~test]).predict_proba(X[test])
    bare = time.perf_counter() - started
    return ours, bare


def recovery(episodes, seed=17):
    from regimewise.data.records import clean_decisions
    from regimewise.demo.simulate import simulate_cohort
    from regimewise.protocol import load_protocol
    from regimewise.usual_care.fitting import fit_usual_care

    pf = load_protocol("config/protocol.yaml")
    cohort = simulate_cohort(episodes, seed=seed, confounding_strength=0.0)
    frame = clean_decisions(pf, cohort.decisions)
    out = {}
    for name, settings in (
        ("multinomial_logit (linear)", {"spline_states": []}),
        ("multinomial_logit (potassium spline)", {"spline_states": ["potassium"]}),
        ("gradient_boosting", {"kind": "gradient_boosting"}),
    ):
        spec = pf.protocol.behaviour_model.model_copy(update=settings)
        model = fit_usual_care(frame, pf.protocol.model_copy(update={"behaviour_model": spec}))
        out[name] = float(np.abs(model.record_proba - cohort.behaviour_proba).mean())
    return out


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--decisions", type=int, default=1_000_000)
    parser.add_argument("--folds", type=int, default=5)
    parser.add_argument("--max-iter", type=int, default=100)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--episodes", type=int, default=5000, help="simulated episodes for part 2 (0 skips it)")
    args = parser.parse_args()
    ours, bare = time_crossfit(args.decisions, args.folds, args.max_iter, args.threads)
    print(
        f"part 1: {args.decisions:,} decisions, {args.folds} folds, {args.max_iter} boosting rounds, "
        f"{args.threads} thread(s)"
    )
    print(f"  cross_fit_proba with GradientBoostingBehaviour: {ours:.1f} s")
    print(f"  {args.folds} bare HistGradientBoostingClassifier fits + predictions: {bare:.1f} s")
    ratio = ours / bare
    print(f"  ratio {ratio:.3f} (target <= 1.3: {'met' if ratio <= 1.3 else 'NOT met'})")
    if args.episodes:
        print(
            f"part 2: mean absolute error against the simulator's true probabilities, {args.episodes:,} episodes, "
            "confounding strength 0, out-of-fold probabilities"
        )
        for name, mae in recovery(args.episodes).items():
            print(f"  {name}: {mae:.4f}")


if __name__ == "__main__":
    main()
