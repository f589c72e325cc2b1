"""The Q-features written block by block (``QFeatures.transform``) against the whole-table computation they replace:
the scaled states and their powers side by side (``numpy.column_stack``), bit for bit and in the same memory layout,
on numeric states, with a categorical state, and with ``q_model.terms``."""

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_protocol_dict

import regimewise.core.features as features_module
from regimewise.core.features import QFeatures, StateScaler
from regimewise.core.terms import uncentred
from regimewise.protocol import Protocol


def whole_table(features, frame):
    """The covariates as computed before the blocks: every block of columns on the whole table, then stacked."""
    scaler = features.scaler
    states = (scaler.unscaled(frame) - np.asarray(scaler.means)) / np.asarray(scaler.scales)
    powered = states[:, list(features.squared)]
    blocks = [states[:, features._linear()]]
    blocks += [powered**k for k in range(2, features.degree + 1) if features.squared]
    if features.terms is not None:
        blocks.append(features.terms.transform(frame, uncentred(scaler, frame)))
    return np.column_stack(blocks) if len(blocks) > 1 else blocks[0]


def protocol(kind):
    raw = tiny_protocol_dict()
    raw["states"].append({"name": "z", "label": "Another", "kind": "continuous", "plausible_range": [0, 100]})
    raw["q_model"] = {"basis": "cubic"}
    if kind == "categorical":
        raw["states"].append({"name": "g", "label": "Group", "kind": "categorical", "levels": ["a", "b", "c"]})
    if kind == "terms":
        raw["q_model"] = {"basis": "quadratic", "terms": [{"interaction": ["bp", "z"]}, {"spline": "z", "df": 4}]}
    if kind == "linear":
        raw["q_model"] = {"basis": "linear"}
    return Protocol.model_validate(raw)


def frame(n, seed=0):
    rng = np.random.default_rng(seed)
    return pd.DataFrame(
        {
            "bp": rng.normal(140, 15, n).round(1),
            "flag": rng.integers(0, 2, n),
            "z": rng.gamma(2.0, 3.0, n),
            "g": rng.choice(["a", "b", "c"], n),
        }
    )


@pytest.mark.parametrize("kind", ["numeric", "categorical", "terms", "linear"])
@pytest.mark.parametrize("block_rows", [7, 64, 100_000])
def test_blocks_give_the_whole_table_covariates_bit_for_bit(monkeypatch, kind, block_rows):
    monkeypatch.setattr(features_module, "FEATURE_BLOCK_ROWS", block_rows)
    p, data = protocol(kind), frame(503)
    features = QFeatures.from_protocol(StateScaler.fit(data, p), p, data)
    new, old = features.transform(data), whole_table(features, data)
    assert new.shape == old.shape == (503, len(features.names))
    assert new.tobytes(order="A") == old.tobytes(order="A")  # the same bits in the same memory layout
    assert (new.flags.c_contiguous, new.flags.f_contiguous) == (old.flags.c_contiguous, old.flags.f_contiguous)
    rows = data.iloc[100:401]  # a part of a table, as a fold's decisions
    assert np.array_equal(features.transform(rows), whole_table(features, rows))


def test_no_rows_give_an_empty_matrix():
    p, data = protocol("numeric"), frame(50)
    features = QFeatures.from_protocol(StateScaler.fit(data, p), p, data)
    assert features.transform(data.iloc[:0]).shape == (0, len(features.names))


def test_scaled_states_equal_the_centred_and_scaled_columns():
    p, data = protocol("categorical"), frame(300)
    scaler = StateScaler.fit(data, p)
    expected = (scaler.unscaled(data) - np.asarray(scaler.means)) / np.asarray(scaler.scales)
    assert scaler.transform(data).tobytes() == expected.tobytes()
    before = data.copy()
    scaler.transform(data)
    pd.testing.assert_frame_equal(data, before)  # the frame's own values are never written
