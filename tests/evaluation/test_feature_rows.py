"""The evaluation's Q-features read by rows (``FeatureRows``: states taken out of the frame once, cubes kept) against
the features of the whole table and against the frame-per-block reading they replace, bit for bit and in the same
memory layout: numeric, categorical and missing-indicator states, linear to cubic bases, the rows of one step, of a
fold, a single row, no row, masks and slices, a one-step study, and a store of cubes smaller than the table."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_protocol_dict

import regimewise.evaluation.values as values_module
from regimewise.core.arrays import exact_power
from regimewise.core.features import KeptPowers, QFeatures, StateArrays, StateScaler
from regimewise.evaluation.outcome_models import outcome_models
from regimewise.evaluation.values import FeatureRows, LoggedDecisions, regime_targets
from regimewise.protocol import Protocol

KINDS = ["cubic", "quadratic", "linear", "categorical", "indicator", "integer"]


def protocol(kind: str, horizon: int = 3) -> Protocol:
    raw = tiny_protocol_dict()
    raw["horizon"] = horizon
    raw["states"].append({"name": "z", "label": "Another", "kind": "continuous", "plausible_range": [-100, 100]})
    raw["q_model"] = {"basis": {"linear": "linear", "quadratic": "quadratic"}.get(kind, "cubic")}
    if kind == "categorical":
        raw["states"].append({"name": "g", "label": "Group", "kind": "categorical", "levels": ["a", "b", "c"]})
    if kind == "indicator":
        raw["data"]["missing"] = {"bp": "indicator", "z": "indicator"}
    if kind == "integer":
        raw["states"].append({"name": "level", "label": "Level", "kind": "integer", "plausible_range": [0, 4]})
    return Protocol.model_validate(raw)


def decisions(n_episodes: int, horizon: int = 3, seed: int = 0) -> pd.DataFrame:
    """Rows sorted by episode then step; ``z`` centred near 0, so its scaled cubes are of both signs."""
    rng = np.random.default_rng(seed)
    n = n_episodes * horizon
    return pd.DataFrame(
        {
            "episode_id": np.repeat([f"E{e:04d}" for e in range(n_episodes)], horizon),
            "patient_id": np.repeat([f"P{e // 2:04d}" for e in range(n_episodes)], horizon),
            "step": np.tile(np.arange(horizon), n_episodes),
            "bp": rng.normal(140, 15, n).round(1),
            "flag": rng.integers(0, 2, n),
            "z": rng.normal(0, 30, n),
            "g": rng.choice(["a", "b", "c"], n),
            "level": rng.integers(0, 5, n),  # an integer column, turned into floats per block
            "bp_missing": (rng.random(n) < 0.2).astype(float),
            "z_missing": rng.random(n) < 0.3,  # a boolean indicator column
            "action": rng.choice(["hold", "up", "down"], n),
            "reward": rng.normal(size=n),
        }
    )


def frame_per_block(features: QFeatures, frame: pd.DataFrame, protocol: Protocol, rows) -> np.ndarray:
    """The reading replaced: a frame of the states' and indicators' columns built for the rows, then transformed."""
    columns = [s.name for s in protocol.states] + list(features.scaler.indicators)
    return features.transform(pd.DataFrame({c: frame[c].iloc[rows] for c in columns if c in frame.columns}))


def same(new: np.ndarray, old: np.ndarray) -> bool:
    """The same shape, bits and memory layout."""
    return (
        new.shape == old.shape
        and new.tobytes(order="A") == old.tobytes(order="A")
        and (new.flags.c_contiguous, new.flags.f_contiguous) == (old.flags.c_contiguous, old.flags.f_contiguous)
    )


def row_sets(frame: pd.DataFrame) -> dict:
    step = frame["step"].to_numpy()
    fold = np.random.default_rng(1).integers(0, 3, len(frame)) == 1
    return {
        "a step": np.flatnonzero(step == step.max()),
        "a step of a fold": np.flatnonzero(fold & (step == 0)),
        "a fold": np.flatnonzero(fold),
        "one row": np.array([len(frame) - 1]),
        "no row": np.array([], dtype=np.int64),
        "unordered": np.random.default_rng(2).permutation(len(frame))[:97],
        "a mask": fold,
        "a slice": slice(10, 70),
    }


@pytest.mark.parametrize("kind", KINDS)
def test_feature_rows_give_the_whole_tables_rows_and_the_frame_per_block_reading(kind):
    p, frame = protocol(kind), decisions(120)
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    if kind == "indicator":
        assert features.scaler.indicators == ("bp_missing", "z_missing")
    x = FeatureRows(features, frame, p)
    assert x.states is not None
    whole = features.transform(frame)
    for name, rows in row_sets(frame).items():
        for _ in range(2):  # the second reading comes from the kept cubes
            new = x[rows]
            assert same(new, frame_per_block(features, frame, p, rows)), name
            assert np.array_equal(new, whole[rows]), name
    assert same(np.asarray(x), whole)


def test_a_one_step_study_reads_the_same_features():
    p, frame = protocol("cubic", horizon=1), decisions(50, horizon=1)
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    x = FeatureRows(features, frame, p)
    rows = np.flatnonzero(frame["step"].to_numpy() == 0)
    assert same(x[rows], frame_per_block(features, frame, p, rows))


@pytest.mark.parametrize("kind", ["cubic", "categorical", "indicator", "integer"])
def test_state_arrays_give_the_scalers_unscaled_columns(kind):
    p, frame = protocol(kind), decisions(40)
    scaler = StateScaler.fit(frame, p)
    states = StateArrays(scaler, frame)
    for name, rows in row_sets(frame).items():
        assert same(states.unscaled(rows), scaler.unscaled(frame.iloc[rows])), name


def test_a_categorical_level_outside_the_protocol_is_refused_once_for_the_whole_table():
    p, frame = protocol("categorical"), decisions(20)
    scaler = StateScaler.fit(frame, p)
    frame.loc[5, "g"] = "unknown"
    with pytest.raises(Exception, match="outside its levels"):
        StateArrays(scaler, frame)


@pytest.mark.parametrize("budget_rows", [0, 1, 50, 359, 10_000])
def test_kept_cubes_smaller_than_the_table_give_the_computed_ones(budget_rows):
    # rows past the store's capacity are computed every time; a block that mixes kept, new and past rows reads each
    # from where it is, in the order asked for
    p, frame = protocol("cubic"), decisions(120)
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    states = StateArrays(features.scaler, frame)
    width = len(features.squared)
    kept = KeptPowers(len(frame), width, 1, budget_rows * 8 * width)
    assert kept.capacity == min(budget_rows, len(frame))
    rng = np.random.default_rng(3)
    whole = features.transform(frame)
    for size in (30, 200, 360, 360, 5):
        rows = rng.permutation(len(frame))[:size]
        new = features.transform_arrays(states, rows, kept)
        assert same(new, features.transform(frame.iloc[rows]))
        assert np.array_equal(new, whole[rows])
    assert kept.kept.sum() == kept.capacity  # every row the store holds was seen by the last full reading


def test_quartic_powers_are_kept_too():
    p, frame = protocol("cubic"), decisions(30)
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    features = QFeatures(features.scaler, features.squared, 4)  # a degree the protocol's bases do not name
    states = StateArrays(features.scaler, frame)
    kept = features.kept_powers(len(frame), 2**20)
    rows = np.arange(len(frame))[::-1]
    for _ in range(2):
        assert same(features.transform_arrays(states, rows, kept), features.transform(frame.iloc[rows]))


@pytest.mark.parametrize("seed", range(5))
def test_a_cube_does_not_depend_on_the_other_elements_of_its_array(seed):
    # what keeping the cubes rests on: the cube of an element (exact_power) gives the same bits whatever its
    # neighbours, its position, the array's layout and the blocks it is computed in
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 2, (4099, 3))
    shuffled = rng.permutation(len(x))

    def cube(values):
        return exact_power(values, 3)

    assert np.array_equal(cube(x), np.asarray([cube(np.asarray(row)) for row in x]))  # three elements at a time
    assert np.array_equal(cube(x[shuffled])[np.argsort(shuffled)], cube(x))
    assert np.array_equal(cube(np.asfortranarray(x)), cube(x))
    assert np.array_equal(cube(x[1:]), cube(x)[1:])
    positive = np.abs(x)
    mixed = positive.copy()
    mixed[::7] *= -1  # a negative element among positive ones
    keep = np.ones(len(x), dtype=bool)
    keep[::7] = False
    assert np.array_equal(cube(mixed)[keep], cube(positive)[keep])


def test_features_with_terms_are_read_from_the_frame_with_their_indicators():
    p = protocol("indicator").model_dump(mode="json", by_alias=True)
    p["q_model"] = {"basis": "quadratic", "terms": [{"interaction": ["bp", "z"]}]}
    p = Protocol.model_validate(p)
    frame = decisions(40)
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    x = FeatureRows(features, frame, p)
    assert x.states is None
    rows = np.flatnonzero(frame["step"].to_numpy() == 1)
    assert np.array_equal(x[rows], features.transform(frame)[rows])
    assert np.ptp(x[rows][:, features.names.index("bp_missing")]) == 1.0  # the indicator is read, not taken as 0


@pytest.mark.parametrize("kind", ["cubic", "indicator", "categorical"])
def test_outcome_models_on_feature_rows_equal_those_on_the_whole_matrix(kind, monkeypatch):
    # the outcome models of every regime, on all records and within folds, from features read by rows (kept cubes
    # from the second pass on) and from the whole matrix held as an array
    p, frame = protocol(kind), decisions(300)
    n = len(frame)
    proba = np.full((n, 3), 1 / 3)
    recommended = np.random.default_rng(5).integers(0, 3, n)
    folds = np.repeat(np.random.default_rng(6).integers(0, 2, 300), 3)
    by_rows = LoggedDecisions.from_frame(frame, proba, p, feature_rows=True)
    held = LoggedDecisions.from_frame(frame, proba, p)
    assert isinstance(by_rows.X, FeatureRows) and isinstance(held.X, np.ndarray)
    targets = list(regime_targets(frame, proba, recommended, p, by_rows=True))
    for _ in range(2):
        new = outcome_models(by_rows, targets, p, folds)
        old = outcome_models(held, targets, p, folds)
        for a, b in zip(new, old):
            assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1]) and a[2] == b[2]
    assert by_rows.X.kept.kept.all()
    assert values_module.KEPT_POWER_BYTES >= 8 * 12_000_000 * 6 // 2  # at least half of 1M x 12 cubic decisions
