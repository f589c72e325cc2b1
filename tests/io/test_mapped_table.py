"""The memory-mapped copy of a table (the validated decisions the later jobs read) gives the DataFrame its Parquet
file gives: the same values, dtypes, columns and memory layout, whole or a column subset."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from regimewise.errors import UserInputError
from regimewise.io import read_float_matrix, read_frame, read_parquet, write_parquet


def decisions_like(n=5_000, seed=3) -> pd.DataFrame:
    """A table with the decisions' kinds of columns: text keys (repeated), integers, floats with missing values,
    a 0/1 float, a text action; not the demo's records."""
    rng = np.random.default_rng(seed)
    sbp = rng.normal(150, 20, n)
    sbp[rng.random(n) < 0.05] = np.nan
    return pd.DataFrame(
        {
            "episode_id": [f"E{i // 12:06d}" for i in range(n)],
            "patient_id": [f"P{i // 24:06d}" for i in range(n)],
            "step": np.arange(n) % 12,
            "day": (np.arange(n) % 12) * 91,
            "sbp": sbp,
            "female": rng.integers(0, 2, n).astype(float),
            "action": rng.choice(["hold", "step_up", "step_down"], n),
            "reward": rng.normal(size=n),
        }
    )


def same_frame(a: pd.DataFrame, b: pd.DataFrame) -> None:
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    assert a._mgr.nblocks == b._mgr.nblocks  # one block per column both ways: later sums run in the same order
    for column in a.columns:
        left, right = a[column].to_numpy(), b[column].to_numpy()
        assert left.dtype == right.dtype
        if left.dtype != object:
            assert left.tobytes() == right.tobytes()  # bit for bit, NaN included


@pytest.mark.parametrize("columns", [None, ["episode_id", "step", "action"], ["reward", "sbp"]])
def test_the_mapped_table_reads_as_its_parquet_file(tmp_path, columns):
    frame = decisions_like()
    write_parquet(tmp_path / "decisions.parquet", frame, mapped=tmp_path / ".decisions.arrow")
    mapped = read_frame(tmp_path / ".decisions.arrow", columns)
    same_frame(mapped, read_parquet(tmp_path / "decisions.parquet", columns))


def test_a_parquet_path_is_read_as_parquet(tmp_path):
    frame = decisions_like(300)
    write_parquet(tmp_path / "decisions.parquet", frame)
    same_frame(read_frame(tmp_path / "decisions.parquet"), read_parquet(tmp_path / "decisions.parquet"))


def test_an_empty_table_maps_too(tmp_path):
    frame = decisions_like(0)
    write_parquet(tmp_path / "decisions.parquet", frame, mapped=tmp_path / ".decisions.arrow")
    same_frame(read_frame(tmp_path / ".decisions.arrow"), read_parquet(tmp_path / "decisions.parquet"))


def test_a_damaged_mapped_table_is_a_clear_error(tmp_path):
    write_parquet(tmp_path / "decisions.parquet", decisions_like(300), mapped=tmp_path / ".decisions.arrow")
    data = (tmp_path / ".decisions.arrow").read_bytes()
    (tmp_path / ".decisions.arrow").write_bytes(data[: len(data) // 2])
    with pytest.raises(UserInputError, match="rerun the workflow"):
        read_frame(tmp_path / ".decisions.arrow")
    with pytest.raises(UserInputError, match="rerun the workflow"):
        read_frame(tmp_path / "missing.arrow")


def test_a_float_matrix_reads_alike_from_the_mapped_table(tmp_path):
    # usual care's probabilities as the later jobs read them: the same bytes and memory layout either way
    frame = decisions_like()
    labels = ["p_hold", "p_up", "p_down"]
    frame[labels] = np.random.default_rng(5).dirichlet(np.ones(3), size=len(frame))
    write_parquet(tmp_path / "proba.parquet", frame, mapped=tmp_path / ".proba.arrow")
    mapped, parquet = (
        read_float_matrix(tmp_path / ".proba.arrow", labels),
        read_float_matrix(tmp_path / "proba.parquet", labels),
    )
    assert mapped.tobytes() == parquet.tobytes()
    assert mapped.strides == parquet.strides and mapped.flags["F_CONTIGUOUS"] == parquet.flags["F_CONTIGUOUS"]


def test_numeric_columns_of_the_mapped_table_are_views_of_the_file(tmp_path):
    # one chunk per column (a table built from one DataFrame): pandas gets the mapped pages, not a copy
    write_parquet(tmp_path / "decisions.parquet", decisions_like(), mapped=tmp_path / ".decisions.arrow")
    frame = read_frame(tmp_path / ".decisions.arrow")
    assert not frame["reward"].to_numpy().flags.writeable
    assert not frame["step"].to_numpy().flags.writeable


def test_a_failed_copy_is_raised_and_leaves_no_partial_copy(tmp_path):
    # the copy is written on a second thread beside the Parquet file: its error must reach the caller
    (tmp_path / "copy").mkdir()
    with pytest.raises(UserInputError, match="directory"):
        write_parquet(tmp_path / "decisions.parquet", decisions_like(100), mapped=tmp_path / "copy")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["copy", "decisions.parquet"]
    assert list((tmp_path / "copy").iterdir()) == []
