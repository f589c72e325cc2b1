"""The Q-features written block by block (``QFeatures.transform``) against the whole-table computation they replace:
the scaled states and their powers side by side (``numpy.column_stack``), bit for bit and in the same memory layout,
on numeric states, with a categorical state, and with ``q_model.terms``."""

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_protocol_dict

import regimewise.core.features as features_module
from regimewise.core.arrays import exact_power
from regimewise.core.features import QFeatures, StateScaler
from regimewise.core.terms import uncentred
from regimewise.protocol import Protocol


def whole_table(features, frame):
    """The covariates as computed before the blocks: every block of columns on the whole table, then stacked."""
    scaler = features.scaler
    states = (scaler.unscaled(frame) - np.asarray(scaler.means)) / np.asarray(scaler.scales)
    powered = states[:, list(features.squared)]
    blocks = [states[:, features._linear()]]
    blocks += [exact_power(powered, k) for k in range(2, features.degree + 1) if features.squared]
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


def whole_table_behaviour_design(design, frame):
    """The usual-care design as computed before the blocks: every block of columns on the whole table, stacked."""
    import patsy

    keep = [j for j, name in enumerate(design.scaler.names) if name not in design._replaced()]
    bases = [
        patsy.build_design_matrices([info], {"x": frame[name].to_numpy(dtype=float)})[0]
        for name, info in design.splines
    ]
    terms = [] if design.terms is None else [design.terms.transform(frame, uncentred(design.scaler, frame))]
    step = [frame[["step"]].to_numpy(dtype=float) / max(design.horizon - 1, 1)] if design.include_step else []
    blocks = [design.scaler.transform(frame)[:, keep], *map(np.asarray, bases), *terms, *step]
    return np.column_stack(blocks)


@pytest.mark.parametrize("kind", ["splines", "categorical", "terms", "plain"])
@pytest.mark.parametrize("block_rows", [5, 100_000])
def test_usual_care_design_by_blocks_equals_the_whole_table_design(monkeypatch, kind, block_rows):
    from regimewise.usual_care.design import BehaviourDesign

    monkeypatch.setattr(features_module, "FEATURE_BLOCK_ROWS", block_rows)
    raw = protocol(kind if kind in ("categorical", "terms") else "numeric").model_dump(mode="json", by_alias=True)
    spec = {"kind": "multinomial_logit", "include_step": kind != "plain"}
    if kind == "splines":
        spec.update(spline_states=["z"], spline_df=4)
    if kind == "terms":
        spec["terms"] = [{"interaction": ["bp", "flag"]}, {"spline": "bp", "df": 3}]
    raw["behaviour_model"] = {**raw.get("behaviour_model", {}), **spec}
    p = Protocol.model_validate(raw)
    data = frame(211).assign(step=np.arange(211) % 3)
    design = BehaviourDesign.fit(data, p)
    new, old = design.transform(data), whole_table_behaviour_design(design, data)
    assert new.shape == old.shape == (211, len(design.names))
    assert new.tobytes(order="A") == old.tobytes(order="A")
    assert (new.flags.c_contiguous, new.flags.f_contiguous) == (old.flags.c_contiguous, old.flags.f_contiguous)


@pytest.mark.parametrize("seed", range(20))
def test_stacked_order_is_the_layout_of_numpy_column_stack(seed):
    rng = np.random.default_rng(seed)
    parts = []
    for _ in range(rng.integers(1, 5)):
        width = int(rng.integers(1, 4))
        parts.append(np.empty((6, width), order=rng.choice(["C", "F"])))
    stacked = np.column_stack(parts)
    expected = "F" if stacked.flags.f_contiguous and not stacked.flags.c_contiguous else "C"
    assert features_module._stacked_order(parts) == expected
