"""Code columns written as their labels' text (``write_parquet(..., labels=...)``) and the regime stage's table
written from action codes: the files must be those the former object columns of Python strings gave, byte for
byte.

Equivalence checks with no outside reference: the expected files are written by the former computations,
spelled out plainly below, on small invented tables.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from regimewise.cautions import RECOMMENDATION_CAUTION
from regimewise.io import labelled_table, write_parquet
from regimewise.workflow.stages import write_recommendations

LABELS = ("hold", "step_down", "step_up", "add_agent")


def former_write(path, frame: pd.DataFrame, caution=None) -> None:
    """The former writer: every column converted by ``from_pandas``, the caution in the schema's metadata."""
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if caution is not None:
        table = table.replace_schema_metadata(
            {**(table.schema.metadata or {}), b"regimewise.caution": caution.encode()}
        )
    pq.write_table(table, path, compression="zstd")


def _coded(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    values = rng.normal(size=n)
    values[rng.random(n) < 0.2] = np.nan  # written as nulls, as from_pandas writes NaN
    return pd.DataFrame(
        {
            "episode_id": [f"E{i // 3:04d}" for i in range(n)],
            "step": np.arange(n) % 3,
            "a": rng.integers(0, 4, n).astype(np.uint8),
            "value": values,
            "b": rng.integers(0, 4, n),
            "allowed": rng.random(n) < 0.5,
        }
    )


@pytest.mark.parametrize("n", [1, 7, 500])
@pytest.mark.parametrize("caution", [None, "research use only"])
def test_code_columns_are_written_as_their_labels_text(tmp_path, n, caution):
    frame = _coded(n, n)
    labels = {"a": LABELS, "b": LABELS[::-1]}
    text = frame.assign(a=np.asarray(LABELS, object)[frame["a"]], b=np.asarray(LABELS[::-1], object)[frame["b"]])
    former_write(tmp_path / "former.parquet", text, caution)
    write_parquet(tmp_path / "coded.parquet", frame, caution=caution, labels=labels)
    assert (tmp_path / "coded.parquet").read_bytes() == (tmp_path / "former.parquet").read_bytes()
    assert labelled_table(frame, labels).equals(pa.Table.from_pandas(text, preserve_index=False))


def test_an_empty_table_is_written_as_before(tmp_path):
    frame = _coded(3, 0).iloc[:0]
    text = frame.assign(a=np.asarray(LABELS, object)[frame["a"]])
    former_write(tmp_path / "former.parquet", text)
    write_parquet(tmp_path / "coded.parquet", frame, labels={"a": LABELS})
    assert (tmp_path / "coded.parquet").read_bytes() == (tmp_path / "former.parquet").read_bytes()


def former_recommendations(path, p, frame, chosen, evaluated, evaluated_q, q, permitted) -> None:
    """The former regime table: each label column an object column of the label strings."""
    labels = np.asarray(p.action_labels, dtype=object)
    out = frame[["episode_id", "step", "action"]].copy()
    out["recommended"] = labels[chosen[list(chosen)[-1]]]
    out["evaluated"] = labels[evaluated]
    out[[f"evaluated_q_{a}" for a in p.action_labels]] = evaluated_q
    for name, codes in chosen.items():
        out[f"recommended_{name}"] = labels[codes]
    out[[f"q_{a}" for a in p.action_labels]] = q
    out[[f"permitted_{a}" for a in p.action_labels]] = permitted
    former_write(path, out, RECOMMENDATION_CAUTION)


def test_the_regime_table_is_the_former_one(tmp_path):
    rng = np.random.default_rng(3)
    n, k = 240, len(LABELS)
    frame = _coded(n, 1)[["episode_id", "step"]].assign(action=np.asarray(LABELS, object)[rng.integers(0, k, n)])
    chosen = {name: rng.integers(0, k, n).astype(np.uint8) for name in ("unconstrained", "support", "rules")}
    q = rng.normal(size=(n, k))
    q[:, 1] = np.nan  # an action never fitted
    args = (chosen, rng.integers(0, k, n), rng.normal(size=(n, k)), q, rng.random((n, k)) < 0.6)
    p = SimpleNamespace(action_labels=LABELS)
    former_recommendations(tmp_path / "former.parquet", p, frame, *args)
    write_recommendations(tmp_path / "coded.parquet", p, frame, *args)
    assert (tmp_path / "coded.parquet").read_bytes() == (tmp_path / "former.parquet").read_bytes()
