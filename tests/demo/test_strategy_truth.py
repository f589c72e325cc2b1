"""The simulator's strategies (demo/strategies.py) reduce to the regimes they mix, draw for draw.

Source: the definitions, with common random numbers (the same seed gives the same noise whatever the regime), so
a strategy that never departs from usual care, or always follows the regime, must reproduce those returns exactly.
"""

import numpy as np
import pytest

from regimewise.demo.strategies import IncrementalOdds, OverrideGain, PartialAdoption
from regimewise.demo.truth import always, true_returns
from regimewise.errors import UserInputError


def test_partial_adoption_at_0_is_usual_care_and_at_1_the_regime():
    usual = true_returns("usual_care", n=1500, seed=4)
    np.testing.assert_array_equal(true_returns(PartialAdoption(always("hold"), 0.0), n=1500, seed=4), usual)
    regime = true_returns(always("step_up"), n=1500, seed=4)
    np.testing.assert_array_equal(true_returns(PartialAdoption(always("step_up"), 1.0), n=1500, seed=4), regime)


def test_override_with_an_unreachable_threshold_is_usual_care_and_with_any_gain_the_regime():
    usual = true_returns("usual_care", n=1500, seed=5)
    gains = lambda frame: np.tile([0.0, 0.0, 1.0, 0.0], (len(frame), 1))  # noqa: E731  step_up gains 1 over all
    never = OverrideGain(always("step_up"), gains, threshold=2.0)
    np.testing.assert_array_equal(true_returns(never, n=1500, seed=5), usual)
    every = OverrideGain(always("step_up"), gains, threshold=0.5)
    np.testing.assert_array_equal(true_returns(every, n=1500, seed=5), true_returns(always("step_up"), n=1500, seed=5))


def test_incremental_odds_at_1_is_usual_care_and_below_1_is_refused():
    usual = true_returns("usual_care", n=1500, seed=6)
    np.testing.assert_array_equal(true_returns(IncrementalOdds(always("hold"), 1.0), n=1500, seed=6), usual)
    with pytest.raises(UserInputError, match="below 1"):
        IncrementalOdds(always("hold"), 0.5)
