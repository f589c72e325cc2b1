"""The permitted-action rule with its fallback found at the rows that need it only gives the choices of computing
it at every row, bit for bit (:func:`regimewise.regime.permitted.constrained_choice`; source of truth: the rule as
written before, ``old_constrained_choice`` below).
"""

import numpy as np
import pytest

from regimewise.regime.permitted import constrained_choice, permitted_choice


def old_constrained_choice(score, behaviour_proba, support_threshold, rule_permitted=None):
    """The permitted-action rule as written before: the fallback computed at every row."""
    fitted = ~np.isnan(score)
    allowed = fitted if rule_permitted is None else fitted & rule_permitted
    permitted = fitted & (behaviour_proba >= support_threshold)
    permitted = permitted if rule_permitted is None else permitted & rule_permitted
    none_permitted = ~permitted.any(axis=1)
    best = np.where(permitted, score, -np.inf).argmax(axis=1)
    fallback_set = np.where(allowed.any(axis=1)[:, None], allowed, fitted)
    fallback = np.where(fallback_set, behaviour_proba, -np.inf).argmax(axis=1)
    unconstrained = np.where(allowed.any(axis=1), np.where(allowed, score, -np.inf).argmax(axis=1), fallback)
    return np.where(none_permitted, fallback, best), unconstrained, none_permitted


@pytest.mark.parametrize("with_rules", [False, True])
def test_choice_equals_the_rule_computed_at_every_row(with_rules):
    rng = np.random.default_rng(7)
    n = 4000
    score = rng.normal(size=(n, 4))
    score[rng.random((n, 4)) < 0.2] = np.nan  # undefined actions, and some rows with none defined
    score[:5] = np.nan
    proba = rng.dirichlet(np.ones(4) * 0.3, size=n)  # many actions below the threshold: many fallbacks
    rules = rng.random((n, 4)) < 0.6 if with_rules else None
    expected = old_constrained_choice(score, proba, 0.1, rules)
    got = constrained_choice(score, proba, 0.1, rules)
    assert expected[2].sum() > 100  # the fallback is exercised
    for a, b in zip(got, expected):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(permitted_choice(score, proba, 0.1, rules), expected[0])
