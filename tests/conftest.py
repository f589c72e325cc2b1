"""Shared fixtures."""

from __future__ import annotations

from pathlib import Path

import pytest
from tiny import write_tiny


@pytest.fixture
def tiny(tmp_path) -> Path:
    return write_tiny(tmp_path / "study")
