"""Clinical rules as structured conditions, and the promise that a learned regime never breaks them.

Sources: the conditions' meaning is checked on values worked out by hand; the property-based tests (hypothesis)
check the defining promise of the permitted set (clinical rules ∩ support constraint) on random states.
"""

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from pydantic import ValidationError
from support.tiny import REPOSITORY, tiny_protocol_dict

from regimewise.data.records import clean_decisions
from regimewise.demo.scenario import STATE_RANGES
from regimewise.demo.simulate import simulate_cohort
from regimewise.protocol import Protocol, StateCondition, load_protocol
from regimewise.regime.clinical_rules import (
    ClinicalRuleSet,
    condition_holds,
    describe_rule,
)
from regimewise.regime.learning import learn_regime
from regimewise.regime.permitted import constrained_choice

DEMO = load_protocol(REPOSITORY / "config" / "protocol.yaml")


def test_conditions_worked_by_hand():
    values = np.array([4.0, 5.5, 6.0])
    expected = {
        "below": [True, False, False],
        "at_most": [True, True, False],
        "above": [False, False, True],
        "at_least": [False, True, True],
    }
    for comparison, truth in expected.items():
        assert condition_holds(StateCondition(state="k", comparison=comparison, value=5.5), values).tolist() == truth
    assert condition_holds(StateCondition(state="k", comparison="in", values=[4, 6]), values).tolist() == [1, 0, 1]
    assert condition_holds(StateCondition(state="k", comparison="not_in", values=[4]), values).tolist() == [0, 1, 1]


def test_demo_rules_mask_worked_by_hand():
    rules = ClinicalRuleSet.from_protocol(DEMO.protocol)
    frame = pd.DataFrame({"potassium": [5.6, 4.0, 4.0, 5.5], "egfr": [60, 29.9, 60, 30], "therapy_level": [2, 1, 0, 0]})
    # actions: hold, step_down, step_up, add_agent
    expected = [[1, 1, 0, 0], [1, 1, 0, 0], [1, 0, 1, 1], [1, 0, 1, 1]]
    assert rules.permitted(frame).astype(int).tolist() == expected
    assert rules.violations(frame, np.array([2, 0, 1, 3])).tolist() == [True, False, True, False]
    assert describe_rule(DEMO.protocol.constraints.clinical_rules[0]) == "no step_up, add_agent when potassium > 5.5"


def test_intensity_limit_forbids_large_changes():
    d = tiny_protocol_dict()
    for action, intensity in zip(d["actions"], (0, 2, -1)):
        action["intensity"] = intensity
    d["constraints"] = {"max_intensity_change": 1}
    rules = ClinicalRuleSet.from_protocol(Protocol.model_validate(d))
    assert rules.permitted(pd.DataFrame({"bp": [120.0]})).tolist() == [[True, False, True]]


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda d: d["constraints"]["clinical_rules"][0].update(forbid=["fly"]), "not a declared action or state"),
        (lambda d: d["constraints"]["clinical_rules"][0]["when"][0].update(state="weight"), "not a declared"),
        (lambda d: d["constraints"]["clinical_rules"][0]["when"][0].update(values=[1.0]), "takes 'value'"),
        (lambda d: d["constraints"]["clinical_rules"][0]["when"][0].update(comparison="in"), "takes 'values'"),
        (lambda d: d["constraints"]["clinical_rules"][0]["when"][0].update(comparison="eval"), "comparison"),
        (lambda d: d["constraints"].update(max_intensity_change=1), "needs an intensity"),
        (lambda d: d["constraints"]["clinical_rules"].append(dict(d["constraints"]["clinical_rules"][0])), "twice"),
    ],
)
def test_malformed_rules_are_refused(change, message):
    d = tiny_protocol_dict()
    d["constraints"] = {
        "clinical_rules": [
            {"name": "no_up_high", "forbid": ["up"], "when": [{"state": "bp", "comparison": "above", "value": 180}]}
        ]
    }
    Protocol.model_validate(d)  # valid as written
    change(d)
    with pytest.raises(ValidationError, match=message):
        Protocol.model_validate(d)


def test_old_protocols_stay_valid_with_no_rules():
    p = Protocol.model_validate(tiny_protocol_dict())
    assert p.constraints.clinical_rules == [] and p.constraints.pessimism == 0.0
    assert p.q_model.kind == "linear" and p.q_model.learning_mode == "backward"
    assert ClinicalRuleSet.from_protocol(p).is_empty


# ------------------------------------------------------------------------------------------------ properties
@settings(max_examples=200, deadline=None)
@given(
    score=arrays(float, (6, 4), elements=st.floats(-50, 50)),
    raw=arrays(float, (6, 4), elements=st.floats(0.0, 1.0)),
    rules=arrays(bool, (6, 4)),
    tau=st.floats(0.0, 0.6),
)
def test_choice_never_breaks_a_rule_or_the_threshold(score, raw, rules, tau):
    proba = (raw + 1e-9) / (raw + 1e-9).sum(axis=1, keepdims=True)
    choice, _, none = constrained_choice(score, proba, tau, rules)
    rows = np.arange(6)
    permitted = rules & (proba >= tau)
    assert np.array_equal(none, ~permitted.any(axis=1))
    ok = ~none
    assert np.all(rules[rows, choice][ok]) and np.all(proba[rows, choice][ok] >= tau)
    has_rule_permitted = rules.any(axis=1)
    assert np.all(rules[rows, choice][has_rule_permitted])  # the fallback also respects the rules when it can


@pytest.fixture(scope="module")
def demo_regime():
    cohort = simulate_cohort(300, seed=5, confounding_strength=0.0)
    return learn_regime(clean_decisions(DEMO, cohort.decisions), DEMO.protocol)


def _state(name, kind=float):
    low, high = STATE_RANGES[name]
    if kind is int:
        return st.integers(int(low), int(high))
    return st.floats(float(low), float(high))


@settings(max_examples=40, deadline=None)
@given(
    rows=st.lists(
        st.fixed_dictionaries(
            {
                "sbp": _state("sbp"),
                "egfr": _state("egfr"),
                "potassium": _state("potassium"),
                "age": _state("age", int),
                "female": _state("female", int),
                "diabetes": _state("diabetes", int),
                "adherence": _state("adherence"),
                "therapy_level": _state("therapy_level", int),
                "step": st.integers(0, 7),
            }
        ),
        min_size=1,
        max_size=8,
    )
)
def test_learned_regime_never_breaks_a_rule_or_falls_below_support(demo_regime, rows):
    # the demo protocol's regime (rules, support 0.05, pessimism) on random states within the plausible ranges
    frame = pd.DataFrame(rows)
    proba = demo_regime.usual_care.predict_proba(frame)
    chosen = demo_regime(frame)
    permitted = demo_regime.rules.permitted(frame)
    assert not demo_regime.rules.violations(frame, chosen).any()
    tau = DEMO.protocol.constraints.support_threshold
    nothing = ~(permitted & (proba >= tau)).any(axis=1)
    assert np.all((proba[np.arange(len(frame)), chosen] >= tau) | nothing)
