"""One fit of the usual-care model (multinomial logit) on a synthetic design, timed in this process.

    python bench/bench_usual_care_fit.py --rows 1200000 --newton blocks
    python bench/bench_usual_care_fit.py --rows 1200000 --newton statsmodels
    python bench/bench_usual_care_fit.py --rows 1200000 --floor-mixture

``blocks`` is the package's own Newton iteration over blocks of records; ``statsmodels`` swaps in statsmodels'
``MNLogit.fit(method="newton")`` on the whole design, the fit the package used before (issue 18). The design has
12 standard-normal covariates and 4 actions drawn from a multinomial logit with fixed coefficients (seed 0). It
prints CPU and wall seconds of the fit, the process's peak resident memory and its peak before the fit (the
design and the actions), the Newton steps, and the largest coefficient difference between the two fits when
``--check`` is given. ``--floor-mixture`` fits the logit mixed with an estimated even floor instead
(``behaviour_model.floor_mixture``, the demo protocol's setting): the plain logit first, then the mixture's own
Newton steps; the design then gets a floor of 5% of decisions spread over the actions. For ratios between the
two, run each as a whole process several times and pair them.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np
import statsmodels.api as sm
from threadpoolctl import threadpool_limits

from regimewise.usual_care import logit
from regimewise.usual_care.mixture import FloorMixtureLogitBehaviour


def statsmodels_newton(design, endog, method, maxiter):
    result = sm.MNLogit(endog, design).fit(method=method, maxiter=maxiter, disp=0, skip_hessian=True)
    retvals = result.mle_retvals
    return logit.MNLogitFit(np.asarray(result.params), bool(retvals["converged"]), retvals["iterations"])


def synthetic(rows: int):
    rng = np.random.default_rng(0)
    X = rng.normal(size=(rows, 12))
    coefficients = rng.normal(scale=0.5, size=(13, 3))
    linear = np.column_stack([np.zeros(rows), X @ coefficients[1:] + coefficients[0]])
    proba = np.exp(linear - linear.max(axis=1, keepdims=True))
    proba /= proba.sum(axis=1, keepdims=True)
    action = (proba.cumsum(axis=1) > rng.random(rows)[:, None]).argmax(axis=1)
    return X, action


def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kilobytes on Linux


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_200_000)
    parser.add_argument("--newton", choices=("blocks", "statsmodels"), default="blocks")
    parser.add_argument("--check", action="store_true", help="also fit the other way and print the difference")
    parser.add_argument("--floor-mixture", action="store_true", help="fit the logit mixed with an even floor")
    args = parser.parse_args(argv)
    X, action = synthetic(args.rows)
    if args.floor_mixture:  # 5% of decisions drawn evenly over the 4 actions (seed 1)
        rng = np.random.default_rng(1)
        even = rng.random(args.rows) < 0.05
        action = np.where(even, rng.integers(0, 4, args.rows), action)
    before = peak_mb()
    original = logit._run_mnlogit
    if args.newton == "statsmodels":
        logit._run_mnlogit = statsmodels_newton
    with threadpool_limits(limits=1):
        cpu, wall = time.process_time(), time.perf_counter()
        kind = FloorMixtureLogitBehaviour if args.floor_mixture else logit.MultinomialLogitBehaviour
        model = kind().fit(X, action, n_actions=4)
        cpu, wall = time.process_time() - cpu, time.perf_counter() - wall
    what = f"floor mixture (share {model.share_:.4f})" if args.floor_mixture else args.newton
    print(
        f"{what}: {args.rows:,} records x 12 covariates, 4 actions: fit {cpu:.1f} s CPU, {wall:.1f} s wall; "
        f"peak memory {peak_mb():,.0f} MB (before the fit {before:,.0f} MB); Newton steps {model.n_iter_}"
    )
    if args.check and not args.floor_mixture:
        logit._run_mnlogit = original if args.newton == "statsmodels" else statsmodels_newton
        other = logit.MultinomialLogitBehaviour().fit(X, action, n_actions=4)
        print(f"largest coefficient difference from the other fit: {np.abs(other.params_ - model.params_).max():.2e}")


if __name__ == "__main__":
    main()
