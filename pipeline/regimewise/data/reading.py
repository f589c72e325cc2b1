"""Reading a records file: CSV (UTF-8, with or without BOM, the protocol's delimiter) or Parquet, with repeated or
wrongly delimited headers refused in one line and every cell shown only through the de-identification mask.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from regimewise.data.deidentify import scrub, shown_value
from regimewise.errors import UserInputError, os_reason
from regimewise.io import read_parquet, require_file

NEWLINE = b"\n"


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
            schema = pq.read_schema(path)
            _refuse_repeated_names(schema.names, path, what)
            _refuse_nested_types(schema, path, what)
            frame = read_parquet(path)
        elif suffix in {".csv", ".txt", ".tsv"}:
            _refuse_nul_bytes(path, what)
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
        raise UserInputError(
            f"{what} file {path.name} is empty; it needs a header row and at least one record"
        ) from None
    except UnicodeDecodeError as err:
        raise UserInputError(
            f"{what} file {path.name} is not UTF-8 text (byte {err.start}); save it as UTF-8 (with or without BOM)"
        ) from None
    except OSError as err:
        if err.errno is None:  # pyarrow's own read errors carry no operating-system cause
            raise UserInputError(
                f"{what} file {path.name} cannot be read ({scrub(str(err))[:200]}); check its format"
            ) from None
        raise UserInputError(f"{what} file {path.name} cannot be read: {os_reason(err)}") from None
    except (ValueError, pa.ArrowException) as err:
        raise UserInputError(
            f"{what} file {path.name} cannot be read ({scrub(str(err))[:200]}); check its format"
        ) from None
    if frame.empty:
        raise UserInputError(f"{what} file {path.name} has a header but no records; add the records")
    _refuse_wrong_delimiter(frame, path, what, delimiter)
    return frame


def _csv_header(path: Path, delimiter: str) -> list[str]:
    import csv

    with open(path, encoding="utf-8-sig", newline="") as handle:
        return next(csv.reader(handle, delimiter=delimiter), [])


def _refuse_nul_bytes(path: Path, what: str) -> None:
    """A NUL byte ends a cell early in the CSV parser (the value would be cut short): refuse it, naming the line."""
    line = 1
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            at = block.find(b"\x00")
            if at >= 0:
                line += block.count(NEWLINE, 0, at)
                raise UserInputError(
                    f"{what} file {path.name}: line {line} holds a NUL byte (a control "
                    "character, or a UTF-16 file); save it as UTF-8 text without control characters"
                )
            line += block.count(NEWLINE)


def _refuse_nested_types(schema: pa.Schema, path: Path, what: str) -> None:
    """Lists, structs, maps and raw bytes are not cells of an analysis extract (named by position only)."""
    for position, field in enumerate(schema, start=1):
        kind = field.type
        if pa.types.is_nested(kind) or pa.types.is_binary(kind) or pa.types.is_large_binary(kind):
            shown = "lists, structs or maps" if pa.types.is_nested(kind) else "raw bytes"
            raise UserInputError(
                f"{what} file {path.name}: column {position} holds {shown}; flatten it to one number or code per "
                "cell (or drop it) before analysis"
            )


def _refuse_repeated_names(names, path: Path, what: str) -> None:
    seen = set()
    for position, name in enumerate(names, start=1):
        if name in seen:
            raise UserInputError(
                f"{what} file {path.name}: column {shown_value(name)!r} appears twice in the header (column "
                f"{position}); rename or drop one"
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
