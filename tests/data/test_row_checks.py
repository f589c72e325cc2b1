"""The row-spanning checks read a table already in episode and step order without copying it into that order,
and the episodes table's patients and last days without a join when it lists the decisions' episodes in order:
the findings must be those of the former computations, bit for bit.

Equivalence checks with no outside reference: the expected findings come from the former computations, written
out plainly below (as tuples of rule, row, column, value and message), on small invented tables.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from regimewise.data.findings import clip_text
from regimewise.data.records import (
    _episode_consistency,
    _episode_ends,
    _sequence_findings,
    episode_ends_of,
    episode_runs,
)
from regimewise.data.validate import steps_present


class Columns:
    episode_id, patient_id, step, day = "episode_id", "patient_id", "step", "day"
    followup, event = "followup_days", "event"


class Protocol:
    class protocol:
        class data:
            columns = Columns


def former_sequence(frame: pd.DataFrame) -> list[tuple]:
    """The former _sequence_findings: every column gathered through ``order``, even when it is the identity."""
    ep, step = frame["episode_id"].astype(str), frame["step"].astype(np.int64)
    e, s = ep.to_numpy(), step.to_numpy()
    in_order = e.size < 2 or bool(np.all((e[1:] > e[:-1]) | ((e[1:] == e[:-1]) & (s[1:] > s[:-1]))))
    order = np.arange(len(frame)) if in_order else np.lexsort((s, e))
    ep_s, step_s, day_s = e[order], s[order], frame["day"].to_numpy(dtype=float)[order]
    rows = frame.index.to_numpy() + 1
    same = np.r_[False, ep_s[1:] == ep_s[:-1]]
    twice = same & np.r_[False, step_s[1:] == step_s[:-1]]
    out = [
        (
            "duplicate_decision",
            int(rows[order[i]]),
            "step",
            str(step_s[i]),
            f"episode {ep_s[i]!r} has step {step_s[i]} twice",
        )
        for i in np.flatnonzero(twice)
    ]
    expected = np.where(same, np.r_[0, step_s[:-1]] + 1, 0)
    for i in np.flatnonzero((step_s != expected) & ~twice):
        out.append(
            (
                "step_sequence",
                int(rows[order[i]]),
                "step",
                str(step_s[i]),
                f"episode {ep_s[i]!r}: expected step {expected[i]}",
            )
        )
    for i in np.flatnonzero(same & np.r_[False, day_s[1:] < day_s[:-1]]):
        message = f"episode {ep_s[i]!r}: day goes backwards at step {step_s[i]}"
        out.append(("day_order", int(rows[order[i]]), "day", clip_text(day_s[i]), message))
    patient_s = frame["patient_id"].astype(str).to_numpy()[order]
    for episode in np.unique(ep_s[same & np.r_[False, patient_s[1:] != patient_s[:-1]]]):
        row = int(rows[np.flatnonzero(e == str(episode))[0]])
        out.append(
            ("patient_per_episode", row, "patient_id", None, f"episode {str(episode)!r} has more than one patient id")
        )
    return out


def _decisions(seed: int, shuffle: bool) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    episodes = np.repeat([f"E{i:03d}" for i in range(30)], 4)
    frame = pd.DataFrame(
        {
            "episode_id": episodes,
            "patient_id": np.char.replace(episodes.astype(str), "E", "P"),
            "step": np.tile(np.arange(4), 30),
            "day": np.tile(np.arange(4) * 90, 30) + rng.integers(0, 3, 120),
        }
    )
    frame.loc[rng.choice(120, 4, replace=False), "step"] = rng.integers(0, 4, 4)  # duplicates and gaps
    frame.loc[rng.choice(120, 4, replace=False), "day"] = 0  # days going backwards
    frame.loc[rng.choice(120, 2, replace=False), "patient_id"] = "P999"  # a second patient
    frame = frame.drop(index=rng.choice(120, 5, replace=False))
    return frame.sample(frac=1, random_state=seed) if shuffle else frame


def _tuples(findings) -> list[tuple]:
    return [(f.rule, f.row, f.column, f.value, f.message) for f in findings]


@pytest.mark.parametrize("shuffle", [False, True])
@pytest.mark.parametrize("seed", range(6))
def test_sequence_findings_are_the_former_ones(seed, shuffle):
    frame = _decisions(seed, shuffle)
    found = _tuples(_sequence_findings("d.csv", frame, Protocol))
    assert found == former_sequence(frame)
    assert found  # each table breaks some rule


def test_sequence_findings_of_a_clean_table_in_order_are_none():
    frame = pd.DataFrame({"episode_id": ["a", "a", "b"], "patient_id": "p", "step": [0, 1, 0], "day": [0, 5, 0]})
    assert _sequence_findings("d.csv", frame, Protocol) == former_sequence(frame) == []


def former_ends_of(frame: pd.DataFrame, last: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """The former join of the episodes table with each episode's patient and last decision day."""
    joined = frame.assign(_id=frame["episode_id"].astype(str)).join(last, on="_id")
    return joined["_patient"].to_numpy(), joined["last_day"].to_numpy(dtype=float)


