"""A regime's shares of decisions unsupported and changed, read from the (n, K) probabilities built once for its
importance weights, against the shares built again from the regime's target a block of rows at a time, as they
were, bit for bit.

These are equivalence checks with no outside reference: the replaced computation (``row_mean`` of the target as
the evaluation keeps it) is the reference, on a small simulated cohort."""

from __future__ import annotations

import numpy as np
import pytest
from support.tiny import REPOSITORY

import regimewise.evaluation.values as values_module
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.evaluation.strategies import changed_by_row
from regimewise.evaluation.values import evaluate_all, regime_targets, row_mean, whole_target
from regimewise.evaluation.verdicts import unsupported_by_row
from regimewise.protocol import load_protocol
from regimewise.regime.learning import learn_regime


@pytest.fixture(scope="module")
def cohort():
    """Decisions, usual care, the demo protocol (with its strategies and comparators), the learned regime's
    recommendations and Q-values."""
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    protocol = pf.protocol.model_copy(
        update={"evaluation": pf.protocol.evaluation.model_copy(update={"estimators": ["pdwis", "wdr", "fqe"]})}
    )
    decisions = clean_decisions(pf, simulate_cohort(300, seed=5).decisions)
    learned = learn_regime(decisions, protocol)
    proba = learned.usual_care.predict_proba(decisions)
    return decisions, proba, protocol, learned.recommend(decisions, proba), learned.q_values(decisions)


def terms(protocol):
    threshold = protocol.constraints.support_threshold
    return [changed_by_row, lambda t, b: unsupported_by_row(t, b, threshold)]


def test_shares_of_the_whole_probabilities_equal_those_built_by_blocks(cohort, monkeypatch):
    decisions, proba, protocol, recommended, q = cohort
    monkeypatch.setattr(values_module, "SHARE_ROWS", 700)  # several blocks, the last one short
    assert len(decisions) % 700
    targets = list(regime_targets(decisions, proba, recommended, protocol, q, by_rows=True))
    assert {"learned", "usual_care", "guideline"} <= {t["name"] for t in targets} and len(targets) > 10
    for t in targets:
        whole = whole_target(t["target"], proba)
        for term in terms(protocol):
            assert row_mean(whole, proba, term).hex() == row_mean(t["target"], proba, term).hex(), t["name"]


def test_values_carry_the_shares_built_by_blocks(cohort):
    decisions, proba, protocol, recommended, q = cohort
    values = evaluate_all(decisions, proba, recommended, protocol, learned_q=q)
    targets = {t["name"]: t["target"] for t in regime_targets(decisions, proba, recommended, protocol, q, by_rows=True)}
    changed, unsupported = terms(protocol)
    seen = 0
    for r in values["regimes"]:
        target = targets[r["name"]]
        for estimate in r["estimates"].values():
            assert estimate["unsupported_share"] == row_mean(target, proba, unsupported), r["name"]
        if "share_changed" in r:
            seen += 1
            assert r["share_changed"] == row_mean(target, proba, changed), r["name"]
    assert seen > 8
    assert np.isfinite([r["share_changed"] for r in values["regimes"] if "share_changed" in r]).all()
