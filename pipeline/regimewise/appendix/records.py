"""The appendix's records of settings and commands: the resolved protocol and its hash, the seed streams, the
command line that was run and the one that reproduces it.

The command line is recorded as typed, except that an absolute path is written relative to the working folder
when it lies inside it and shortened to ``.../<name>`` when it does not (no absolute path enters an artifact).
"""

from __future__ import annotations

import hashlib
import shlex
from pathlib import Path

import yaml

from regimewise.core.seeds import RETIRED, STREAM_USES, STREAMS, stream
from regimewise.protocol.model import Protocol

RESULTS_PLACEHOLDER = "RESULTS_DIR"


def resolved_protocol_text(protocol: Protocol) -> str:
    """The validated protocol with every default filled in, as YAML in the model's field order (it validates
    to the same protocol)."""
    return yaml.safe_dump(protocol.model_dump(mode="json"), sort_keys=False, allow_unicode=True, width=100)


def sha256_line(text: str | bytes, name: str) -> str:
    """``<sha256>  <name>`` as ``sha256sum`` writes it (``sha256sum -c`` checks it from the same folder)."""
    data = text.encode("utf-8") if isinstance(text, str) else text
    return f"{hashlib.sha256(data).hexdigest()}  {name}\n"


def seeds_record(root_seed: int) -> dict:
    """The root seed and the table of streams, with the first two words of each unindexed stream's state so a
    reader can check that their numpy derives the same seeds."""
    streams = []
    for name, number in STREAMS.items():
        use, index = STREAM_USES[name]
        entry = {"name": name, "number": number, "index": list(index), "draws": use}
        if not index:
            entry["first_state_words"] = [int(x) for x in stream(root_seed, name).generate_state(2)]
        streams.append(entry)
    return {
        "root_seed": root_seed,
        "rule": "numpy.random.SeedSequence(root_seed, spawn_key=(number, *index))",
        "streams": streams,
        "retired_numbers": list(RETIRED),
    }


def shown_command(argv: list[str], cwd: Path) -> str:
    """``regimewise ARGV`` as typed, with absolute paths made relative to ``cwd`` or shortened to ``.../name``."""
    return shlex.join(["regimewise", *(_shown_argument(arg, cwd) for arg in argv)])


def _shown_argument(arg: str, cwd: Path) -> str:
    option, equals, value = arg.partition("=") if arg.startswith("--") else ("", "", arg)
    if not Path(value).is_absolute():
        return arg
    path = Path(value)
    shown = path.relative_to(cwd).as_posix() or "." if path.is_relative_to(cwd) else f".../{path.name}"
    return f"{option}{equals}{shown}"


def reproduce_command(demo: bool, protocol: Path) -> str:
    """The command that reruns the analysis: the demo, or ``run`` with the protocol's file name."""
    return "regimewise demo" if demo else shlex.join(["regimewise", "run", protocol.name])


def commands_text(command: str, reproduce: str) -> str:
    """commands.txt: the command that was run, the one that reproduces it and the one that checks a rerun."""
    ran = command or "not recorded: the workflow was started by Snakemake directly, not by the regimewise command"
    return (
        "# The command that was run (absolute paths written relative to the working folder, or as .../name)\n"
        f"{ran}\n"
        "# The command that reproduces the analysis (`run` from the folder holding the protocol; --out chooses the "
        "results folder)\n"
        f"{reproduce}\n"
        "# Rerun the analysis and compare every file of appendix/manifest.json byte for byte\n"
        f"regimewise verify {RESULTS_PLACEHOLDER}\n"
    )
