"""Patients' codes of the readable tree, sorted once: the codes and the fitting rows are those of sorting the
identifiers every time (``numpy.unique``, the source of truth).
"""

import numpy as np
import pytest

from regimewise.regime.readable import fitting_rows, group_codes


@pytest.mark.parametrize(
    "groups",
    [
        np.array([3, 0, 1, 1, 2, 0, 3]),  # codes already: returned as they are
        np.array([5, 0, 9, 9, 2]),  # gaps: sorted and numbered
        np.array([4, -1, 4, 0]),
        np.array(["b", "a", "c", "a"]),
        np.array([10**12, 0]),  # a large identifier: no count per possible value
        np.array(["P10", "P9", "p1", "P10", "Q", "P9"], dtype=object),  # strings as pandas holds them: factorized
        np.array([7, 3, 7, 2**40], dtype=np.uint64),
        np.array([2.5, -1.0, 2.5]),  # floating point: numpy.unique itself
    ],
)
def test_group_codes_are_those_of_unique(groups):
    codes = group_codes(groups)
    expected = np.unique(groups, return_inverse=True)[1]
    assert codes.dtype == expected.dtype
    np.testing.assert_array_equal(codes, expected)


def test_fitting_rows_from_codes_equal_those_from_identifiers():
    rng = np.random.default_rng(10)
    patients = rng.choice([f"p{i:03d}" for i in range(400)], size=3000)
    np.testing.assert_array_equal(
        fitting_rows(3000, group_codes(patients), 1000, 11), fitting_rows(3000, patients, 1000, 11)
    )


def test_many_string_identifiers_get_the_codes_of_unique():
    rng = np.random.default_rng(12)
    patients = np.array([f"P{i:06d}" for i in rng.integers(0, 5000, 20000)] + ["Z", "A", "a"], dtype=object)
    np.testing.assert_array_equal(group_codes(patients), np.unique(patients, return_inverse=True)[1])


def test_identifiers_of_mixed_types_are_left_to_unique():
    # numpy.unique cannot order a string and a number: the same error as before, not codes of another order
    with pytest.raises(TypeError):
        group_codes(np.array(["P1", 3, "P1"], dtype=object))
