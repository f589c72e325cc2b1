"""The spline's design info built without evaluating the basis on every value (``spline_design``) against the
``patsy.dmatrix`` call it replaces: the same column names, the same knots and centring, so the basis built from
it is the old one bit for bit, at the training values and beyond them."""

import numpy as np
import patsy
import pytest

from regimewise.core.terms import spline_basis, spline_design


def old_info(values, df):
    return patsy.dmatrix(f"cr(x, df={df}, constraints='center') - 1", {"x": values}).design_info


def basis(info, values):
    return np.asarray(patsy.build_design_matrices([info], {"x": values})[0])


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("df", [3, 4, 6])
def test_spline_design_builds_the_dmatrix_basis_bit_for_bit(seed, df):
    rng = np.random.default_rng(seed)
    values = rng.gamma(2.0, 1.5, 2_001).round(2)  # ties, as recorded values have
    new, old = spline_design(values, df, "x"), old_info(values, df)
    assert new.column_names == old.column_names
    beyond = np.concatenate([values, rng.uniform(values.min() - 5, values.max() + 5, 300)])
    for at in (values, beyond, values[:3]):
        got, expected = basis(new, at), basis(old, at)
        assert got.tobytes(order="A") == expected.tobytes(order="A")
        assert got.flags.c_contiguous == expected.flags.c_contiguous
    matrix = spline_basis(values, df, "x")
    assert (
        np.asarray(matrix).tobytes()
        == np.asarray(patsy.dmatrix(f"cr(x, df={df}, constraints='center') - 1", {"x": values})).tobytes()
    )
    assert matrix.design_info.column_names == old.column_names


def test_few_values_still_place_the_knots_on_all_of_them():
    values = np.concatenate([np.full(8, 1.0), np.linspace(2.0, 50.0, 500)])  # the first values are all alike
    assert basis(spline_design(values, 4, "x"), values).tobytes() == basis(old_info(values, 4), values).tobytes()


def test_too_few_distinct_values_are_refused_with_their_count():
    from regimewise.errors import UserInputError

    values = np.concatenate([np.full(9000, 2.0), [1.0, 3.0, 4.0]])  # the other values only in the last rows
    with pytest.raises(UserInputError, match="the records have 4;"):
        spline_design(values, 4, "x")
    assert (
        spline_design(np.append(values, 5.0), 4, "x").column_names == old_info(np.append(values, 5.0), 4).column_names
    )
