"""The learned regime's regret in the look-alike world: how far the rules learned from cohorts of the records' size
fall short of the best rule the protocol's learner finds when data are plentiful.

The world's optimal regime has no closed form (its states are continuous and its models fitted), so the reference
is the protocol's own learner (its Q-model, its support constraint and its clinical rules) fitted on
``reference_episodes`` episodes simulated from the world under usual care. It belongs to the class of rules the
protocol allows, so its true value is at most that of the class's best rule, and the regret measured against it
is, up to Monte Carlo error, a lower bound on the regret against that best rule: it is the price of the cohort's
size, not of the Q-model's form. A second reference, fitted on half as many episodes, shows whether the reference
has settled (their values should be close).

Each cohort's regret is the reference's true value minus the true value of the rules learned in that cohort (the
cross-fitted target, :func:`regimewise.selfcheck.cohort.run_cohort`), both from the cohort's own draws of the
world (common random numbers), so the difference is paired. Research use only.
"""

from __future__ import annotations

import numpy as np

from regimewise.core.seeds import stream
from regimewise.protocol import Protocol
from regimewise.regime.learning import learn_regime
from regimewise.selfcheck.cohort import LEARNED, USUAL_CARE, cohort_seeds
from regimewise.selfcheck.world import LookAlikeWorld


def reference_regimes(world: LookAlikeWorld, protocol: Protocol, episodes: int):
    """The reference rule, fitted on ``episodes`` simulated episodes, and its check fitted on half as many (each
    on its own draws of stream ``selfcheck_reference``). Both are fitted on episodes of the world without its hidden
    confounder, if it has one: the reference stands for the best rule, not for what the learner makes of confounded
    records (a rule that does not see the confounder has the same value in either world)."""
    world = world.with_confounder(1.0)
    full_seed, half_seed = (int(s) for s in stream(protocol.seed, "selfcheck_reference").generate_state(2))
    full = learn_regime(world.simulate(episodes, full_seed)[0], protocol)
    half = learn_regime(world.simulate(max(episodes // 2, 1), half_seed)[0], protocol)
    return full, half


def regret(world: LookAlikeWorld, protocol: Protocol, results: list[dict], episodes: int) -> tuple[dict, dict]:
    """The regret summary over the completed cohorts ``results`` and each cohort's row ({cohort: row}); (None, {})
    when the protocol learns no regime. The summary: the reference's size and values, the mean regret with its
    Monte Carlo SE (sample SD / √R; Morris, White & Crowther 2019, Table 6), its median and range, the share of the
    reference's gain over usual care that the learned rules reach, and the share of cohorts whose learned rules
    are worse than usual care."""
    completed = [r for r in results if LEARNED in r.get("truths", {})]
    if not protocol.analysis.learn_regime or not completed:
        return None, {}
    full, half = reference_regimes(world, protocol, episodes)
    rows = []
    for r in completed:
        truth_seed = cohort_seeds(protocol, r["cohort"])[1]
        value = float(world.returns(full, r["truth_episodes"], truth_seed).mean())
        rows.append(
            {
                "cohort": r["cohort"],
                "reference_value": value,
                "learned_value": r["truths"][LEARNED]["value"],
                "usual_care_value": r["truths"][USUAL_CARE]["value"],
                "regret": value - r["truths"][LEARNED]["value"],
            }
        )
    first = completed[0]
    half_value = float(world.returns(half, first["truth_episodes"], cohort_seeds(protocol, first["cohort"])[1]).mean())
    regrets = np.array([row["regret"] for row in rows])
    reference_gain = float(np.mean([row["reference_value"] - row["usual_care_value"] for row in rows]))
    learned_gain = float(np.mean([row["learned_value"] - row["usual_care_value"] for row in rows]))
    summary = {
        "reference_episodes": episodes,
        "cohorts": len(rows),
        "reference_value": float(np.mean([row["reference_value"] for row in rows])),
        "reference_check": {
            "episodes": max(episodes // 2, 1),
            "value": half_value,
            "full_value": rows[0]["reference_value"],
        },
        "mean_regret": float(regrets.mean()),
        "regret_mcse": float(regrets.std(ddof=1) / np.sqrt(regrets.size)) if regrets.size > 1 else None,
        "median_regret": float(np.median(regrets)),
        "min_regret": float(regrets.min()),
        "max_regret": float(regrets.max()),
        "reference_gain": reference_gain,
        "share_of_gain": learned_gain / reference_gain if reference_gain > 0 else None,
        "worse_than_usual_care": float(np.mean([row["learned_value"] < row["usual_care_value"] for row in rows])),
    }
    return summary, {row["cohort"]: row for row in rows}
