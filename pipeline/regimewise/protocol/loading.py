"""Reading a protocol file: a safe YAML loader that refuses repeated keys, validation with one-line errors, the
record paths resolved relative to the protocol file, and the JSON Schema export.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

import yaml
from pydantic import ValidationError

from regimewise.errors import ProtocolError, os_reason
from regimewise.protocol.identifiers import identifier_category, mask, scrub
from regimewise.protocol.messages import describe_validation_error
from regimewise.protocol.model import Protocol


# ---------------------------------------------------------------------------------------------- loading
class _UniqueKeyLoader(yaml.SafeLoader):
    """A safe YAML loader that refuses a key repeated in one mapping (YAML would silently keep the last)."""


def _construct_unique_mapping(loader, node, deep=False):
    keys = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in keys:
            raise ProtocolError(
                f"line {key_node.start_mark.line + 1}: key {key!r} appears twice in one section; keep one"
            )
        keys.add(key)
    return loader.construct_mapping(node, deep=deep)


_UniqueKeyLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_unique_mapping)


@dataclass(frozen=True)
class ProtocolFile:
    """A validated protocol together with where it came from."""

    protocol: Protocol
    path: Path
    sha256: str

    def resolve(self, relative: str) -> Path:
        """Resolve a path written in the protocol, relative to the protocol file's folder."""
        return (self.path.parent / relative).resolve()

    @property
    def decisions_path(self) -> Path:
        return self.resolve(self.protocol.data.decisions)

    @property
    def episodes_path(self) -> Path | None:
        episodes = self.protocol.data.episodes
        return None if episodes is None else self.resolve(episodes)

    def check_record_paths(self) -> None:
        """Refuse a record path that leads outside ``data.root`` (relative or absolute), and a record file whose
        name looks like a direct identifier (the name reaches validation.json, the provenance and the report)."""
        root = self.resolve(self.protocol.data.root)
        for key in ("decisions", "episodes"):
            written = getattr(self.protocol.data, key)
            if written is None:
                continue
            refuse_identifier_name(Path(written).name, f"protocol {self.path.name}: data.{key}")
            if not self.resolve(written).is_relative_to(root):
                raise ProtocolError(
                    f"protocol {self.path}: data.{key} {scrub(written)!r} leads outside data.root "
                    f"{self.protocol.data.root!r}; move the file inside that folder or widen data.root"
                )


def refuse_identifier_name(name: str, where: str) -> None:
    """A one-line refusal, without the name, when a file name looks like a direct identifier.

    Dates are let through: an extract's date in its file name (``decisions_2024-06-30.csv``) is common and
    belongs to no one.
    """
    category = identifier_category(name, names=False) or identifier_category(Path(name).stem, names=False)
    if category is not None and category != "full date":
        raise ProtocolError(
            f"{where}: the file name looks like a direct identifier ({category}; {mask(name)}); rename the "
            "file to a study code (e.g. decisions.csv) and point the protocol to it"
        )


def _read_protocol_bytes(path: Path) -> bytes:
    """The protocol file's bytes, or one line naming what is wrong with the path (kind or operating-system cause)."""
    refuse_identifier_name(path.name, "protocol")
    if path.is_dir():
        raise ProtocolError(f"protocol {path} is a directory; give the path to a protocol YAML file")
    if not path.exists():
        raise ProtocolError(f"protocol file {path} not found; give the path to a protocol YAML file")
    if not path.is_file():
        raise ProtocolError(f"protocol {path} is not a regular file (a FIFO, socket or device); give a YAML file")
    try:
        return path.read_bytes()
    except OSError as err:
        raise ProtocolError(f"protocol {path} cannot be read: {os_reason(err)}") from None


def yaml_problem(err: Exception) -> str:
    """What the YAML parser found and where, without the source line it would quote (it may hold an identifier)."""
    problem = getattr(err, "problem", None) or getattr(err, "context", None) or type(err).__name__
    mark = getattr(err, "problem_mark", None) or getattr(err, "context_mark", None)
    where = "" if mark is None else f"line {mark.line + 1}, column {mark.column + 1}: "
    if isinstance(err, UnicodeDecodeError):
        return f"not UTF-8 text (byte {err.start})"
    return where + scrub(problem)


def load_protocol(path: str | Path) -> ProtocolFile:
    """Read and validate a protocol file.

    Raises
    ------
    ProtocolError
        One line naming the file, the setting and what to change.
    """
    path = Path(path).resolve()
    raw = _read_protocol_bytes(path)
    try:
        data = yaml.load(raw.decode("utf-8"), Loader=_UniqueKeyLoader)  # noqa: S506 - safe loader subclass
    except ProtocolError as err:
        raise ProtocolError(f"protocol {path}: {err}") from None
    except (yaml.YAMLError, UnicodeDecodeError, ValueError) as err:
        raise ProtocolError(f"protocol {path}: not valid YAML ({yaml_problem(err)}); fix the syntax") from None
    if not isinstance(data, dict):
        raise ProtocolError(f"protocol {path}: expected a mapping of sections (study, data, states, ...)")
    try:
        protocol = Protocol.model_validate(data)
    except ValidationError as err:
        raise ProtocolError(f"protocol {path}: {describe_validation_error(err, data, Protocol)}") from None
    pf = ProtocolFile(protocol=protocol, path=path, sha256=hashlib.sha256(raw).hexdigest())
    pf.check_record_paths()
    return pf


def protocol_schema() -> dict:
    """JSON Schema of the protocol, with the ``$schema`` key Snakemake's validator needs."""
    schema = Protocol.model_json_schema()
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}


def schema_text() -> str:
    """The protocol's JSON Schema as written to a file: sorted keys, two-space indent, trailing newline."""
    return json.dumps(protocol_schema(), indent=2, sort_keys=True) + "\n"


def export_schema(path: str | Path) -> None:
    """Write the protocol's JSON Schema (:func:`schema_text`) to ``path``."""
    Path(path).write_text(schema_text(), encoding="utf-8")
