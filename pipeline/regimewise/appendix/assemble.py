"""Writing the appendix folder: one table of files and their writers, then the manifest.

Each entry of :data:`APPENDIX` names the files one writer returns; the rule's outputs
(:func:`appendix_outputs`) and the stage both read this table, so adding a record to the appendix is one line
here. The manifest is written last and never lists the appendix folder (:mod:`regimewise.appendix.manifest`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from regimewise.appendix.environment import environment_record
from regimewise.appendix.manifest import artifact_paths, build_manifest
from regimewise.appendix.records import commands_text, resolved_protocol_text, seeds_record, sha256_line
from regimewise.io import dumps_json, read_json, write_bytes, write_json, write_text
from regimewise.protocol.loading import ProtocolFile

APPENDIX_FOLDER = "appendix"
MANIFEST = "manifest.json"
RESOLVED = "protocol.resolved.yaml"
PROTOCOL_COPY = "protocol.yaml"


@dataclass(frozen=True)
class AppendixRun:
    """What the writers know: the protocol, the results folder, the command run and the one that reproduces it."""

    pf: ProtocolFile
    root: Path
    command: str
    reproduce: str


def _environment(run: AppendixRun) -> dict:
    return {"environment.json": dumps_json(environment_record())}


def _protocol(run: AppendixRun) -> dict:
    resolved = resolved_protocol_text(run.pf.protocol)
    return {
        RESOLVED: resolved,
        f"{RESOLVED}.sha256": sha256_line(resolved, RESOLVED),
        PROTOCOL_COPY: run.pf.path.read_bytes(),  # the protocol as written; its SHA-256 is the provenance's
    }


def _seeds(run: AppendixRun) -> dict:
    return {"seeds.json": dumps_json(seeds_record(run.pf.protocol.seed))}


def _commands(run: AppendixRun) -> dict:
    return {"commands.txt": commands_text(run.command, run.reproduce)}


def _checklist(run: AppendixRun) -> dict:
    """The reporting checklists (TARGET, RECORD, Gottesman et al.) answered from the run's summary and protocol,
    pointing into the artifacts the manifest lists."""
    # imported here: the checklist renders with the report's machinery (matplotlib, statsmodels), which the
    # readers of this module's names (the command line, verify, bundle, the Snakefile) do not need
    from regimewise.appendix.checklist import build_checklist, render_checklist_html

    checklist = build_checklist(
        read_json(run.root / "report" / "summary.json"), run.pf.protocol, set(artifact_paths(run.root))
    )
    return {
        "checklist.json": dumps_json(checklist),
        "checklist.html": render_checklist_html(checklist, report_href="../report/report.html"),
    }


@dataclass(frozen=True)
class AppendixFiles:
    names: tuple[str, ...]
    write: Callable[[AppendixRun], dict]


APPENDIX = (
    AppendixFiles(("environment.json",), _environment),
    AppendixFiles((RESOLVED, f"{RESOLVED}.sha256", PROTOCOL_COPY), _protocol),
    AppendixFiles(("seeds.json",), _seeds),
    AppendixFiles(("commands.txt",), _commands),
    AppendixFiles(("checklist.json", "checklist.html"), _checklist),
)


def appendix_outputs() -> dict[str, str]:
    """Output name -> path under the results folder of every appendix file (the manifest as ``manifest``)."""
    names = [MANIFEST, *(name for entry in APPENDIX for name in entry.names)]
    return {_output_name(name): f"{APPENDIX_FOLDER}/{name}" for name in names}


def _output_name(file_name: str) -> str:
    return file_name.removesuffix(".json").replace(".", "_")


def write_appendix(run: AppendixRun) -> None:
    """Write every file of :data:`APPENDIX` under ``<root>/appendix/``, then the manifest of the run."""
    folder = run.root / APPENDIX_FOLDER
    for entry in APPENDIX:
        files = entry.write(run)
        assert set(files) == set(entry.names), f"{entry.write.__name__} wrote {sorted(files)}, not {entry.names}"
        for name, content in files.items():
            (write_bytes if isinstance(content, bytes) else write_text)(folder / name, content)
    write_json(folder / MANIFEST, build_manifest(run.root))
