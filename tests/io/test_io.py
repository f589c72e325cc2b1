"""Whole-or-nothing writes that honour the user's umask."""

from __future__ import annotations

import os
import stat

import pytest

from regimewise.io import atomic_path, write_text


@pytest.mark.parametrize(("umask", "mode"), [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)])
def test_outputs_follow_the_umask(tmp_path, umask, mode):
    # Reference: POSIX open(2) semantics, a new file's mode is 0666 & ~umask (what `touch` would give).
    previous = os.umask(umask)
    try:
        write_text(tmp_path / "out.txt", "x")
    finally:
        os.umask(previous)
    assert stat.S_IMODE((tmp_path / "out.txt").stat().st_mode) == mode


def test_a_failed_write_leaves_nothing(tmp_path):
    with pytest.raises(RuntimeError), atomic_path(tmp_path / "out.txt") as tmp:
        tmp.write_text("half")
        raise RuntimeError("stop")
    assert list(tmp_path.iterdir()) == []
