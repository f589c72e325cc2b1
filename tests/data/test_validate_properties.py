"""Property-based tests (hypothesis): random corruptions of a valid cohort never crash with a traceback and never
pass silently; random damage to the file's bytes never crashes.

"Never crash" means: only regimewise's UserInputError (one line for the user) may escape, never another
exception. The examples are limited so the file stays fast.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from support.tiny import tiny_decisions, tiny_episodes, write_tiny

from regimewise.data.validate import validate_records
from regimewise.errors import UserInputError
from regimewise.protocol import load_protocol

N_EPISODES = 8
ROWS = 3 * N_EPISODES
FAST = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

not_a_bp = st.one_of(
    st.floats(max_value=69.99, allow_infinity=True),
    st.just(float("nan")),
    st.floats(min_value=250.01, allow_infinity=True),
    st.text(alphabet="abcxyz@.-/ ", min_size=1, max_size=12),
    st.none(),
)
not_a_label = st.text(min_size=0, max_size=10).filter(lambda s: s.strip() not in {"hold", "up", "down"})
not_a_flag = st.one_of(st.integers().filter(lambda v: v not in (0, 1)), st.floats(0.01, 0.99), st.just("yes"))
not_a_day = st.one_of(st.integers(max_value=-1), st.floats(0.1, 0.9).map(lambda v: 10 + v), st.just("monday"))


def _change_step(frame, row, delta):
    frame.loc[row, "step"] = int(frame.loc[row, "step"]) + delta  # any change breaks 0, 1, 2 in this episode


def _corruptions():
    row = st.integers(0, ROWS - 1)
    return st.one_of(
        st.tuples(st.just("bp"), row, not_a_bp),
        st.tuples(st.just("action"), row, not_a_label),
        st.tuples(st.just("flag"), row, not_a_flag),
        st.tuples(st.just("day"), row, not_a_day),
        st.tuples(st.just("step"), row, st.integers(-3, 3).filter(bool)),
        # day and patient_id are optional (the step and the episode stand in): dropping them is no corruption
        st.tuples(st.just("drop_column"), st.sampled_from(["episode_id", "step", "bp", "action", "reward"]), st.none()),
        st.tuples(st.just("duplicate_row"), row, st.none()),
        st.tuples(st.just("episode_row"), st.integers(0, N_EPISODES - 1), st.sampled_from(["drop", "event", "pid"])),
    )


def _apply(kind, where, value):
    decisions = tiny_decisions(n_episodes=N_EPISODES).astype(object)
    episodes = tiny_episodes(tiny_decisions(n_episodes=N_EPISODES)).astype(object)
    if kind == "step":
        _change_step(decisions, where, value)
    elif kind == "drop_column":
        decisions = decisions.drop(columns=[where])
    elif kind == "duplicate_row":
        decisions = decisions.iloc[list(range(ROWS)) + [where]]
    elif kind == "episode_row":
        if value == "drop":
            episodes = episodes.drop(index=where)
        elif value == "event":
            episodes.loc[where, "event"] = 3
        else:
            episodes.loc[where, "patient_id"] = "P-other"
    else:
        decisions.loc[where, kind] = np.nan if value is None else value
    return decisions, episodes


@FAST
@given(corruption=_corruptions())
def test_corruption_is_refused_with_a_user_error(tmp_path_factory, corruption):
    decisions, episodes = _apply(*corruption)
    path = write_tiny(tmp_path_factory.mktemp("c"), decisions=decisions, episodes=episodes)
    with pytest.raises(UserInputError) as info:  # any other exception fails the test (a crash)
        validate_records(load_protocol(path))
    assert "\n" not in str(info.value)


@FAST
@given(position=st.floats(0, 1), junk=st.binary(min_size=1, max_size=6))
@example(position=0.0, junk=b"\xc2\x80\n")  # once crashed: a one-field header line, so pandas built a MultiIndex
def test_damaged_bytes_never_crash(tmp_path_factory, position, junk):
    folder = tmp_path_factory.mktemp("b")
    path = write_tiny(folder, decisions=tiny_decisions(n_episodes=N_EPISODES))
    data = (folder / "decisions.csv").read_bytes()
    cut = math.floor(position * len(data))
    (folder / "decisions.csv").write_bytes(data[:cut] + junk + data[cut:])
    try:
        validate_records(load_protocol(path))
    except UserInputError as err:
        assert "\n" not in str(err)


def test_the_uncorrupted_cohort_passes(tmp_path):
    decisions = tiny_decisions(n_episodes=N_EPISODES)
    validate_records(load_protocol(write_tiny(tmp_path, decisions=decisions, episodes=tiny_episodes(decisions))))
