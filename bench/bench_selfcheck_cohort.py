"""Time one look-alike cohort of the self-check on the demo protocol: the world fitted on the committed demo cohort
(with its episodes table, so the survival part runs when the protocol has a survival section), then
:func:`regimewise.selfcheck.cohort.run_cohort` with the self-check's default sizes, one BLAS thread. Prints the
seconds of the fit and of the cohort, and whether the cohort carries the survival part.

    OMP_NUM_THREADS=1 python bench/bench_selfcheck_cohort.py --cohort 0

The acceptance run (`regimewise selfcheck config/protocol.yaml --cohorts 50`, 2 workers) costs about 50 / 2 times
the cohort's seconds, plus each worker's start (validation and the world's fit, about a second).
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

from threadpoolctl import threadpool_limits

from regimewise.data.validate import validate_records
from regimewise.protocol import load_protocol
from regimewise.selfcheck.cohort import run_cohort
from regimewise.selfcheck.world import fitted_world

PROTOCOL = Path(__file__).resolve().parents[1] / "config" / "protocol.yaml"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cohort", type=int, default=0)
    parser.add_argument("--replicates", type=int, default=50)
    parser.add_argument("--truth-episodes", type=int, default=100_000)
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    pf = load_protocol(PROTOCOL)
    records = validate_records(pf)
    start = time.perf_counter()
    world = fitted_world(records.decisions, pf.protocol, episodes=records.episodes)
    fitted = time.perf_counter()
    with threadpool_limits(limits=1):
        out = run_cohort(world, pf.protocol, args.cohort, args.replicates, args.truth_episodes)
    done = time.perf_counter()
    print(
        f"world fit {fitted - start:.1f} s; cohort {args.cohort}: {done - fitted:.1f} s "
        f"({args.replicates} replicates, {args.truth_episodes:,} truth episodes per policy; "
        f"survival part: {'yes' if 'survival' in out else 'no'})"
    )


if __name__ == "__main__":
    main()
