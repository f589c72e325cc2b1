"""Treatment (dummy) coding of a categorical state against patsy's coding of the same column (an independent
reference implementation of R-style model formulas)."""

import numpy as np
import pandas as pd
import patsy
import pytest
from support.tiny import tiny_protocol_dict

from regimewise.core.features import QFeatures, StateScaler
from regimewise.errors import UserInputError
from regimewise.protocol import Protocol

LEVELS = ["a", "b", "c"]


def categorical_protocol(basis="cubic", reference="b"):
    raw = tiny_protocol_dict()
    raw["states"].append(
        {"name": "x", "label": "Three levels", "kind": "categorical", "levels": LEVELS, "reference": reference}
    )
    raw["q_model"] = {"basis": basis}
    return Protocol.model_validate(raw)


def frame(n=300, seed=0):
    rng = np.random.default_rng(seed)
    return pd.DataFrame(
        {"bp": rng.normal(140, 15, n).round(1), "flag": rng.integers(0, 2, n), "x": rng.choice(LEVELS, n)}
    )


def test_dummies_equal_patsy_treatment_coding():
    p, data = categorical_protocol(), frame()
    scaler = StateScaler.fit(data, p)
    X = scaler.transform(data)
    # Reference: patsy's treatment coding with reference 'b' (patsy's design has the intercept first; the
    # columns after it are the dummies of 'a' and 'c').
    reference = np.asarray(patsy.dmatrix("C(x, Treatment(reference='b'), levels=['a', 'b', 'c'])", data))[:, 1:]
    np.testing.assert_allclose(X[:, 2:4], reference, rtol=0, atol=1e-12)
    assert scaler.names == ("bp", "flag", "x[a]", "x[c]")


def test_categorical_gets_no_powers_and_is_not_scaled():
    p, data = categorical_protocol("cubic"), frame()
    features = QFeatures.from_protocol(StateScaler.fit(data, p), p)
    X = features.transform(data)
    z = ((data["bp"] - data["bp"].mean()) / data["bp"].std(ddof=0)).to_numpy()
    dummies = np.asarray(patsy.dmatrix("C(x, Treatment(reference='b'))", data))[:, 1:]
    # Reference: numpy's polynomial Vandermonde matrix of the scaled continuous state, and patsy's treatment
    # coding of x entering once, unscaled.
    vander = np.polynomial.polynomial.polyvander(z, 3)
    expected = np.column_stack([vander[:, 1], data["flag"], dummies, vander[:, 2:]])
    np.testing.assert_allclose(X, expected, rtol=1e-12, atol=1e-12)
    assert features.names == ["bp", "flag", "x[a]", "x[c]", "bp^2", "bp^3"]


def test_default_reference_is_the_first_level():
    p, data = categorical_protocol(reference=None), frame()
    X = StateScaler.fit(data, p).transform(data)
    # Reference: patsy's default treatment coding drops the first level ('a').
    reference = np.asarray(patsy.dmatrix("C(x, levels=['a', 'b', 'c'])", data))[:, 1:]
    np.testing.assert_allclose(X[:, 2:4], reference, rtol=0, atol=1e-12)


def test_level_absent_from_training_is_left_out_and_reference_replaced_when_absent():
    p, data = categorical_protocol(), frame()
    no_c = data[data["x"] != "c"]
    scaler = StateScaler.fit(no_c, p)
    # Exact: 'c' never occurs, so its dummy is constant and left out; 'c' rows are then coded as the reference.
    assert scaler.names == ("bp", "flag", "x[a]") and scaler.dummies_dropped == ("x[c]",)
    no_b = data[data["x"] != "b"]
    scaler = StateScaler.fit(no_b, p)
    # Exact: without the reference 'b', the first level present ('a') is the base: one dummy (c) remains, so the
    # dummies never add up to the intercept.
    assert scaler.names == ("bp", "flag", "x[c]")
    np.testing.assert_array_equal(scaler.transform(no_b)[:, 2], (no_b["x"] == "c").to_numpy(dtype=float))


def test_value_outside_levels_is_refused_in_one_line():
    p, data = categorical_protocol(), frame()
    scaler = StateScaler.fit(data, p)
    with pytest.raises(UserInputError, match=r"categorical state 'x' has 1 value\(s\) outside its levels"):
        scaler.transform(data.assign(x=["d", *data["x"].iloc[1:]]))


def test_numeric_codes_match_levels_written_as_text():
    raw = tiny_protocol_dict()
    raw["states"].append({"name": "x", "label": "Coded", "kind": "categorical", "levels": [1, 2, 3]})
    p = Protocol.model_validate(raw)
    assert p.states[-1].levels == ["1", "2", "3"]
    data = frame().assign(x=np.tile([1.0, 2.0, 3.0], 100))
    X = StateScaler.fit(data, p).transform(data)
    # Reference: patsy's treatment coding of the same integer codes (first level 1 dropped).
    np.testing.assert_allclose(X[:, 2:4], np.asarray(patsy.dmatrix("C(x)", data))[:, 1:], atol=1e-12)


def test_state_matrix_of_the_dropout_model_is_unscaled_with_dummies():
    p, data = categorical_protocol(), frame()
    matrix = StateScaler.fit(data, p).state_matrix(data)
    # Reference: the recorded numeric states, then patsy's treatment coding of x (reference 'b').
    dummies = np.asarray(patsy.dmatrix("C(x, Treatment(reference='b'))", data))[:, 1:]
    np.testing.assert_allclose(matrix, np.column_stack([data["bp"], data["flag"], dummies]), rtol=0, atol=1e-12)
