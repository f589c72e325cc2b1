"""Balance by step computed group by group gives the same bits as the plain computation.

Equivalence checks with no outside reference: the reference below is the earlier code of
``regimewise.describe.balance`` written out (every state's rows and weights selected afresh, the weights' sums
taken for every state), and the new code must reproduce its every number (JSON text: the shortest repr of a
float names its bits).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from support.tiny import REPOSITORY

from regimewise.core.features import action_codes
from regimewise.core.weighting import inverse_probability_weights
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.describe.balance import balance_by_step, state_columns, weighted_smd
from regimewise.protocol import load_protocol
from regimewise.usual_care.metrics import probability_of_taken


def _reference_moments(x, w, binary):
    x = np.asarray(x, dtype=float)
    w = np.asarray(w, dtype=float)
    mean = float(np.sum(w * x) / np.sum(w))
    if binary:
        return mean, mean * (1.0 - mean)
    denominator = np.sum(w) ** 2 - np.sum(w**2)
    if denominator <= 0:
        return mean, float("nan")
    return mean, float(np.sum(w) / denominator * np.sum(w * (x - mean) ** 2))


def _reference_smd(x1, x0, w1, w0, binary=False):
    if len(x1) < 2 or len(x0) < 2:
        return None
    m1, v1 = _reference_moments(x1, w1, binary)
    m0, v0 = _reference_moments(x0, w0, binary)
    spread = np.sqrt((v1 + v0) / 2.0)
    if np.isfinite(spread) and spread > 0:
        return float((m1 - m0) / spread)
    return 0.0 if spread == 0 and m1 == m0 else None


def _reference_state_balance(x, codes, weights, labels, binary):
    unweighted, weighted = {}, {}
    ref = codes == 0
    for k, label in enumerate(labels[1:], start=1):
        grp = codes == k
        unweighted[label] = _reference_smd(x[grp], x[ref], np.ones(grp.sum()), np.ones(ref.sum()), binary)
        weighted[label] = _reference_smd(x[grp], x[ref], weights[grp], weights[ref], binary)
    found = {"unweighted": unweighted, "weighted": weighted}
    sizes = {name: [abs(v) for v in smds.values() if v is not None] for name, smds in found.items()}
    return found | {f"max_abs_{name}": max(v) if v else None for name, v in sizes.items()}


def _reference_balance(decisions, proba, protocol):
    codes = action_codes(decisions, protocol.action_labels)
    weights = inverse_probability_weights(probability_of_taken(proba, codes))
    steps = decisions["step"].to_numpy()
    columns = [column for s in protocol.states for column in state_columns(decisions, s)]
    out = {}
    for t in np.unique(steps):
        rows = steps == t
        found = {
            c.name: _reference_state_balance(
                c.values[rows], codes[rows], weights[rows], protocol.action_labels, c.binary
            )
            for c in columns
        }
        out[str(int(t))] = {"decisions": int(rows.sum()), "states": found}
    return out


@pytest.mark.parametrize(("n_patients", "seed"), [(8, 1), (60, 2), (700, 3)])  # the small cohorts leave groups
def test_balance_by_step_has_the_numbers_of_the_plain_computation(n_patients, seed):  # of fewer than two
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    cohort = simulate_cohort(n_patients, seed=seed, confounding_strength=0.5)
    frame = clean_decisions(pf, cohort.decisions)
    new = balance_by_step(frame, cohort.behaviour_proba, pf.protocol)
    old = _reference_balance(frame, cohort.behaviour_proba, pf.protocol)  # the flag counts follow from the states
    assert json.dumps({t: {key: step[key] for key in ("decisions", "states")} for t, step in new.items()}) == (
        json.dumps(old)
    )


@pytest.mark.parametrize("binary", [False, True])
@pytest.mark.parametrize("seed", range(4))
def test_weighted_smd_has_the_bits_of_the_plain_computation(seed, binary):
    rng = np.random.default_rng(seed)
    x1, x0 = (rng.integers(0, 2, n).astype(float) if binary else rng.normal(size=n) for n in (50, 70))
    w1, w0 = rng.uniform(1, 9, 50), rng.uniform(1, 9, 70)
    for weights in ((w1, w0), (np.ones(50), np.ones(70)), (np.ones(50), np.r_[np.zeros(69), 1.0])):
        new, old = weighted_smd(x1, x0, *weights, binary), _reference_smd(x1, x0, *weights, binary)
        assert json.dumps(new) == json.dumps(old)
