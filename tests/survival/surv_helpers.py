"""Small data builders shared by the survival tests (no expected values live here)."""

from pathlib import Path

import lifelines
import numpy as np
import pandas as pd


def random_cohort(seed, n_episodes=300, n_steps=4, n_actions=3):
    """Episodes with integer decision days (so event days often coincide with decision days) and random p̂.

    Returns decisions, episodes, usual-care probabilities (n, K) and states (n, 2).
    """
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    ids = np.array([f"E{i:04d}" for i in range(n_episodes)])
    step = np.tile(np.arange(n_steps), n_episodes)
    day = 30 * step + rng.integers(0, 4, size=step.shape[0])
    patients = [f"P{i // 2:04d}" for i in range(n_episodes)]  # two episodes per patient
    decisions = pd.DataFrame(
        {
            "episode_id": np.repeat(ids, n_steps),
            "patient_id": np.repeat(patients, n_steps),
            "step": step,
            "day": day.astype(float),
            "action": rng.integers(0, n_actions, size=step.shape[0]),
        }
    )
    episodes = pd.DataFrame(
        {
            "episode_id": ids,
            "followup_days": rng.integers(1, 150, size=n_episodes).astype(float),
            "event": rng.integers(0, 2, size=n_episodes),
        }
    )
    proba = rng.dirichlet(np.ones(n_actions), size=step.shape[0])
    proba = 0.9 * proba + 0.1 / n_actions  # keep every action possible
    states = rng.normal(size=(step.shape[0], 2))
    return decisions, episodes, proba, states


def one_hot(codes, n_actions):
    """Deterministic strategy probabilities from action codes."""
    out = np.zeros((len(codes), n_actions))
    out[np.arange(len(codes)), np.asarray(codes)] = 1.0
    return out


def point_treatment(ids, action, followup, event, patients=None):
    """Decisions and episodes tables of a single decision at day 0 per episode."""
    ids = pd.Series(ids).astype(str).to_numpy()
    decisions = pd.DataFrame({"episode_id": ids, "step": 0, "day": 0.0, "action": np.asarray(action, dtype=int)})
    if patients is not None:
        decisions["patient_id"] = patients
    episodes = pd.DataFrame(
        {"episode_id": ids, "followup_days": np.asarray(followup, dtype=float), "event": np.asarray(event, dtype=int)}
    )
    return decisions, episodes


def gehan():
    """Gehan's 6-MP leukaemia remission data as shipped in lifelines (``datasets/gehan.dat``).

    Columns: group (1 placebo, 2 6-MP), weeks, relapse (1 relapse, 0 censored).
    """
    path = Path(lifelines.__file__).parent / "datasets" / "gehan.dat"
    return pd.read_csv(path, sep=r"\s+", header=None, names=["group", "weeks", "relapse"])
