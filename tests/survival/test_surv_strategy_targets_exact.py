"""The survival stage's clone tables, built from the strategies row by row (action codes, functions of the rows),
equal bit for bit the tables of the strategies' whole (n, K) probability matrices.

Every strategy of the demo protocol takes part: the learned regime, usual care, the fixed strategies, the
comparator and the named strategies (partial adoption, override when the gain is large, incremental odds), with a
random learned regime and random Q-values standing in for the regime stage's (the equality holds whatever they
are). The reference is :func:`regime_targets` without ``by_rows`` passed to :func:`clone_censor_weight` as before.
"""

import numpy as np
import pandas as pd
import pytest
import yaml
from support.tiny import REPOSITORY

from regimewise.demo.simulate import simulate_cohort
from regimewise.evaluation.values import regime_targets
from regimewise.protocol import Protocol
from regimewise.survival import clone_censor_weight, make_timeline
from regimewise.survival.analysis import USUAL_CARE, clone_tables, survival_inputs
from regimewise.usual_care.fitting import fit_usual_care


@pytest.fixture(scope="module")
def setting():
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["survival"] = {"horizon_days": 730, "time_points": [365], "dropout_model": False, "grace": 1}
    protocol = Protocol.model_validate(raw)
    sim = simulate_cohort(400, seed=5, confounding_strength=0.0)
    decisions = sim.decisions.copy()
    proba = fit_usual_care(decisions, protocol).record_proba
    rng = np.random.default_rng(5)
    k = len(protocol.action_labels)
    recommended = rng.integers(0, k, size=len(decisions))
    learned_q = rng.normal(scale=3.0, size=(len(decisions), k))
    return decisions, sim.episodes, proba, recommended, learned_q, protocol


def test_tables_from_rows_equal_tables_from_whole_matrices(setting):
    decisions, episodes, proba, recommended, learned_q, protocol = setting
    _, tables = clone_tables(decisions, episodes, proba, recommended, protocol, learned_q)
    frame, outcomes = survival_inputs(decisions, episodes, protocol)
    timeline = make_timeline(frame, outcomes, proba, protocol.survival.horizon_days)
    whole = list(regime_targets(decisions, proba, recommended, protocol, learned_q))
    names = []
    for (name, _, table), entry in zip(tables, whole, strict=True):
        assert name == entry["name"]
        target = None if name == USUAL_CARE else entry["target"]
        expected = clone_censor_weight(timeline, target, name=name, grace=protocol.survival.grace)
        pd.testing.assert_frame_equal(table.rows, expected.rows, check_exact=True)
        assert table.to_dict() == expected.to_dict()
        names.append((name, table.kind))
    kinds = dict(names)
    assert kinds["learned"] == kinds["guideline"] == "deterministic" and kinds[USUAL_CARE] == "natural course"
    assert sum(kind == "stochastic" for kind in kinds.values()) == 8  # the named strategies
