"""The learned regime against the simulator's truth (the demo scenario's own yardstick)."""

from __future__ import annotations

import numpy as np
import pytest
from support.tiny import REPOSITORY

from regimewise.data.records import check_decisions, clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import true_returns
from regimewise.protocol import load_protocol
from regimewise.regime.learning import learn_regime


@pytest.fixture(scope="module")
def learned():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    cohort = simulate_cohort(5000, seed=101, confounding_strength=0.0)
    assert check_decisions(pf, cohort.decisions, "simulated") == []
    return learn_regime(clean_decisions(pf, cohort.decisions), pf.protocol)


def test_learned_regime_beats_usual_care_in_truth(learned):
    # Exact comparison by Monte Carlo with common random numbers: the same simulated patients and noise under
    # both strategies, so the paired standard error is that of the mean per-episode difference.
    gain = true_returns(learned, n=20_000, seed=7, confounding_strength=0.0) - true_returns(
        "usual_care", n=20_000, seed=7, confounding_strength=0.0
    )
    se = gain.std(ddof=1) / np.sqrt(gain.size)
    assert gain.mean() > 3 * se
    assert gain.mean() > 0


def test_learned_regime_respects_the_support_threshold(learned):
    cohort = simulate_cohort(500, seed=202, confounding_strength=0.0)
    frame = cohort.decisions
    proba = learned.usual_care.predict_proba(frame)
    recommended = learned(frame)
    chosen = proba[np.arange(len(frame)), recommended]
    threshold = 0.05  # the demo protocol's support threshold
    fallback = (proba < threshold).all(axis=1)
    assert np.all((chosen >= threshold) | fallback)
