"""Usual care's probabilities (and the rewards) checked once for every regime's weighting against checked by each
weighting, as they were: the same weights bit for bit, and the same errors.

These are equivalence checks with no outside reference: the weighting that checks everything itself is the
reference, on small invented data and on a small simulated cohort."""

from __future__ import annotations

import numpy as np
import pytest
from support.tiny import REPOSITORY

from regimewise.core.arrays import check_proba
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import UserInputError
from regimewise.evaluation.ope import importance_weights
from regimewise.evaluation.values import LoggedDecisions, regime_targets, whole_target
from regimewise.protocol import load_protocol
from regimewise.regime.learning import learn_regime


def same_weights(a, b):
    return (
        a.cumulative.tobytes() == b.cumulative.tobytes()
        and a.reward.tobytes() == b.reward.tobytes()
        and a.n_following == b.n_following
    )


def test_weights_of_a_checked_usual_care_equal_those_that_check_it():
    rng = np.random.default_rng(0)
    lengths = rng.integers(1, 5, 80)
    step = np.concatenate([np.arange(m) for m in lengths])
    episode = np.repeat(np.arange(len(lengths)), lengths)
    behaviour = rng.dirichlet(np.ones(3), len(step))
    action = rng.integers(0, 3, len(step))
    reward = rng.normal(size=len(step))
    checked = check_proba(behaviour, len(step), 3, "behaviour_proba")
    for target in (np.eye(3)[rng.integers(0, 3, len(step))], rng.dirichlet(np.ones(3), len(step))):
        want = importance_weights(step, action, reward, episode, behaviour, target, horizon=4)
        got = importance_weights(step, action, reward, episode, checked, target, horizon=4, layout_checked=True)
        assert same_weights(got, want)


@pytest.fixture(scope="module")
def cohort():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    decisions = clean_decisions(pf, simulate_cohort(200, seed=8).decisions)
    learned = learn_regime(decisions, pf.protocol)
    proba = learned.usual_care.predict_proba(decisions)
    return decisions, proba, pf.protocol, learned.recommend(decisions, proba), learned.q_values(decisions)


def test_every_regimes_weights_equal_those_that_check_usual_care(cohort):
    decisions, proba, protocol, recommended, q = cohort
    logged = LoggedDecisions.from_frame(decisions, proba, protocol)
    assert logged.layout_checked
    for t in regime_targets(decisions, proba, recommended, protocol, q, by_rows=True):
        target = whole_target(t["target"], proba)
        kwargs = dict(horizon=protocol.horizon, action_labels=protocol.action_labels)
        want = importance_weights(*logged.weighting_table(), target, **kwargs)
        got = importance_weights(*logged.weighting_table(), target, **kwargs, layout_checked=True)
        assert same_weights(got, want), t["name"]


def weighting_error(decisions, proba, protocol):
    """The error the first weighting raised when it checked usual care's probabilities itself."""
    logged = LoggedDecisions.from_frame(decisions.assign(reward=0.0), np.full_like(proba, 0.25), protocol)
    table = (logged.step, logged.action, decisions["reward"].to_numpy(dtype=float), logged.episode, proba)
    with pytest.raises(UserInputError) as err:
        importance_weights(*table, np.full_like(proba, 0.25), horizon=protocol.horizon)
    return str(err.value)


@pytest.mark.parametrize("broken", ["row_sum", "negative", "nan", "reward"])
def test_the_check_done_once_raises_the_error_of_the_weighting(cohort, broken):
    decisions, proba, protocol, _, _ = cohort
    proba, decisions = proba.copy(), decisions.copy()
    if broken == "row_sum":
        proba[37] *= 1.01
    elif broken == "negative":
        proba[12, 1] = -0.1
    elif broken == "nan":
        proba[5, 2] = np.nan
    else:
        decisions.loc[decisions.index[9], "reward"] = np.inf
    want = weighting_error(decisions, proba, protocol)
    with pytest.raises(UserInputError) as got:
        LoggedDecisions.from_frame(decisions, proba, protocol)
    assert str(got.value) == want
