"""``regimewise verify RESULTS_DIR``: the checks around a rerun (the command line runs it).

Before anything is rerun, the protocol and every input are hashed and compared with the provenance; a mismatch
is one line naming the file. After the rerun, every manifest entry is compared byte for byte with the rerun's
file, the results folder is checked against its own manifest (an artifact edited since the run), and the two
environments are compared key by key. verification.json records all of it (no time, no absolute path).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from regimewise.appendix.assemble import APPENDIX_FOLDER, MANIFEST
from regimewise.appendix.bundle import REPORT_FILES
from regimewise.appendix.manifest import manifest_differences
from regimewise.appendix.reading import PROVENANCE, differences, run_json
from regimewise.errors import UserInputError
from regimewise.io import sha256_file
from regimewise.protocol.loading import ProtocolFile, load_protocol

VERIFICATION = "verification.json"

MODES = {
    "rerun": "the whole analysis rerun into a new folder",
    "report": "the report rerendered from the run's own stage outputs",
    "against": "compared with another results folder of the same protocol",
}


def check_recorded_inputs(root: Path, protocol: Path) -> ProtocolFile:
    """The protocol, after checking it and every input against the SHA-256 the run recorded (one line naming the
    first file that differs)."""
    recorded = run_json(root, PROVENANCE)
    if not protocol.is_file():
        raise UserInputError(f"verify: protocol {protocol} not found; give the run's protocol with --protocol")
    digest = hashlib.sha256(protocol.read_bytes()).hexdigest()
    if digest != recorded["protocol"]["sha256"]:
        raise UserInputError(
            f"verify: protocol {protocol} differs from the one the run used (SHA-256 {digest[:12]}, recorded "
            f"{recorded['protocol']['sha256'][:12]}); nothing was rerun"
        )
    pf = load_protocol(protocol)
    paths = {"decisions": pf.decisions_path, "episodes": pf.episodes_path}
    for name, entry in sorted(recorded["inputs"].items()):
        path = paths.get(name)
        if path is None or not path.is_file():
            raise UserInputError(
                f"verify: {name} file {entry['file']} not found beside the protocol; nothing was rerun"
            )
        digest = sha256_file(path)
        if digest != entry["sha256"]:
            raise UserInputError(
                f"verify: {name} file {path} differs from the one the run used (SHA-256 {digest[:12]}, recorded "
                f"{entry['sha256'][:12]}); nothing was rerun"
            )
    return pf


def changed_since_run(root: Path) -> list[dict]:
    """Files of the results folder that no longer match its manifest (or that it does not list)."""
    return manifest_differences(run_json(root, f"{APPENDIX_FOLDER}/{MANIFEST}"), root)


def verification(root: Path, mode: str, rerun: Path | None, rerun_environment: dict) -> dict:
    """Compare the run ``root`` with the rerun folder ``rerun`` (mode ``report``: the report files only; None: no
    rerun was made because files changed since the run, which are then the whole finding)."""
    manifest = run_json(root, f"{APPENDIX_FOLDER}/{MANIFEST}")
    paths = list(REPORT_FILES) if mode == "report" else None
    compared = [] if rerun is None else [e["path"] for e in manifest["files"] if paths is None or e["path"] in paths]
    differing = [] if rerun is None else manifest_differences(manifest, rerun, paths)
    changed = manifest_differences(manifest, root)
    identical = len(compared) - sum(d["path"] in compared for d in differing)
    words = MODES[mode] if rerun is not None else f"{MODES[mode]}: not done, the run's own files changed"
    return {
        "mode": mode,
        "mode_words": words,
        "files_compared": len(compared),
        "identical": identical,
        "differing": differing,
        "changed_since_run": changed,
        "environment_differences": [
            {"key": d["key"], "recorded": d["a"], "rerun": d["b"]}
            for d in differences(run_json(root, f"{APPENDIX_FOLDER}/environment.json"), rerun_environment)
        ],
        "verdict": "identical" if compared and not differing and not changed else "differs",
    }


def verdict_line(record: dict) -> str:
    """One line: identical, or what differs (the first paths named)."""
    environment = len(record["environment_differences"])
    env_words = f"{environment} environment difference{'s' * (environment != 1)}"
    if record["verdict"] == "identical":
        return (
            f"verified: {record['mode_words']}; all {record['files_compared']} files identical byte for byte "
            f"({env_words})"
        )
    parts = []
    if record["changed_since_run"]:
        parts.append("changed since the run: " + _paths(record["changed_since_run"]))
    if record["differing"]:
        parts.append(
            f"{len(record['differing'])} of {record['files_compared']} files differ in the rerun: "
            + _paths(record["differing"])
        )
    return f"NOT identical ({record['mode_words']}): " + "; ".join(parts) + f" ({env_words})"


def _paths(items: list[dict], shown: int = 3) -> str:
    names = [f"{d['path']} ({d['problem']})" for d in items[:shown]]
    return ", ".join(names) + (f" and {len(items) - shown} more" if len(items) > shown else "")
