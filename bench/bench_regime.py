"""Benchmark: how much of the attainable gain over usual care does the learned regime capture?

For each seed, a cohort of ``--episodes`` episodes without hidden confounding (strength 0) is simulated, the
demo protocol's usual-care model and regime are learned with each Q-model (linear, gradient boosting), and the
learned regime's true value is computed by Monte Carlo in the simulator. The yardstick is the best member of the
simulator's documented family of threshold rules (:class:`regimewise.demo.truth.ThresholdRule`), found by grid
search on true values with one seed and re-valued with another (to avoid the winner's curse). The ratio is

    (V(learned) − V(usual care)) / (V(best threshold rule) − V(usual care)),

all true values on the same simulated patients (common random numbers). The regime learned is the protocol's,
with its support constraint and clinical rules; pessimism is switched off unless ``--pessimism`` is given (the
bootstrap ensemble multiplies the boosting cost by its size). Clinical-rule violations are counted at every
decision of the true-value rollouts (target: 0). Target of issue 5: mean ratio >= 0.8 for each Q-model.

Full size (about 20 minutes on 2 cores):  python bench/bench_regime.py --seeds 20
Invented simulator, research use only, not medical advice.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import numpy as np

REPOSITORY = Path(__file__).resolve().parents[1]

from regimewise.core.features import QFeatures  # noqa: E402
from regimewise.data.records import clean_decisions  # noqa: E402
from regimewise.demo.simulate import simulate_cohort  # noqa: E402
from regimewise.demo.truth import best_threshold_rule, true_value  # noqa: E402
from regimewise.errors import StatisticalWarning  # noqa: E402
from regimewise.protocol import load_protocol  # noqa: E402
from regimewise.regime.clinical_rules import ClinicalRuleSet  # noqa: E402
from regimewise.regime.learning import LearnedRegime, fit_q_learning  # noqa: E402
from regimewise.usual_care.fitting import fit_usual_care  # noqa: E402


def protocol_for(base, kind, pessimism, basis=None):
    q = base.q_model.model_copy(update={"kind": kind, "basis": basis or base.q_model.basis})
    c = base.constraints.model_copy(update={"pessimism": pessimism})
    return base.model_copy(update={"q_model": q, "constraints": c})


class CountingRegime:
    """Wrap a regime and count the clinical-rule violations of its recommendations."""

    def __init__(self, regime, rules):
        self.regime, self.rules = regime, rules
        self.decisions = self.violations = 0

    def __call__(self, frame):
        codes = self.regime(frame)
        self.decisions += len(frame)
        self.violations += int(self.rules.violations(frame, codes).sum())
        return codes


def learn(pf, decisions, protocol):
    usual = fit_usual_care(decisions, protocol)
    features = QFeatures.from_protocol(usual.scaler, protocol)
    safeguards = "pessimistic" if protocol.constraints.pessimism > 0 else "rules"
    fqi = fit_q_learning(decisions, usual.record_proba, protocol, features, safeguards=safeguards)
    return LearnedRegime(usual, features, fqi, protocol.action_labels, ClinicalRuleSet.from_protocol(protocol))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--episodes", type=int, default=5000)
    parser.add_argument("--truth-n", type=int, default=20_000, help="Monte Carlo episodes per true value")
    parser.add_argument("--q-models", nargs="+", default=["linear", "gradient_boosting"])
    parser.add_argument(
        "--basis",
        choices=["linear", "quadratic", "cubic"],
        default=None,
        help="basis of the linear Q-model (default: the protocol's)",
    )
    parser.add_argument("--pessimism", type=float, default=0.0, help="k of the pessimistic ranking (0 = off)")
    args = parser.parse_args(argv)
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    rules = ClinicalRuleSet.from_protocol(pf.protocol)
    started = time.perf_counter()
    search = best_threshold_rule(n=args.truth_n, seed=900_001, confounding_strength=0.0)
    print(
        f"size run: {args.seeds} seeds x {args.episodes} episodes, true values on {args.truth_n} episodes, "
        f"Q-models {args.q_models}, basis {args.basis or pf.protocol.q_model.basis}, pessimism k={args.pessimism}"
    )
    print(f"best threshold rule (grid of {len(search.values)}, search seed 900001): {search.best}")
    ratios = {kind: [] for kind in args.q_models}
    violations = {kind: [0, 0] for kind in args.q_models}
    for seed in range(1, args.seeds + 1):
        cohort = simulate_cohort(args.episodes, seed=seed, confounding_strength=0.0)
        decisions = clean_decisions(pf, cohort.decisions)
        truth_seed = 500_000 + seed
        usual = true_value("usual_care", n=args.truth_n, seed=truth_seed, confounding_strength=0.0).value
        reference = true_value(search.best, n=args.truth_n, seed=truth_seed, confounding_strength=0.0).value
        for kind in args.q_models:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", StatisticalWarning)
                regime = CountingRegime(
                    learn(pf, decisions, protocol_for(pf.protocol, kind, args.pessimism, args.basis)), rules
                )
            learned = true_value(regime, n=args.truth_n, seed=truth_seed, confounding_strength=0.0).value
            ratios[kind].append((learned - usual) / (reference - usual))
            violations[kind][0] += regime.violations
            violations[kind][1] += regime.decisions
            print(
                f"seed {seed:2d} {kind:18s} usual {usual:8.3f} reference {reference:8.3f} learned {learned:8.3f} "
                f"ratio {ratios[kind][-1]:.3f} violations {regime.violations}",
                flush=True,
            )
    print()
    ok = True
    for kind in args.q_models:
        r = np.asarray(ratios[kind])
        rate = violations[kind][0] / max(violations[kind][1], 1)
        passed = r.mean() >= 0.8 and violations[kind][0] == 0
        ok &= passed
        print(
            f"{kind:18s} ratio mean {r.mean():.3f} sd {r.std(ddof=1) if r.size > 1 else float('nan'):.3f} "
            f"min {r.min():.3f} max {r.max():.3f} over {r.size} seeds; rule-violation rate {rate:.4f} "
            f"({violations[kind][0]} of {violations[kind][1]} decisions) -> {'PASS' if passed else 'FAIL'}"
        )
    print(f"elapsed {time.perf_counter() - started:.0f} s")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
