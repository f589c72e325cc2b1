"""Reading tables and writing artifacts whole or not at all.

Every artifact is written to a temporary name in its destination folder and renamed into place, so a crash
never leaves a half-written file under a final name. JSON is written with sorted keys and a fixed float
representation so identical inputs give identical bytes.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import tempfile
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager, nullcontext
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from regimewise.errors import OS_REASONS, UserInputError, os_reason


def current_umask() -> int:
    """The process's file-creation mask (read by setting and restoring it; no other way exists in Python)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


@contextmanager
def atomic_path(path: str | Path):
    """Yield a temporary path beside ``path``; rename it onto ``path`` only if the block succeeds."""
    path = Path(path)
    if path.is_dir():
        raise UserInputError(f"cannot write {path}: it is a directory; give a file name")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent)
        os.close(fd)
    except OSError as err:
        raise UserInputError(f"cannot write {path}: {os_reason(err)}") from None
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, 0o666 & ~current_umask())  # mkstemp creates 0600; outputs follow the user's umask
        os.replace(tmp, path)
    except OSError as err:
        raise UserInputError(f"cannot write {path}: {os_reason(err)}") from None
    finally:
        if tmp.exists():
            tmp.unlink()


def write_text(path: str | Path, text: str) -> None:
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8", newline="\n")


def write_bytes(path: str | Path, data: bytes) -> None:
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)


def to_jsonable(value):
    """Convert numpy scalars/arrays, tuples and non-finite floats into plain JSON values (NaN/inf -> null)."""
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer, int)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, Path):
        return str(value)
    return value


def dumps_json(obj) -> str:
    return json.dumps(to_jsonable(obj), indent=2, sort_keys=True, ensure_ascii=False, allow_nan=False) + "\n"


def write_json(path: str | Path, obj) -> None:
    write_text(path, dumps_json(obj))


def read_json(path: str | Path):
    return json.loads(Path(path).read_text(encoding="utf-8"))


def write_parquet(
    path: str | Path,
    frame: pd.DataFrame,
    caution: str | None = None,
    labels=None,
    temporary: bool = False,
    mapped: str | Path | None = None,
) -> None:
    """Write a DataFrame to Parquet atomically (no index; deterministic for the same pyarrow version).

    ``caution``, if given, is stored in the file's metadata under the key ``regimewise.caution``. ``labels``, if
    given, maps columns of ``frame`` holding integer codes to the text labels the codes stand for: such a column
    is written as its labels' text, the same bytes as a column of those strings (:func:`labelled_table`).
    ``temporary``: a table one workflow job writes for another and the workflow deletes (never an artifact),
    written without compression or dictionary pages, which cost the writer more time than the reader saves (a
    Q-value column barely compresses).
    ``mapped``: also write the same Arrow table to this path as a file :func:`read_frame` memory-maps
    (:func:`write_mapped_table`).
    """
    table = labelled_table(frame, labels) if labels else pa.Table.from_pandas(frame, preserve_index=False)
    if caution is not None:
        table = table.replace_schema_metadata(
            {**(table.schema.metadata or {}), b"regimewise.caution": caution.encode()}
        )
    # the mapped copy is written on a second thread beside the Parquet file (Arrow releases the interpreter lock in
    # both writers): the validate job, which writes the decisions' copy, runs alone at the start of a run and has
    # the second core to itself; the behaviour job's copy of the probabilities is a few seconds of one more thread
    with ThreadPoolExecutor(max_workers=1) if mapped is not None else nullcontext() as pool:
        copy = None if mapped is None else pool.submit(write_mapped_table, mapped, table)
        with atomic_path(path) as tmp:
            if temporary:
                pq.write_table(table, tmp, compression="none", use_dictionary=False)
            else:
                pq.write_table(table, tmp, compression="zstd")
        if copy is not None:
            copy.result()  # its error, if any, is raised here


# Suffix of the tables :func:`read_frame` memory-maps rather than decodes.
MAPPED_SUFFIX = ".arrow"