def _episodes(order: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    decisions = pd.DataFrame(
        {"episode_id": ["a", "a", "b", "c", "c"], "patient_id": ["p", "p", "q", "r", "r"], "step": [0, 1, 0, 0, 1]}
    ).assign(day=[0, 7, 3, 1, 9])
    frame = pd.DataFrame(
        {"episode_id": ["a", "b", "c"], "patient_id": ["p", "x", "r"], "followup_days": [3, 9, 2], "event": [0, 0, 1]}
    )
    if order == "shuffled":
        frame = frame.iloc[[2, 0, 1]]
    elif order == "missing":
        frame = frame.iloc[[0, 2]]
    return frame, _episode_ends(decisions)


@pytest.mark.parametrize("order", ["same", "shuffled", "missing"])
def test_episode_ends_are_the_former_join(order):
    frame, last = _episodes(order)
    patient, last_day = episode_ends_of(frame, Columns, last)
    old_patient, old_day = former_ends_of(frame, last)
    assert np.array_equal(patient, old_patient) and np.array_equal(last_day, old_day)
    found = _tuples(_episode_consistency("e.csv", frame, Columns, last))
    assert (
        sorted((rule, row) for rule, row, *_ in found)
        == {
            "same": [("followup_before_last_decision", 1), ("patient_mismatch", 2)],
            "shuffled": [("followup_before_last_decision", 1), ("patient_mismatch", 2)],  # rows keep their numbers
            "missing": [("followup_before_last_decision", 1)],
        }[order]
    )


def test_a_table_with_the_joins_column_names_still_goes_through_the_join():
    frame, last = _episodes("same")
    with pytest.raises(ValueError, match="overlap"):
        episode_ends_of(frame.assign(last_day=0), Columns, last)


# ---------------------------------------------------------------------------------------------- validation.json
@pytest.mark.parametrize("seed", range(4))
def test_counts_by_step_and_patients_are_the_former_ones(seed):
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, 6, 40)
    episodes = np.repeat([f"E{i:03d}" for i in range(40)], lengths)
    patients = np.repeat([f"P{i:03d}" for i in rng.integers(0, 25, 40)], lengths)  # some patients, several episodes
    decisions = pd.DataFrame(
        {"episode_id": episodes, "patient_id": patients, "step": np.concatenate([np.arange(n) for n in lengths])}
    )
    starts, _ = episode_runs(decisions)
    former = {str(k): int(v) for k, v in decisions.groupby("step").size().items()}
    assert steps_present(decisions["step"].to_numpy()) == former
    assert decisions["patient_id"].iloc[starts].nunique() == decisions["patient_id"].nunique()
    assert steps_present(np.array([3, 3, 1])) == {"1": 1, "3": 2}  # absent steps are left out, as groupby does
