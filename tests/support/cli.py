"""The command line as a user types it, in a subprocess."""

from __future__ import annotations

import subprocess
import sys

CLI = [sys.executable, "-m", "regimewise.cli"]


def run_cli(*args, cwd=None):
    """Run ``regimewise ARGS`` and return the completed process (output captured as text)."""
    return subprocess.run([*CLI, *map(str, args)], capture_output=True, text=True, cwd=cwd, check=False)
