"""The categorical state kind in the protocol: levels, reference, rare-level rule, and what other sections may
say about it. Each refusal is one line naming the state (exact messages written for this project)."""

from __future__ import annotations

import pytest
import yaml
from support.tiny import tiny_protocol_dict

from regimewise.errors import ProtocolError
from regimewise.protocol import load_protocol
from regimewise.protocol.model import sweep_specifications

EDU = {"name": "edu", "label": "Education", "kind": "categorical", "levels": ["low", "mid", "high"]}


def _protocol(tmp_path, state=None, **sections):
    d = tiny_protocol_dict()
    d["states"].append({**EDU, **(state or {})})
    d.update(sections)
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(d, sort_keys=False), encoding="utf-8")
    return load_protocol(path).protocol


def _rule(condition):
    return {"clinical_rules": [{"name": "r", "forbid": ["up"], "when": [{"state": "edu", **condition}]}]}


def test_defaults_reference_first_level_and_refuse(tmp_path):
    state = _protocol(tmp_path).states[-1]
    # Exact: the documented defaults.
    assert (state.reference_level, state.rare_levels, state.coded_levels) == ("low", "refuse", ("low", "mid", "high"))
    merged = _protocol(tmp_path, {"rare_levels": "merge", "other_level": "rest"}).states[-1]
    assert merged.coded_levels == ("low", "mid", "high", "rest")


CASES = {
    "no levels": ({"levels": None}, "categorical state 'edu' needs levels"),
    "one level": ({"levels": ["low"]}, "states[2].levels"),
    "repeated level": ({"levels": ["low", "low", "mid"]}, "lists level 'low' twice"),
    "reference not a level": ({"reference": "top"}, "reference 'top' is not one of its levels"),
    "range on a categorical": ({"plausible_range": [0, 1]}, "plausible_range applies to numeric states"),
    "other level is a level": ({"rare_levels": "merge", "other_level": "mid"}, "other_level 'mid' is already a level"),
    "identifier-like level": ({"levels": ["low", "jane.roe@example.org"]}, "looks like it holds a direct identifier"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_categorical_declarations_are_one_line(tmp_path, case):
    change, fragment = CASES[case]
    with pytest.raises(ProtocolError) as info:
        _protocol(tmp_path, change)
    assert "\n" not in str(info.value) and fragment in str(info.value), str(info.value)


def test_levels_only_on_categorical_states(tmp_path):
    d = tiny_protocol_dict()
    d["states"][0]["levels"] = ["a", "b"]
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(d), encoding="utf-8")
    with pytest.raises(ProtocolError, match="levels applies to categorical states only"):
        load_protocol(path)


def test_rule_on_categorical_takes_in_with_levels(tmp_path):
    p = _protocol(tmp_path, constraints=_rule({"comparison": "not_in", "values": ["high"]}))
    assert p.constraints.clinical_rules[0].when[0].values == ["high"]


@pytest.mark.parametrize(
    "condition, fragment",
    [
        ({"comparison": "above", "value": 1}, "'above' needs an ordered number, but the state is categorical"),
        ({"comparison": "in", "values": ["top"]}, "'top' is not one of its levels"),
    ],
)
def test_rule_on_categorical_refuses_order_and_unknown_levels(tmp_path, condition, fragment):
    with pytest.raises(ProtocolError) as info:
        _protocol(tmp_path, constraints=_rule(condition))
    assert "\n" not in str(info.value) and fragment in str(info.value), str(info.value)


def test_rule_on_numeric_state_refuses_text_values(tmp_path):
    rule = {"clinical_rules": [{"name": "r", "forbid": ["up"], "when": [{"state": "bp", "comparison": "in",
                                                                          "values": ["high"]}]}]}  # fmt: skip
    with pytest.raises(ProtocolError, match="continuous state compares numbers, not text"):
        _protocol(tmp_path, constraints=rule)


def test_indicator_policy_and_splines_refused_for_categorical(tmp_path):
    data = {"decisions": "decisions.csv", "missing": {"edu": "indicator"}}
    with pytest.raises(ProtocolError, match="categorical state 'edu' has not; use refuse, drop or carry_forward"):
        _protocol(tmp_path, data=data)
    with pytest.raises(ProtocolError, match="'edu' is not a declared continuous or integer state"):
        _protocol(tmp_path, behaviour_model={"spline_states": ["edu"]})


def test_sweep_specifications_revalidate_a_protocol_with_categorical_and_numeric_states(tmp_path):
    p = _protocol(tmp_path, {"rare_levels": "merge"}, sweeps={"axes": {"q_model.basis": ["linear", "cubic"]}})
    specs = sweep_specifications(p)
    # Exact: the protocol's own setting (linear) and the one other value; each a whole valid protocol whose states
    # are the protocol's (a dumped numeric state holds the categorical fields' defaults, which are not refused).
    assert [s.settings for s in specs] == [{"q_model.basis": "linear"}, {"q_model.basis": "cubic"}]
    assert all(s.protocol.states == p.states for s in specs)


# ---------------------------------------------------------------------------------------------- comparators
def _comparator(condition, otherwise="hold"):
    return [
        {
            "name": "by_edu",
            "label": "By education",
            "rules": [{"action": "up", "when": [condition]}],
            "otherwise": otherwise,
        }
    ]


def test_a_comparator_may_choose_by_level(tmp_path):
    import numpy as np

    p = _protocol(tmp_path, comparators=_comparator({"state": "edu", "comparison": "in", "values": ["mid", "high"]}))
    columns = {"edu": np.array(["low", "mid", "high", "mid"], dtype=object)}
    # exact: 'up' (code 1) where edu is mid or high, 'hold' (code 0) elsewhere
    assert p.comparators[0].action_codes(columns, 4, p.action_labels).tolist() == [0, 1, 1, 1]
    assert "education in {mid, high}" in p.comparators[0].words(p.states)


COMPARATOR_CASES = {
    "order on a categorical": (
        {"state": "edu", "comparison": "above", "value": 1},
        "comparators[0].rules[0].when[0].comparison: 'above' needs an ordered number",
    ),
    "unknown level": (
        {"state": "edu", "comparison": "in", "values": ["top"]},
        "comparators[0].rules[0].when[0].values: 'top' is not one of the levels of 'edu'",
    ),
    "text on a number": (
        {"state": "bp", "comparison": "in", "values": ["high"]},
        "comparators[0].rules[0].when[0].values: 'bp' is a continuous state and compares numbers",
    ),
    "a level no rule can reach": (  # edu not_in all its levels never holds
        {"state": "edu", "comparison": "not_in", "values": ["low", "mid", "high"]},
        "comparators[0].rules[0]: never applies",
    ),
}


@pytest.mark.parametrize("case", sorted(COMPARATOR_CASES))
def test_a_comparator_condition_that_does_not_fit_a_categorical_is_one_line(tmp_path, case):
    condition, fragment = COMPARATOR_CASES[case]
    with pytest.raises(ProtocolError) as info:
        _protocol(tmp_path, comparators=_comparator(condition))
    assert "\n" not in str(info.value) and fragment in str(info.value), str(info.value)
