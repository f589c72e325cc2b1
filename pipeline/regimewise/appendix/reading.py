"""Reading a finished run's records back: one line naming the file when one is missing, unreadable or edited."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import yaml

from regimewise.appendix.assemble import APPENDIX_FOLDER, MANIFEST, RESOLVED
from regimewise.errors import UserInputError

PROVENANCE = "report/appendix/provenance.json"


def results_folder(path: str | Path, command: str) -> Path:
    """The results folder, or one line when it is not a finished run with an appendix."""
    root = Path(path)
    if not root.is_dir():
        raise UserInputError(f"{command}: {root} is not a folder; give the results folder of a finished run")
    if not (root / APPENDIX_FOLDER / MANIFEST).is_file():
        raise UserInputError(
            f"{command}: {root} has no {APPENDIX_FOLDER}/{MANIFEST}; give the results folder of a run that finished "
            "(a run made before the appendix existed needs to be run again)"
        )
    return root


def run_json(root: Path, relative: str):
    """A JSON record of the run, or one line naming it."""
    path = root / relative
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserInputError(f"{path} is missing; the results folder is incomplete (run the analysis again)") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as err:
        raise UserInputError(f"{path} cannot be read as JSON ({type(err).__name__}); the file is damaged") from None


def resolved_protocol(root: Path) -> dict:
    """The run's resolved protocol, checked against its recorded SHA-256."""
    path = root / APPENDIX_FOLDER / RESOLVED
    hash_file = path.with_name(f"{RESOLVED}.sha256")
    if not path.is_file() or not hash_file.is_file():
        raise UserInputError(f"{path} or its .sha256 is missing; the results folder is incomplete")
    data = path.read_bytes()
    if hash_file.read_text(encoding="utf-8").split()[0] != hashlib.sha256(data).hexdigest():
        raise UserInputError(f"{path} does not match its recorded SHA-256 ({hash_file.name}); it was edited")
    return yaml.safe_load(data.decode("utf-8"))


def flatten(value, prefix: str = "") -> dict:
    """Dotted key -> value of nested mappings (lists of mappings by index; other lists as one value)."""
    if isinstance(value, dict):
        items = value.items()
    elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
        items = ((f"[{i}]", v) for i, v in enumerate(value))
    else:
        return {prefix: value}
    flat = {}
    for key, inner in items:
        name = f"{prefix}{key}" if str(key).startswith("[") or not prefix else f"{prefix}.{key}"
        flat.update(flatten(inner, name))
    return flat


def differences(a, b) -> list[dict]:
    """Every dotted key whose value differs between ``a`` and ``b`` (absent: null), sorted by key."""
    fa, fb = flatten(a), flatten(b)
    return [{"key": k, "a": fa.get(k), "b": fb.get(k)} for k in sorted(set(fa) | set(fb)) if fa.get(k) != fb.get(k)]
