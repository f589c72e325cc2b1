"""The distinct values of a text column, so that a rule depending only on a cell's value runs once per value.

An extract of a million episodes has twelve million rows but far fewer distinct ids, labels or codes: a rule that
reads one cell at a time is run on each distinct value once (``pandas.factorize``) and broadcast back to the rows
by the codes. Only columns whose filled cells are all ``str`` are read this way: factorize also merges cells that
compare equal across types (``1``, ``1.0`` and ``True``; ``1`` and ``numpy.int64(1)``), which a rule reading a
cell's text must keep apart, so other columns keep their cell-by-cell path.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc


def distinct_text(values: pd.Series) -> tuple[np.ndarray, np.ndarray] | None:
    """Codes (-1 for a missing cell) and distinct values (an object array of ``str``) of a text column.

    Text columns are object columns whose filled cells are all ``str`` (what CSV and Parquet text reads as) and
    string or categorical columns whose values are all ``str``. None for any other column: numbers, lists or
    dates among the cells, or a numeric or date dtype.
    """
    if pd.api.types.is_object_dtype(values.dtype):
        cells = values.to_numpy()
        if pd.api.types.infer_dtype(cells, skipna=True) not in ("string", "empty"):
            return None
        codes, uniques = pd.factorize(cells, use_na_sentinel=True)
    elif isinstance(values.dtype, (pd.StringDtype, pd.CategoricalDtype)):
        codes, uniques = pd.factorize(values, use_na_sentinel=True)
        uniques = np.asarray(uniques, dtype=object)
    else:
        return None
    if uniques.size and pd.api.types.infer_dtype(uniques, skipna=False) != "string":
        return None  # a filled cell pandas' type check skipped as missing, or a category that is not text
    return codes, uniques


FIND = object()
"""Stands for a column's distinct values not found yet (an argument's default; None means not a text column)."""


class TableText:
    """The text columns of one table, each factorized once (:func:`distinct_text`) for every rule that reads it.

    Give it only to rules that read the same, unmodified table: the codes are positions of its rows.
    """

    def __init__(self, frame: pd.DataFrame):
        self.frame = frame
        self._found: dict = {}

    def __call__(self, column) -> tuple[np.ndarray, np.ndarray] | None:
        """:func:`distinct_text` of the column (None when it is not a text column)."""
        if column not in self._found:
            self._found[column] = distinct_text(self.frame[column])
        return self._found[column]


def broadcast(per_value: np.ndarray, codes: np.ndarray, missing) -> np.ndarray:
    """Each row's entry of ``per_value`` (one per distinct value) by its code, ``missing`` where the code is -1."""
    return np.append(per_value, np.asarray([missing], dtype=per_value.dtype))[codes]


def blank_text(uniques: np.ndarray) -> np.ndarray:
    """Mask of the ``str`` values that are empty or only whitespace (``value.strip() == ""``).

    Only a value that is empty or starts with whitespace can be blank: the first characters are compared with
    pyarrow and their few distinct ones checked with ``str.isspace``, then those values are stripped one by one.
    """
    try:
        text = pa.array(uniques, type=pa.string())
    except (pa.ArrowException, UnicodeError):  # a lone surrogate, which pyarrow cannot hold
        return np.array([u.strip() == "" for u in uniques], dtype=bool)
    first = pc.dictionary_encode(pc.utf8_slice_codeunits(text, 0, 1))
    spacing = np.array([c == "" or c.isspace() for c in first.dictionary.to_pylist()], dtype=bool)
    maybe = np.flatnonzero(spacing[first.indices.to_numpy(zero_copy_only=False)]) if spacing.any() else []
    blank = np.zeros(len(uniques), dtype=bool)
    blank[maybe] = [uniques[i].strip() == "" for i in maybe]
    return blank
