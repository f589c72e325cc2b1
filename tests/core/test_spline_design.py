"""The spline's design info built without evaluating the basis on every value (``spline_design``) against the
``patsy.dmatrix`` call it replaces: the same column names, the same knots and centring, so the basis built from
it is the old one bit for bit, at the training values and beyond them."""

import numpy as np
import patsy
import pytest

from regimewise.core.terms import spline_basis, spline_design, spline_values


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


# ---- spline_values: the basis a block of rows at a time, against patsy's own build (the reference library)
@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("df", [3, 4, 7])
def test_spline_values_are_patsys_basis_bit_for_bit_across_blocks(seed, df, monkeypatch):
    from regimewise.core import terms

    monkeypatch.setattr(terms, "SPLINE_BLOCK_ROWS", 257)  # many blocks, the last one short
    rng = np.random.default_rng(seed)
    values = rng.gamma(2.0, 1.5, 3_001).round(2)
    info = spline_design(values, df, "x")
    knots = next(iter(next(iter(info.factor_infos.values())).state["transforms"].values()))._all_knots
    # beyond the outer knots on both sides (linear continuation there), exactly at every knot, and ties
    beyond = np.concatenate([values, rng.uniform(values.min() - 5, values.max() + 5, 900), knots, -knots])
    for at in (values, beyond, values[:1], values[:0]):
        got, expected = terms.spline_values(info, at), basis(info, at)
        assert got.shape == expected.shape
        assert got.tobytes(order="A") == expected.tobytes(order="A")
        assert got.strides == expected.strides


def test_spline_values_leave_missing_values_to_patsy():
    # patsy drops a row whose value is missing; spline_values must not compute such a table itself
    values = np.linspace(1.0, 9.0, 400)
    info = spline_design(values, 4, "x")
    at = np.append(values, np.nan)
    assert spline_values(info, at).tobytes() == basis(info, at).tobytes()
    assert spline_values(info, at).shape == (400, 4)


def test_spline_values_leave_other_design_infos_to_patsy():
    values = np.linspace(1.0, 9.0, 400)
    info = patsy.dmatrix("cr(x, df=4) + x - 1", {"x": values}).design_info  # two terms: not a spline_design info
    assert spline_values(info, values).tobytes() == basis(info, values).tobytes()
