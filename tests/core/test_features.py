"""Q-model bases against numpy's polynomial routines (an independent reference implementation)."""

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_protocol_dict

from regimewise.core.features import QFeatures, StateScaler
from regimewise.protocol import Protocol
from regimewise.regime.fqi import FittedQIteration, QLearningSettings


def protocol_with(basis):
    raw = tiny_protocol_dict()
    raw["q_model"] = {"basis": basis}
    return Protocol.model_validate(raw)


def frame(n=200, seed=0):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"bp": rng.normal(140, 15, n).round(1), "flag": rng.integers(0, 2, n)})


@pytest.mark.parametrize("basis, degree", [("linear", 1), ("quadratic", 2), ("cubic", 3)])
def test_basis_columns_are_the_polynomial_vandermonde_of_each_scaled_state(basis, degree):
    p, data = protocol_with(basis), frame()
    features = QFeatures.from_protocol(StateScaler.fit(data, p), p)
    X = features.transform(data)
    z = (data["bp"] - data["bp"].mean()) / data["bp"].std(ddof=0)
    # numpy.polynomial.polynomial.polyvander gives 1, z, z^2, ..., z^degree; the binary flag enters once.
    vander = np.polynomial.polynomial.polyvander(z.to_numpy(), degree)
    expected = np.column_stack([vander[:, 1], data["flag"], vander[:, 2:]])
    np.testing.assert_allclose(X, expected, rtol=1e-12, atol=1e-12)
    assert features.names == ["bp", "flag"] + [f"bp^{k}" for k in range(2, degree + 1)]


def test_one_step_cubic_q_model_equals_numpy_polyfit_per_action():
    # With one decision point the Q-model of each action is ordinary least squares of the reward on its
    # covariates; with the cubic basis and no binary state that is numpy.polyfit of degree 3 per action.
    rng = np.random.default_rng(3)
    n = 600
    z = rng.normal(size=n)
    action = rng.integers(0, 2, n)
    reward = np.where(action == 0, 1 - z + 0.5 * z**3, z**2 - 0.2 * z**3) + rng.normal(0, 0.3, n)
    X = np.polynomial.polynomial.polyvander(z, 3)[:, 1:]
    fqi = FittedQIteration(2, 1, QLearningSettings(support_threshold=0.0)).fit(
        X, np.zeros(n, dtype=int), action, reward, np.arange(n), np.full((n, 2), 0.5)
    )
    grid = np.linspace(-2, 2, 9)
    q = fqi.q_values(np.polynomial.polynomial.polyvander(grid, 3)[:, 1:], np.zeros(grid.size, dtype=int))
    for a in (0, 1):
        reference = np.polyval(np.polyfit(z[action == a], reward[action == a], 3), grid)
        np.testing.assert_allclose(q[:, a], reference, rtol=1e-8, atol=1e-8)
