"""The demo protocol's guideline comparator written out by hand with numpy, independently of the package's rule
grammar, for tests that check the comparator's actions or values."""

from __future__ import annotations

import numpy as np


def guideline_by_hand(states) -> np.ndarray:
    """step_up (2) when sbp > 140, potassium <= 5.5 and eGFR >= 30; else step_down (1) when sbp < 110 and the
    therapy level is at least 1; else hold (0)."""
    up = (states["sbp"] > 140) & (states["potassium"] <= 5.5) & (states["egfr"] >= 30)
    down = (states["sbp"] < 110) & (states["therapy_level"] >= 1)
    return np.where(up, 2, np.where(down, 1, 0))
