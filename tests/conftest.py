"""Shared fixtures."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from hypothesis import settings
from support.tiny import write_tiny

# CI runs property-based tests with a fixed seed so a result can be reproduced; local runs keep exploring.
settings.register_profile("ci", derandomize=True)
if os.environ.get("CI"):
    settings.load_profile("ci")


@pytest.fixture
def tiny(tmp_path) -> Path:
    return write_tiny(tmp_path / "study")
