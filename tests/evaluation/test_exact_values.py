"""Every estimator recovers every strategy's value exactly on records whose value is known exactly (issue 15).

The records are a complete factorial design of a two-decision study: one binary state whose column is named ``L``
(upper case, mapped by the protocol), two actions, no ``patient_id`` and no ``day`` column. Each combination of
first state, first action and second action occurs equally often, the next state and the rewards are
deterministic, so usual care is exactly a fair coin in every state and the records' empirical distribution is the
true distribution of the coin-flipping usual care. Under these conditions:

* the usual-care logit's maximum-likelihood fit is 0.5 everywhere (the score equations hold at zero coefficients
  when every state-by-step cell is balanced),
* the importance-weighted estimators are averages over the complete design, i.e. exact expectations (the
  identity E_b[W·G] = E_π[G], Precup, Sutton & Singh 2000, holds sample by sample here),
* the outcome models are saturated (an intercept and a binary state per step and action), so fitted-Q evaluation
  and the doubly robust estimators are exact,
* fitted-Q iteration learns the optimal rule.

The truths are computed independently below by enumerating every path of the little decision process (backward
induction for the optimal rule), not by any code of the package.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from support.tiny import write_tiny

from regimewise.data.validate import validate_records
from regimewise.estimators import ESTIMATORS
from regimewise.evaluation.values import evaluate_all
from regimewise.protocol import load_protocol
from regimewise.regime.learning import learn_regime
from regimewise.usual_care.fitting import fit_usual_care

ACTIONS = ("hold", "up")
# rewards by (state, action); "up" flips the state, "hold" keeps it
FIRST_REWARD = {(0, "hold"): 0.0, (0, "up"): 1.5, (1, "hold"): -1.0, (1, "up"): 0.5}
SECOND_REWARD = {(0, "hold"): 2.0, (0, "up"): 0.0, (1, "hold"): -2.0, (1, "up"): 1.0}
COPIES = 5


def next_state(state: int, action: str) -> int:
    return 1 - state if action == "up" else state


def records() -> pd.DataFrame:
    rows = []
    for copy, (first, a0, a1) in itertools.product(range(COPIES), itertools.product((0, 1), ACTIONS, ACTIONS)):
        episode = f"E{copy}-{first}-{a0}-{a1}"
        second = next_state(first, a0)
        rows.append({"episode_id": episode, "step": 0, "L": first, "action": a0, "reward": FIRST_REWARD[first, a0]})
        rows.append({"episode_id": episode, "step": 1, "L": second, "action": a1, "reward": SECOND_REWARD[second, a1]})
    return pd.DataFrame(rows)


def protocol() -> dict:
    return {
        "study": {
            "title": "Exact values",
            "question": "Do the estimators recover them?",
            "version": "1",
            "run_name": "exact",
        },
        "data": {"decisions": "decisions.csv"},
        "states": [{"name": "L", "label": "A binary state", "kind": "binary", "plausible_range": [0, 1]}],
        "actions": [{"label": a, "description": a} for a in ACTIONS],
        "reward": {"description": "made-up deterministic reward"},
        "horizon": 2,
        "seed": 3,
        "behaviour_model": {"folds": 1},
        "q_model": {"ridge_alpha": 0.0},
        "constraints": {"pessimism": 0.0},
        "evaluation": {
            "estimators": [name for name in ESTIMATORS],
            "fqe_ridge_alpha": 0.0,
            "cross_fit_folds": 1,
            "replicates": 0,
        },
        "strategies": {"partial_adoption": [0.5], "headline": {"family": "partial_adoption", "value": 0.5}},
    }


def true_value(policy) -> float:
    """E[r0 + r1] under ``policy(step, state, action) -> probability``, the first state a fair coin."""
    total = 0.0
    for first, a0, a1 in itertools.product((0, 1), ACTIONS, ACTIONS):
        second = next_state(first, a0)
        p = 0.5 * policy(0, first, a0) * policy(1, second, a1)
        total += p * (FIRST_REWARD[first, a0] + SECOND_REWARD[second, a1])
    return total


def optimal_rule() -> dict:
    """Backward induction: the best action at each (step, state)."""
    second = {s: max(ACTIONS, key=lambda a, s=s: SECOND_REWARD[s, a]) for s in (0, 1)}
    v1 = {s: SECOND_REWARD[s, second[s]] for s in (0, 1)}
    first = {s: max(ACTIONS, key=lambda a, s=s: FIRST_REWARD[s, a] + v1[next_state(s, a)]) for s in (0, 1)}
    return {(0, s): first[s] for s in (0, 1)} | {(1, s): second[s] for s in (0, 1)}


def deterministic(rule):
    return lambda step, state, action: float(rule(step, state) == action)


@pytest.fixture(scope="module")
def values(tmp_path_factory):
    folder = tmp_path_factory.mktemp("exact")
    pf = load_protocol(write_tiny(folder, protocol=protocol(), decisions=records()))
    decisions = validate_records(pf).decisions
    p = pf.protocol
    proba = fit_usual_care(decisions, p).record_proba
    learned = learn_regime(decisions, p)
    return proba, evaluate_all(
        decisions, proba, learned.recommend(decisions, proba), p, learned_q=learned.q_values(decisions)
    )


def test_usual_care_is_a_fair_coin(values):
    proba, _ = values
    np.testing.assert_allclose(proba, 0.5, atol=1e-8)


def test_every_estimator_recovers_every_value(values):
    _, result = values
    best = optimal_rule()
    assert best == {(0, 0): "up", (0, 1): "up", (1, 0): "hold", (1, 1): "up"}  # by hand from the reward tables
    coin = lambda step, state, action: 0.5  # noqa: E731
    truths = {
        "usual_care": true_value(coin),
        "always_hold": true_value(deterministic(lambda step, state: "hold")),
        "always_up": true_value(deterministic(lambda step, state: "up")),
        "learned": true_value(deterministic(lambda step, state: best[step, state])),
        "partial_adoption_0.5": true_value(
            lambda step, state, action: 0.5 * (best[step, state] == action) + 0.5 * coin(step, state, action)
        ),
    }
    # the same numbers by hand: usual care 0.5, always hold -0.5, always up 1.5, optimal 2.5, the mixture 1.5
    assert truths == pytest.approx(
        {"usual_care": 0.5, "always_hold": -0.5, "always_up": 1.5, "learned": 2.5, "partial_adoption_0.5": 1.5}
    )
    by_name = {r["name"]: r for r in result["regimes"]}
    for name, truth in truths.items():
        for estimator, estimate in by_name[name]["estimates"].items():
            assert estimate["value"] == pytest.approx(truth, abs=1e-6), (name, estimator)
