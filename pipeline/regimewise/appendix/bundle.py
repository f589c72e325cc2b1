"""``regimewise bundle RESULTS_DIR``: one zip with the report, the summary, the provenance and the appendix
(which holds the protocol as written and resolved), byte-identical whenever its files are.

Deterministic: entries sorted by path under one top folder named after the run, every timestamp 1980-01-01
00:00 (the earliest a zip can hold), permissions 0644, DEFLATE at level 9, no extra fields or comment. The report,
summary and provenance are checked against the manifest first, so an edited file is never bundled silently.
"""

from __future__ import annotations

import io
import zipfile
from pathlib import Path

from regimewise.appendix.assemble import APPENDIX_FOLDER, MANIFEST
from regimewise.appendix.manifest import manifest_differences
from regimewise.appendix.reading import PROVENANCE, run_json
from regimewise.errors import UserInputError

REPORT_FILES = ("report/report.html", "report/summary.json", PROVENANCE)
FIXED_TIME = (1980, 1, 1, 0, 0, 0)


def bundle_paths(root: Path) -> list[str]:
    """Relative paths of the files a bundle holds, sorted."""
    appendix = sorted(
        p.relative_to(root).as_posix()
        for p in (root / APPENDIX_FOLDER).iterdir()
        if p.is_file() and not p.name.startswith(".")
    )
    return sorted([*REPORT_FILES, *appendix])


def bundle_bytes(root: Path) -> bytes:
    """The zip of :func:`bundle_paths` under the folder ``<run_name>/``."""
    edited = manifest_differences(run_json(root, f"{APPENDIX_FOLDER}/{MANIFEST}"), root, list(REPORT_FILES))
    if edited:
        raise UserInputError(
            f"{root / edited[0]['path']} does not match appendix/manifest.json ({edited[0]['problem']}); run "
            "`regimewise verify` or rerun the analysis before bundling"
        )
    top = run_json(root, "report/summary.json")["study"]["run_name"]
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for relative in bundle_paths(root):
            info = zipfile.ZipInfo(f"{top}/{relative}", date_time=FIXED_TIME)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.create_system = 3  # Unix, so the permission bits below are read
            info.external_attr = (0o100644 & 0xFFFF) << 16
            archive.writestr(info, (root / relative).read_bytes(), compresslevel=9)
    return buffer.getvalue()
