"""Writing a demo cohort to disk: decisions.csv, episodes.csv and truth.json, byte for byte the same for the same
seed (``regimewise simulate``).
"""

from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path

import numpy as np

from regimewise.demo.scenario import ACTIONS, DECIMALS, ScenarioParams
from regimewise.demo.simulate import check_arguments, simulate_cohort
from regimewise.demo.truth import always, induced_gamma, true_outcomes
from regimewise.io import write_text


def _format_table(frame):
    """CSV text with fixed float formatting and '\\n' line endings."""
    out = frame.copy()
    for name, decimals in {**DECIMALS, "reward": 3}.items():
        if name in out:
            out[name] = np.char.mod(f"%.{decimals}f", out[name].to_numpy(dtype=float))
    return out.to_csv(index=False, lineterminator="\n")


# Survival truths of the demo: every half-year of its two-year horizon (days from the index date).
SURVIVAL_TIMES = (182.0, 365.0, 547.0, 730.0)
SURVIVAL_HORIZON = 730.0


def _truth(seed, strength, n_truth, gamma, p):
    """True values (6 decimals) and survival of usual care and of each always-<action> regime, with their SEs."""
    regimes = {"usual_care": "usual_care", **{f"always_{a}": always(a) for a in ACTIONS}}
    values, survival = {}, {}
    for name, regime in regimes.items():
        v, s = true_outcomes(regime, SURVIVAL_TIMES, SURVIVAL_HORIZON, n_truth, seed, strength, gamma, p)
        values[name] = {"value": round(v.value, 6), "se": round(v.se, 6)}
        survival[name] = s.to_dict()
    return values, survival


def write_cohort(out_dir, n_episodes=3000, seed=20261201, confounding_strength=1.0, n_truth=100_000):
    """Write decisions.csv, episodes.csv and truth.json to ``out_dir``, byte-reproducibly.

    The true values in truth.json are computed at ``n_truth`` episodes with seed ``seed + 1`` (independent
    of the cohort's draws) and gamma = 1, using the default :class:`ScenarioParams`, which truth.json also
    lists. Fixed column order, fixed decimals, '\\n' line endings and sorted JSON keys make the files
    byte-identical for the same arguments.

    Returns
    -------
    dict mapping file name to its path.
    """
    check_arguments(n_episodes, confounding_strength)
    p = ScenarioParams()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    cohort = simulate_cohort(n_episodes, seed, confounding_strength, p)
    check_arguments(n_truth, confounding_strength)
    truth_seed, gamma = seed + 1, 1.0
    values, survival = _truth(truth_seed, confounding_strength, n_truth, gamma, p)
    truth = {
        "scenario": "Harbourline demo (invented data, for the demo only; research use only, not medical advice)",
        "seed": int(seed),
        "n_episodes": int(n_episodes),
        "n_decisions": int(len(cohort.decisions)),
        "confounding_strength": round(float(confounding_strength), 6),
        "actions": list(ACTIONS),
        "truth_seed": int(truth_seed),
        "truth_n": int(n_truth),
        "gamma": gamma,
        "true_values": values,
        "true_survival": survival,
        "induced_gamma": {k: round(v, 6) for k, v in asdict(induced_gamma(cohort)).items()},
        "params": asdict(p),
    }
    paths = {name: out / name for name in ("decisions.csv", "episodes.csv", "truth.json")}
    write_text(paths["decisions.csv"], _format_table(cohort.decisions))
    write_text(paths["episodes.csv"], _format_table(cohort.episodes))
    write_text(paths["truth.json"], json.dumps(truth, sort_keys=True, indent=2) + "\n")
    return paths
