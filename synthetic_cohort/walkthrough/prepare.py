"""Turn records written by `regimewise simulate` into the walkthrough's study (README, "Your own records").

    python synthetic_cohort/walkthrough/prepare.py SIMULATED_FOLDER STUDY_FOLDER

reads SIMULATED_FOLDER/decisions.csv and episodes.csv and writes

    STUDY_FOLDER/records/decisions.csv   two columns changed, the rest as simulated:
                                         adherence_band (low, medium, high) in place of the adherence share,
                                         penalty_points (lower is better) in place of the demo's reward
    STUDY_FOLDER/records/episodes.csv    as simulated
    STUDY_FOLDER/protocol.yaml           a copy of the protocol beside this script, for you to read and edit

Everything is invented (the fictional Harbourline clinics); research use only, not medical advice.
"""

from __future__ import annotations

import argparse
import shutil
import sys
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent

# Adherence (share of doses taken, 0-1) as a band: below 0.60 low, 0.60 to below 0.80 medium, 0.80 and above high.
BAND_EDGES = (0.60, 0.80)
BANDS = ("low", "medium", "high")


def adherence_band(share: pd.Series) -> pd.Series:
    """The band of each adherence share (the cut points are invented for the walkthrough)."""
    low, high = BAND_EDGES
    return pd.Series(np.select([share < low, share < high], BANDS[:2], BANDS[2]), index=share.index)


def penalty_points(reward: pd.Series) -> pd.Series:
    """The demo's quarterly score is minus a penalty: distance from 130 mmHg per 10 mmHg, 3 points for a fall,
    2 for high potassium, 3 for acute kidney injury (synthetic_cohort/README.md). Negating it gives the penalty
    itself, in points, where lower is better (+ 0.0 writes a zero score as 0.0, not -0.0)."""
    return -reward + 0.0


def prepare(simulated: Path, study: Path) -> None:
    decisions = pd.read_csv(simulated / "decisions.csv", dtype={"episode_id": str, "patient_id": str})
    episodes = pd.read_csv(simulated / "episodes.csv", dtype={"episode_id": str, "patient_id": str})
    lacking = [c for c in ("adherence", "reward") if c not in decisions.columns]
    if lacking:
        sys.exit(f"error: {simulated / 'decisions.csv'} has no column {lacking[0]!r}; use a folder written by simulate")
    decisions["adherence"] = adherence_band(decisions["adherence"])
    decisions["reward"] = penalty_points(decisions["reward"])
    decisions = decisions.rename(columns={"adherence": "adherence_band", "reward": "penalty_points"})
    (study / "records").mkdir(parents=True, exist_ok=True)
    decisions.to_csv(study / "records" / "decisions.csv", index=False)
    episodes.to_csv(study / "records" / "episodes.csv", index=False)
    shutil.copyfile(HERE / "protocol.yaml", study / "protocol.yaml")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("simulated", type=Path, help="folder written by `regimewise simulate --out`")
    parser.add_argument("study", type=Path, help="folder for the study's records/ and protocol.yaml")
    parser.add_argument("--force", action="store_true", help="overwrite an earlier preparation (default: refuse)")
    args = parser.parse_args(argv)
    for name in ("decisions.csv", "episodes.csv"):
        if not (args.simulated / name).is_file():
            sys.exit(f"error: {args.simulated / name} not found; write it first with `regimewise simulate --out`")
    if (args.study / "protocol.yaml").exists() and not args.force:
        sys.exit(f"error: {args.study / 'protocol.yaml'} exists (perhaps edited); choose a new folder or add --force")
    try:
        prepare(args.simulated, args.study)
    except OSError as err:
        sys.exit(f"error: {err.filename or args.study}: {err.strerror or err}; choose another folder")
    print(f"wrote {args.study / 'records'} and {args.study / 'protocol.yaml'} (invented records; research use only)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
