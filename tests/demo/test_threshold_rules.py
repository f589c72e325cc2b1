"""The simulator's reference: the documented family of threshold rules and its grid search on true values.

Sources: actions worked out by hand from the rule's written definition; the grid search is checked against
:func:`regimewise.demo.truth.true_value` of each rule (common random numbers make them exactly comparable).
"""

import numpy as np
import pandas as pd
import pytest
from support.tiny import REPOSITORY

from regimewise.demo.truth import (
    ThresholdRule,
    best_threshold_rule,
    threshold_rules,
    true_value,
)
from regimewise.protocol import load_protocol
from regimewise.regime.clinical_rules import ClinicalRuleSet


def test_threshold_rule_worked_by_hand():
    rule = ThresholdRule(raise_above=140, add_above=160, lower_below=115)
    states = pd.DataFrame(
        {
            "sbp": [170, 150, 130, 110, 110, 170, 110],
            "potassium": [4.0, 4.0, 4.0, 4.0, 4.0, 5.6, 5.6],
            "egfr": [60, 60, 60, 60, 60, 60, 25],
            "therapy_level": [1, 1, 1, 2, 0, 1, 3],
        }
    )
    # add_agent, step_up, hold, step_down, hold (level 0), hold (potassium), step_down (unsafe but lowering)
    assert rule(states).tolist() == [3, 2, 0, 1, 0, 0, 1]


def test_threshold_rules_never_break_the_demo_clinical_rules():
    rules = ClinicalRuleSet.from_protocol(load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol)
    rng = np.random.default_rng(0)
    states = pd.DataFrame(
        {
            "sbp": rng.uniform(70, 250, 3000),
            "potassium": rng.uniform(2, 7.5, 3000),
            "egfr": rng.uniform(5, 150, 3000),
            "therapy_level": rng.integers(0, 5, 3000),
        }
    )
    for rule in threshold_rules():
        assert not rules.violations(states, rule(states)).any()


def test_grid_search_returns_the_best_true_value():
    grid = {"raise_above": (135.0, 150.0), "add_above": (150.0, float("inf")), "lower_below": (110.0,)}
    search = best_threshold_rule(n=400, seed=6, confounding_strength=0.0, grid=grid)
    assert len(search.values) == 4
    direct = {rule: true_value(rule, n=400, seed=6, confounding_strength=0.0).value for rule in threshold_rules(grid)}
    assert search.best == max(direct, key=direct.get)
    assert search.value == pytest.approx(direct[search.best], abs=1e-12)
