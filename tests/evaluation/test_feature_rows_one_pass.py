"""The evaluation's Q-features read by rows without a store of cubes (``keep_powers=False``, as the side-by-side
evaluation reads them when one pass takes every regime) against the rows read with the store, and against the
whole table's features, bit for bit and in the same memory layout; and the side-by-side entries computed so against
those computed with the store.

These are equivalence checks with no outside reference: the reading with kept cubes is the reference."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_protocol_dict

import regimewise.evaluation.values as values_module
from regimewise.core.features import QFeatures, StateScaler
from regimewise.evaluation.values import FeatureRows, LoggedDecisions, evaluate_side_by_side, regimes_per_pass
from regimewise.protocol import Protocol


def study(n_episodes=150, horizon=3, seed=0):
    raw = tiny_protocol_dict()
    raw["horizon"] = horizon
    raw["states"].append({"name": "z", "label": "Another", "kind": "continuous", "plausible_range": [-100, 100]})
    raw["q_model"] = {"basis": "cubic"}
    p = Protocol.model_validate(raw)
    rng = np.random.default_rng(seed)
    n = n_episodes * horizon
    frame = pd.DataFrame(
        {
            "episode_id": np.repeat([f"E{e:04d}" for e in range(n_episodes)], horizon),
            "patient_id": np.repeat([f"P{e // 2:04d}" for e in range(n_episodes)], horizon),
            "step": np.tile(np.arange(horizon), n_episodes),
            "bp": rng.normal(140, 15, n).round(1),
            "flag": rng.integers(0, 2, n).astype(float),
            "z": rng.normal(0, 30, n),
            "action": rng.choice(p.action_labels, n),
            "reward": rng.normal(size=n),
        }
    )
    return p, frame


def same(new, old):
    return (
        new.shape == old.shape
        and new.tobytes(order="A") == old.tobytes(order="A")
        and (new.flags.c_contiguous, new.flags.f_contiguous) == (old.flags.c_contiguous, old.flags.f_contiguous)
    )


def test_rows_read_without_kept_cubes_are_those_read_with_them():
    p, frame = study()
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    kept, plain = FeatureRows(features, frame, p), FeatureRows(features, frame, p, keep_powers=False)
    assert kept.kept is not None and plain.kept is None
    whole = features.transform(frame)
    step = frame["step"].to_numpy()
    for rows in [np.flatnonzero(step == 2), np.flatnonzero(step == 0), np.arange(len(frame))[::-3], slice(5, 50)]:
        for _ in range(2):  # the second reading of ``kept`` comes from its store
            assert same(plain[rows], kept[rows])
            assert np.array_equal(plain[rows], whole[rows])


@pytest.mark.parametrize("per_pass", [2, 8])
def test_side_by_side_entries_without_kept_cubes_are_those_with_them(per_pass, monkeypatch):
    p, frame = study()
    n, k = len(frame), len(p.actions)
    rng = np.random.default_rng(1)
    proba = rng.dirichlet(np.full(k, 3.0), size=n)
    variants = {name: rng.integers(0, k, n) for name in ["one", "two", "three"]}
    monkeypatch.setattr(values_module, "MIN_REGIMES_PER_PASS", per_pass)
    monkeypatch.setattr(values_module, "PASS_BYTES", 0)
    assert regimes_per_pass(n) == per_pass
    made = []
    real = LoggedDecisions.from_frame.__func__

    def recorded(cls, *args, **kwargs):
        made.append(kwargs.get("keep_powers", True))
        return real(cls, *args, **kwargs)

    monkeypatch.setattr(LoggedDecisions, "from_frame", classmethod(recorded))
    new = evaluate_side_by_side(frame, proba, variants, p)
    assert made == [per_pass < len(variants)]  # kept only for a later pass
    logged = real(LoggedDecisions, frame, proba, p, feature_rows=True)  # with the store, as before
    old = values_module._side_by_side(logged, variants, p)
    assert repr(new) == repr(old)
