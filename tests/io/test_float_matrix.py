"""Numeric columns read straight into one float array (``read_float_matrix``), against pandas' conversion of the same
columns read as a DataFrame (the stages' former reading): the same values and the same memory layout, since the
order of later sums follows the layout."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from regimewise.io import read_float_matrix, read_parquet, write_parquet


def _reference(path, columns):
    return read_parquet(path, columns)[columns].to_numpy(dtype=float)


def _same(found, expected):
    assert found.shape == expected.shape and found.dtype == expected.dtype
    assert found.strides == expected.strides  # the layout too, not only the values
    assert np.array_equal(found, expected, equal_nan=True)


@pytest.mark.parametrize("n", [0, 1, 7, 5000])
@pytest.mark.parametrize("columns", [["p_hold"], ["p_hold", "p_step_up", "p_add_agent"], ["p_add_agent", "p_hold"]])
def test_columns_are_pandas_float_matrix(tmp_path, n, columns):
    rng = np.random.default_rng(n)
    frame = pd.DataFrame({"episode_id": [f"e{i}" for i in range(n)], "step": np.arange(n)})
    for name in ("p_hold", "p_step_up", "p_add_agent"):
        frame[name] = rng.random(n)
    path = tmp_path / "proba.parquet"
    write_parquet(path, frame)
    _same(read_float_matrix(path, columns), _reference(path, columns))


def test_row_groups_nulls_integers_and_booleans_convert_as_pandas_converts_them(tmp_path):
    path = tmp_path / "mixed.parquet"
    table = pa.table(
        {
            "x": pa.array([0.5, None, 2.0, -1.0, None, 3.25, 7.0, 1e-300, -0.0]),
            "k": pa.array([1, 2, 3, 4, 5, 6, 7, 8, 9], type=pa.int64()),
            "m": pa.array([1, None, 3, None, 5, 6, 7, 8, 9], type=pa.int32()),
            "b": pa.array([True, False, True, True, False, False, True, False, True]),
        }
    )
    pq.write_table(table, path, row_group_size=4)
    assert pq.ParquetFile(path).num_row_groups == 3
    _same(read_float_matrix(path, ["x", "k", "m", "b"]), _reference(path, ["x", "k", "m", "b"]))


def test_a_missing_column_is_an_error(tmp_path):
    path = tmp_path / "proba.parquet"
    write_parquet(path, pd.DataFrame({"p_hold": [0.5]}))
    with pytest.raises((KeyError, pa.ArrowInvalid)):
        read_float_matrix(path, ["p_other"])
