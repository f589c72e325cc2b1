"""The manifest: every artifact of a run with its size and SHA-256, and the check of a folder against it.

The manifest lists every regular file under the stage folders and ``report/`` (:data:`ARTIFACT_FOLDERS`). It
does not list the ``appendix/`` folder, so it never lists itself, nor the records of how and where the run was
made (environment, command line, a later verification); it lists no log, benchmark or Snakemake file (``logs/``,
``benchmarks/``, ``.snakemake/``: wall-clock times and machine figures), and no hidden file (the atomic writer's
temporary ``.partial`` files). What it lists depends only on the inputs, the protocol and the software.
"""

from __future__ import annotations

from pathlib import Path

from regimewise.io import sha256_file

# Every folder a workflow rule writes its artifacts into, relative to the results folder (checked against the
# rules by tests/appendix/test_manifest.py).
ARTIFACT_FOLDERS = (
    "validate",
    "behaviour",
    "regime",
    "evaluate",
    "describe",
    "bootstrap",
    "sensitivity",
    "survival",
    "sweep",
    "selfcheck",
    "report",
)

EXCLUDED = (
    "appendix/ (the manifest itself, the environment, the command line and verification records), logs/, "
    "benchmarks/ and .snakemake/ (times and machine figures), hidden files"
)


def artifact_paths(root: str | Path) -> list[str]:
    """Relative POSIX paths of every artifact under ``root``'s artifact folders, sorted."""
    root = Path(root)
    found = []
    for folder in ARTIFACT_FOLDERS:
        for path in (root / folder).rglob("*"):
            relative = path.relative_to(root)
            if path.is_file() and not path.is_symlink() and not any(p.startswith(".") for p in relative.parts):
                found.append(relative.as_posix())
    return sorted(found)


def file_entry(root: str | Path, relative: str) -> dict:
    path = Path(root) / relative
    return {"path": relative, "bytes": path.stat().st_size, "sha256": sha256_file(path)}


def build_manifest(root: str | Path) -> dict:
    """The manifest of the results folder ``root``."""
    return {
        "files": [file_entry(root, relative) for relative in artifact_paths(root)],
        "folders": list(ARTIFACT_FOLDERS),
        "not_listed": EXCLUDED,
    }


def manifest_differences(manifest: dict, root: str | Path, paths: list[str] | None = None) -> list[dict]:
    """Files of ``manifest`` whose copy under ``root`` is missing or has other bytes, and artifacts under ``root``
    the manifest does not list; each ``{"path", "problem"}``. ``paths`` restricts the check to those entries."""
    root = Path(root)
    listed = {entry["path"]: entry for entry in manifest["files"]}
    wanted = sorted(listed) if paths is None else sorted(p for p in paths if p in listed)
    differences = []
    for relative in wanted:
        path = root / relative
        if not path.is_file():
            differences.append({"path": relative, "problem": "missing"})
        elif path.stat().st_size != listed[relative]["bytes"] or sha256_file(path) != listed[relative]["sha256"]:
            differences.append({"path": relative, "problem": "different bytes"})
    if paths is None:
        differences += [{"path": p, "problem": "not in the manifest"} for p in artifact_paths(root) if p not in listed]
    return sorted(differences, key=lambda d: d["path"])
