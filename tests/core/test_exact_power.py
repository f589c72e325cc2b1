"""The correctly rounded cube of the Q-features (``exact_power``) against exact rational arithmetic: Python's
``fractions.Fraction`` computes x**3 without rounding, and ``float()`` of a Fraction is the correctly rounded double
(round half to even), the reference every element must equal. Then the cases it leaves to numpy, and the layout."""

import math
from fractions import Fraction

import numpy as np
import pytest

from regimewise.core import arrays
from regimewise.core.arrays import exact_power


def correctly_rounded_cube(values):
    """Each x**3 rounded once from its exact value; a zero keeps its sign, as a cube does (Fraction has no -0)."""
    cubes = [math.copysign(float(Fraction(float(v)) ** 3), v) for v in np.ravel(values)]
    return np.array(cubes).reshape(np.shape(values))


@pytest.mark.parametrize("scale", [1.0, 3.7, 1e-40, 1e60])
def test_every_cube_is_the_correctly_rounded_one(scale):
    rng = np.random.default_rng(7)
    values = np.concatenate([rng.normal(0, scale, 6000), rng.uniform(-scale, scale, 2000)])
    values = np.concatenate([values, np.round(values, 2), np.arange(-40.0, 41.0)])  # recorded values, integers
    got = exact_power(values, 3)
    assert got.tobytes() == correctly_rounded_cube(values).tobytes()


def test_it_is_computed_in_blocks_without_changing_a_bit(monkeypatch):
    values = np.random.default_rng(3).normal(0, 2, (1001, 3))
    whole = exact_power(values, 3)
    monkeypatch.setattr(arrays, "POWER_BLOCK_ROWS", 97)
    assert exact_power(values, 3).tobytes() == whole.tobytes()
    assert whole.tobytes() == correctly_rounded_cube(values).tobytes()


def test_zeros_infinities_nan_and_huge_or_tiny_values_are_numpys_cubes():
    values = np.array([0.0, -0.0, np.inf, -np.inf, np.nan, 1e110, -1e110, 2.0**301, 1e-100, -(2.0**-301), 5e-324])
    with np.errstate(over="ignore"):  # numpy's overflow warning, here as in x ** 3
        got, expected = exact_power(values, 3), values**3
    assert np.array_equal(got, expected, equal_nan=True)
    assert np.array_equal(np.signbit(got), np.signbit(expected))  # -0.0 stays -0.0
    assert np.isinf(got[5]) and got[6] == -np.inf  # overflow as numpy overflows


def test_other_powers_and_types_are_numpys_own():
    values = np.random.default_rng(1).normal(0, 2, 300)
    for k in (1, 2, 4):
        assert exact_power(values, k).tobytes() == (values**k).tobytes()
    whole = np.arange(-5, 6)
    assert exact_power(whole, 3).dtype == whole.dtype and np.array_equal(exact_power(whole, 3), whole**3)


@pytest.mark.parametrize(
    "make",
    [
        lambda x: x,  # C order
        np.asfortranarray,
        lambda x: x[:, 1],  # a strided column
        lambda x: x[::3],  # every third row
    ],
)
def test_the_result_has_numpys_memory_layout(make):
    x = make(np.random.default_rng(2).normal(0, 2, (600, 4)))
    got, expected = exact_power(x, 3), x**3
    assert got.shape == expected.shape and got.strides == expected.strides
    assert np.array_equal(got, correctly_rounded_cube(x))
