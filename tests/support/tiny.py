"""A tiny valid protocol with made-up records, for tests (not a real or realistic study)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import yaml

REPOSITORY = Path(__file__).resolve().parents[2]


def tiny_protocol_dict(decisions="decisions.csv", episodes=None) -> dict:
    """A minimal protocol: two states, three actions, horizon 3 (the data are made up for tests)."""
    return {
        "study": {"title": "Tiny test study", "question": "Does the test pass?", "version": "0.1", "run_name": "tiny"},
        "data": {"decisions": decisions, "episodes": episodes},
        "states": [
            {"name": "bp", "label": "Pressure", "kind": "continuous", "unit": "mmHg", "plausible_range": [70, 250]},
            {"name": "flag", "label": "A flag", "kind": "binary", "plausible_range": [0, 1]},
        ],
        "actions": [
            {"label": "hold", "description": "keep"},
            {"label": "up", "description": "increase"},
            {"label": "down", "description": "decrease"},
        ],
        "reward": {"description": "made-up reward"},
        "horizon": 3,
        "seed": 7,
    }


def tiny_decisions(n_episodes=40, seed=0) -> pd.DataFrame:
    """A valid decisions table for the tiny protocol."""
    rng = np.random.default_rng(seed)
    rows = []
    for e in range(n_episodes):
        for t in range(3):
            rows.append(
                {
                    "episode_id": f"E{e:03d}",
                    "patient_id": f"P{e // 2:03d}",
                    "step": t,
                    "day": 90 * t + int(rng.integers(0, 5)),
                    "bp": round(float(rng.normal(140, 15)), 1),
                    "flag": int(rng.integers(0, 2)),
                    "action": ["hold", "up", "down"][int(rng.integers(0, 3))],
                    "reward": round(float(rng.normal()), 3),
                }
            )
    return pd.DataFrame(rows)


def tiny_episodes(decisions: pd.DataFrame | None = None) -> pd.DataFrame:
    """A valid episodes table for tiny_decisions: every fifth episode has a (non-fatal) event, which may fall
    before the last decision; censored episodes are followed up 30 days past their last decision."""
    decisions = tiny_decisions() if decisions is None else decisions
    last = decisions.groupby("episode_id", sort=True).agg(patient_id=("patient_id", "first"), last=("day", "max"))
    event = (np.arange(len(last)) % 5 == 0).astype(int)
    followup = np.where(event == 1, 100, last["last"].to_numpy() + 30)
    return pd.DataFrame(
        {
            "episode_id": last.index,
            "patient_id": last["patient_id"].to_numpy(),
            "followup_days": followup,
            "event": event,
        }
    )


def write_tiny(folder: Path, protocol=None, decisions=None, episodes=None) -> Path:
    """Write a tiny protocol and decisions file (and an episodes file if given) into folder; return the
    protocol path."""
    folder.mkdir(parents=True, exist_ok=True)
    (decisions if decisions is not None else tiny_decisions()).to_csv(folder / "decisions.csv", index=False)
    if episodes is not None:
        episodes.to_csv(folder / "episodes.csv", index=False)
    default = tiny_protocol_dict(episodes=None if episodes is None else "episodes.csv")
    path = folder / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol or default, sort_keys=False), encoding="utf-8")
    return path


def set_cell(row, column, value):
    """A change that puts value into one cell (column cast to object so any value fits)."""

    def change(frame: pd.DataFrame) -> None:
        frame[column] = frame[column].astype(object)
        frame.loc[row, column] = value

    return change