def write_mapped_table(path: str | Path, table: pa.Table) -> None:
    """Write ``table`` atomically as an uncompressed Arrow IPC file (the pandas metadata kept), for
    :func:`read_frame`.

    A table that many workflow jobs read whole (the validated decisions) is decoded from Parquet in each of them:
    at 1M episodes x 12, about 2 s of CPU for the decompression and decoding plus the kernel's clearing of the
    memory the decoded columns fill (1 to 4 s more). Read from this file, a numeric column written as one chunk
    (a table built from one DataFrame is) becomes a read-only view of the mapped file's pages in the page cache,
    with nothing decoded, copied or cleared; the text columns are converted as from Parquet (bench/RESULTS.md).
    The file is about as large as the table in memory (1.4 GB at 1M x 12 against 97 MB of Parquet): a workflow
    intermediate, never an artifact.
    """
    with atomic_path(path) as tmp:
        with pa.OSFile(str(tmp), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
            writer.write_table(table)


def with_text(frame: pd.DataFrame, labels: dict) -> pd.DataFrame:
    """``frame`` with each code column of ``labels`` replaced by its labels (an object column of ``str``)."""
    return frame.assign(**{c: np.asarray(text, dtype=object)[frame[c].to_numpy()] for c, text in labels.items()})


def labelled_table(frame: pd.DataFrame, labels: dict) -> pa.Table:
    """The table ``pa.Table.from_pandas(with_text(frame, labels), preserve_index=False)`` would give, with its
    schema and pandas metadata, built without a Python string per row of the code columns: each label column is
    its labels taken by the codes, every other column converted as ``from_pandas`` converts it."""
    if frame.empty:  # no row to read the columns' types from
        return pa.Table.from_pandas(with_text(frame, labels), preserve_index=False)
    schema = pa.Schema.from_pandas(with_text(frame.iloc[:1], labels), preserve_index=False)
    arrays = [
        pa.array(list(labels[c]), type=field.type).take(pa.array(frame[c].to_numpy()))
        if c in labels
        else pa.array(frame[c], type=field.type, from_pandas=True)
        for c, field in zip(frame.columns, schema)
    ]
    return pa.Table.from_arrays(arrays, schema=schema)


def read_parquet(path: str | Path, columns: list[str] | None = None) -> pd.DataFrame:
    """The table at ``path``; with ``columns``, only those columns are read from the file.

    The DataFrame ``pandas.read_parquet(path, columns=columns)`` gives, read on the calling thread (Arrow's pool
    would add threads that cost a workflow job's core more than they save, since its neighbours hold the other
    cores) and converted column by column, each Arrow column freed once converted, without gathering the columns
    of one type into one block first. The read alone of the decisions table at 1M episodes x 12 takes about 5 s of
    CPU instead of 6 to 9; the jobs that read it did not measurably gain (their later pandas work on the frame
    costs about what the reader saves, bench/RESULTS.md), but the whole table is never held twice.
    """
    return _to_frame(pq.read_table(path, columns=columns, use_threads=False, use_pandas_metadata=True))


def _to_frame(table: pa.Table) -> pd.DataFrame:
    """``table`` as pandas: on the calling thread, column by column (one block per column), each Arrow column let
    go once converted. :func:`read_parquet` and :func:`read_frame` both convert this way, so a frame is the same
    from either file."""
    return table.to_pandas(split_blocks=True, self_destruct=True, use_threads=False)


def _mapped_table(path: str | Path) -> pa.Table:
    """The table of a file of :func:`write_mapped_table`, memory-mapped (no column is read until used)."""
    try:
        return pa.ipc.open_file(pa.memory_map(str(path))).read_all()
    except (OSError, pa.ArrowInvalid) as err:
        raise UserInputError(f"cannot read {path} ({err}); rerun the workflow") from None


def read_frame(path: str | Path, columns: list[str] | None = None) -> pd.DataFrame:
    """:func:`read_parquet` of a Parquet file, or the same DataFrame from a file of :func:`write_mapped_table`
    (its suffix :data:`MAPPED_SUFFIX`): memory-mapped, only ``columns`` (all if None) converted, column by
    column, as :func:`read_parquet` converts them (:func:`_to_frame`). Its numeric columns may be read-only views
    of the file: no stage writes into the frame it read (the suite and the scale runs read these views), and a new
    one must copy what it changes.
    """
    if Path(path).suffix != MAPPED_SUFFIX:
        return read_parquet(path, columns)
    table = _mapped_table(path)
    return _to_frame(table if columns is None else table.select(columns))


def read_float_matrix(path: str | Path, columns) -> np.ndarray:
    """The numeric ``columns`` of the Parquet file at ``path`` (or of a file of :func:`write_mapped_table`,
    memory-mapped) as one float array (n, k), without a DataFrame: the array ``read_parquet(path,
    columns)[columns].to_numpy(dtype=float)`` gives, value for value and in its memory layout (column-major: each
    column one contiguous run, as pandas builds it from a frame's per-column blocks), so later sums over it run in
    the same order. Read column by column into the array, each Arrow chunk converted once: at 1M episodes x 12,
    usual care's four probability columns in about 1.5 s of CPU instead of 3 to 4 from Parquet.
    """
    columns = list(columns)
    if Path(path).suffix == MAPPED_SUFFIX:
        table = _mapped_table(path).select(columns)
    else:
        table = pq.read_table(path, columns=columns, use_threads=False)
    out = np.empty((len(columns), table.num_rows))
    for row, name in zip(out, columns):
        start = 0
        for chunk in table.column(name).chunks:  # a null becomes NaN, as in pandas' float conversion
            row[start : start + len(chunk)] = chunk.to_numpy(zero_copy_only=False)
            start += len(chunk)
    return out.T


def read_label_codes(path: str | Path, column: str, labels) -> np.ndarray:
    """Codes (n,) of the text column ``column`` of the Parquet file at ``path``: each value's position in ``labels``,
    -1 for a value not among them or missing. The column is read as Arrow's dictionary, so its few distinct texts
    are turned into codes once, not one Python string per row (an action-label column of 12M rows at 1M episodes
    x 12): the codes ``pandas.Categorical(read_parquet(path, [column])[column], categories=labels).codes`` gives.
    """
    table = pq.read_table(path, columns=[column], read_dictionary=[column], use_threads=False)
    chunks = table.column(column).chunks
    position = {label: j for j, label in enumerate(labels)}
    out = np.empty(sum(len(chunk) for chunk in chunks), dtype=np.int64)
    start = 0
    for chunk in chunks:
        if pa.types.is_dictionary(chunk.type):
            lookup = [position.get(text, -1) for text in chunk.dictionary.to_pylist()] + [-1]
            # a missing value has no index into the dictionary: it takes that of the -1 appended to the lookup
            codes = np.asarray(lookup, dtype=np.int64)[chunk.indices.fill_null(len(lookup) - 1).to_numpy()]
        else:  # not text (a column of nulls only, say): pandas' codes
            codes = pd.Categorical(chunk.to_pandas(), categories=list(labels)).codes
        out[start : start + len(chunk)] = codes
        start += len(chunk)
    return out


def parquet_rows(path: str | Path) -> int:
    """The number of rows of the Parquet file at ``path``, read from its metadata without reading any data."""
    return int(pq.read_metadata(path).num_rows)


def parquet_columns(path: str | Path) -> list[str]:
    """The column names of the Parquet file at ``path``, read from its schema without reading any data."""
    return list(pq.read_schema(path).names)


def require_file(path: str | Path, what: str) -> Path:
    """The path, or a one-line error naming what is wrong (missing, a directory, not a regular file, unreadable)
    and the protocol setting to fix."""
    path = Path(path)
    if path.is_dir():
        raise UserInputError(f"{what} file {path} is a directory; point data.{what} in the protocol to a file")
    if not path.exists():
        raise UserInputError(f"{what} file {path} not found; check data.{what} in the protocol")
    if not path.is_file():
        raise UserInputError(
            f"{what} file {path} is not a regular file (a FIFO, socket or device); point data.{what} to a file"
        )
    if not os.access(path, os.R_OK):
        raise UserInputError(f"{what} file {path} cannot be read: {OS_REASONS['EACCES']}")
    return path


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
