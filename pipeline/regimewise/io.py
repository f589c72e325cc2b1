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
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import UserInputError


@contextmanager
def atomic_path(path: str | Path):
    """Yield a temporary path beside ``path``; rename it onto ``path`` only if the block succeeds."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.replace(tmp, path)
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


def write_parquet(path: str | Path, frame: pd.DataFrame, caution: str | None = None) -> None:
    """Write a DataFrame to Parquet atomically (no index; deterministic for the same pyarrow version).

    ``caution``, if given, is stored in the file's metadata under the key ``regimewise.caution``.
    """
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if caution is not None:
        table = table.replace_schema_metadata({**(table.schema.metadata or {}), b"regimewise.caution": caution.encode()})
    with atomic_path(path) as tmp:
        pq.write_table(table, tmp, compression="zstd")


def read_parquet(path: str | Path) -> pd.DataFrame:
    return pd.read_parquet(path, engine="pyarrow")


def require_file(path: str | Path, what: str) -> Path:
    """The path, or a one-line error naming the protocol setting to fix."""
    path = Path(path)
    if not path.is_file():
        raise UserInputError(f"{what} file {path} not found; check data.{what} in the protocol")
    return path


DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}


def read_table(path: str | Path, what: str, delimiter: str = ",") -> pd.DataFrame:
    """Read a CSV or Parquet table named in the protocol, with a clear one-line error when it cannot be read.

    CSV is read as UTF-8 with or without a byte-order mark, with the protocol's delimiter; columns are typed by
    pandas' inference and numeric parsing problems are left to validation, which names the row. Refused here:
    unknown formats, empty files, header-only files, repeated column names and a delimiter that does not match.
    Parser messages are scrubbed of anything that looks like an identifier before they are shown.
    """
    path = require_file(path, what)
    suffix = path.suffix.lower()
    try:
        if suffix in {".parquet", ".pq"}:
            names = pq.read_schema(path).names
            _refuse_repeated_names(names, path, what)
            frame = pd.read_parquet(path, engine="pyarrow")
        elif suffix in {".csv", ".txt", ".tsv"}:
            _refuse_repeated_names(_csv_header(path, delimiter), path, what)
            frame = pd.read_csv(path, encoding="utf-8-sig", sep=delimiter, low_memory=False)
            if not isinstance(frame.index, pd.RangeIndex):  # pandas moved surplus fields into the index
                raise UserInputError(
                    f"{what} file {path.name}: some rows have more fields than the header has columns; "
                    "check the header line and data.delimiter"
                )
        else:
            raise UserInputError(f"{what} file {path.name}: unknown format {suffix!r}; use .csv or .parquet")
    except UserInputError:
        raise
    except pd.errors.EmptyDataError:
        raise UserInputError(f"{what} file {path.name} is empty; it needs a header row and at least one record") from None
    except UnicodeDecodeError as err:
        raise UserInputError(
            f"{what} file {path.name} is not UTF-8 text (byte {err.start}); save it as UTF-8 (with or without BOM)"
        ) from None
    except (ValueError, OSError, pa.ArrowException) as err:
        from .deidentify import scrub

        raise UserInputError(f"{what} file {path.name} cannot be read ({scrub(str(err))[:200]}); check its format") from None
    if frame.empty:
        raise UserInputError(f"{what} file {path.name} has a header but no records; add the records")
    _refuse_wrong_delimiter(frame, path, what, delimiter)
    return frame


def _csv_header(path: Path, delimiter: str) -> list[str]:
    import csv

    with open(path, encoding="utf-8-sig", newline="") as handle:
        return next(csv.reader(handle, delimiter=delimiter), [])


def _refuse_repeated_names(names, path: Path, what: str) -> None:
    seen = set()
    for name in names:
        if name in seen:
            raise UserInputError(
                f"{what} file {path.name}: column {name!r} appears twice in the header; rename or drop one"
            )
        seen.add(name)


def _refuse_wrong_delimiter(frame: pd.DataFrame, path: Path, what: str, delimiter: str) -> None:
    if path.suffix.lower() in {".parquet", ".pq"} or frame.shape[1] > 1:
        return
    header = str(frame.columns[0])
    for other, name in DELIMITER_NAMES.items():
        if other != delimiter and other in header:
            raise UserInputError(
                f"{what} file {path.name} has a single column but its header contains {name}s; set "
                f"data.delimiter to {other!r} in the protocol"
            )


def sha256_file(path: str | Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()
