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
