"""Codes of a text column read as Arrow's dictionary (``read_label_codes``), against pandas' categorical codes of the
same column read as Python strings: pandas is the reference (the stages' former reading)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from regimewise.io import read_label_codes, read_parquet, write_parquet
from regimewise.workflow.stages import column_codes

LABELS = ("hold", "step_down", "step_up", "add_agent")


def _reference(path, column, labels):
    return pd.Categorical(read_parquet(path, [column])[column], categories=list(labels)).codes.astype(np.int64)


@pytest.mark.parametrize("n", [0, 1, 7, 5000])
def test_codes_are_pandas_categorical_codes(tmp_path, n):
    rng = np.random.default_rng(n)
    texts = np.asarray([*LABELS, "other", None], dtype=object)[rng.integers(0, 6, n)]
    path = tmp_path / "table.parquet"
    write_parquet(path, pd.DataFrame({"step": np.arange(n), "evaluated": texts}))
    assert np.array_equal(read_label_codes(path, "evaluated", LABELS), _reference(path, "evaluated", LABELS))


def test_codes_across_row_groups_with_their_own_dictionaries(tmp_path):
    # several row groups, each starting its own dictionary in another order of first appearance
    path = tmp_path / "groups.parquet"
    texts = ["add_agent"] * 3 + ["hold", "step_up"] * 3 + [None, "step_down", "hold"] + ["step_down"] * 4
    pq.write_table(pa.table({"action": texts}), path, row_group_size=4)
    assert pq.ParquetFile(path).num_row_groups == 4
    assert np.array_equal(read_label_codes(path, "action", LABELS), _reference(path, "action", LABELS))


def test_column_codes_refuses_a_label_outside_the_protocol(tmp_path):
    path = tmp_path / "table.parquet"
    write_parquet(path, pd.DataFrame({"recommended": ["hold", "surgery"]}))
    with pytest.raises(ValueError, match="not in the protocol's action set"):
        column_codes(path, "recommended", LABELS)
    write_parquet(path, pd.DataFrame({"recommended": ["step_up", "hold"]}))
    assert column_codes(path, "recommended", LABELS).tolist() == [2, 0]
