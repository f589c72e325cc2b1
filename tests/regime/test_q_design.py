"""The Q-features of a step's rows gathered from the states taken out of the frame once (``q_design_of_rows``, as
``score_by_step`` builds them) against ``QFeatures.transform`` of the frame's rows, which they replace: bit for bit
and in the same memory layout, with numeric and categorical states and with ``q_model.terms``. And the count of
the patients that ``crossfit_folds`` checks, read from the first rows (``has_distinct``), against the count of all."""

import numpy as np
import pandas as pd
import pytest
from support.tiny import tiny_protocol_dict

import regimewise.core.features as features_module
from regimewise.core.arrays import has_distinct
from regimewise.core.features import QFeatures, StateScaler
from regimewise.protocol import Protocol
from regimewise.regime.learning import q_design_of_rows

ANOTHER = {"name": "z", "label": "Another", "kind": "continuous", "plausible_range": [0, 100]}
GROUP = {"name": "g", "label": "Group", "kind": "categorical", "levels": ["a", "b", "c"]}
TERMS = [{"interaction": ["bp", "z"]}, {"spline": "z", "df": 4}]
# per kind: the states added to the tiny protocol's, and its Q-model
KINDS = {
    "numeric": ([ANOTHER], {"basis": "cubic"}),
    "categorical": ([ANOTHER, GROUP], {"basis": "cubic"}),
    "terms": ([ANOTHER], {"basis": "quadratic", "terms": TERMS}),
}


def protocol(kind):
    states, q_model = KINDS[kind]
    raw = tiny_protocol_dict()
    raw["states"] += states
    raw["q_model"] = q_model
    return Protocol.model_validate(raw)


def decisions(n, seed=0):
    rng = np.random.default_rng(seed)
    return pd.DataFrame(
        {
            "episode_id": [f"e{i // 4}" for i in range(n)],
            "step": np.arange(n) % 4,
            "bp": rng.normal(140, 15, n).round(1),
            "flag": rng.integers(0, 2, n),
            "z": rng.gamma(2.0, 3.0, n),
            "g": rng.choice(["a", "b", "c"], n),
        }
    )


def same(new, old):
    assert new.shape == old.shape
    assert new.tobytes(order="A") == old.tobytes(order="A")
    assert (new.flags.c_contiguous, new.flags.f_contiguous) == (old.flags.c_contiguous, old.flags.f_contiguous)


@pytest.mark.parametrize("kind", ["numeric", "categorical", "terms"])
@pytest.mark.parametrize("block_rows", [7, 100_000])
def test_q_design_of_rows_gives_the_rows_features_bit_for_bit(monkeypatch, kind, block_rows):
    monkeypatch.setattr(features_module, "FEATURE_BLOCK_ROWS", block_rows)
    p, data = protocol(kind), decisions(403)
    train = data.iloc[50:].reset_index(drop=True)  # a fold's rows, numbered again
    features = QFeatures.from_protocol(StateScaler.fit(train, p), p, train)
    same(q_design_of_rows(features, train)(slice(None)), features.transform(train))
    of_rows = q_design_of_rows(features, data)
    steps = data["step"].to_numpy()
    for t in np.unique(steps):
        at = np.flatnonzero(steps == t)
        same(of_rows(at), features.transform(data.iloc[at]))


@pytest.mark.parametrize("first", [1, 3, 4096])
def test_has_distinct_is_the_count_of_every_value(first):
    rng = np.random.default_rng(5)
    for n in (0, 1, 5, 40, 300):
        for pool in (1, 2, 3, 7, 50):
            values = np.array([f"p{i}" for i in rng.integers(0, pool, n)], dtype=object)
            for count in (1, 2, 3, 4, 8, 60):
                assert has_distinct(values, count, pd.unique, first) == (pd.unique(values).size >= count)
    late = np.array(["a"] * 5000 + ["b", "c", "d"], dtype=object)  # the other patients only in the last rows
    assert has_distinct(late, 4, pd.unique, 16) and not has_distinct(late, 5, pd.unique, 16)


@pytest.mark.parametrize("first", [1, 2, 4096])
def test_has_distinct_counts_floats_as_numpy_unique(first):
    rng = np.random.default_rng(6)
    odd = [np.nan, -0.0, 0.0, np.inf, -np.inf]  # numpy's unique counts one nan and one zero
    for n in (0, 1, 6, 50, 400):
        for pool in (1, 2, 5, 9):
            values = np.concatenate([rng.integers(0, pool, n) / 4.0, rng.choice(odd, n % 7)])
            rng.shuffle(values)
            for count in (1, 2, 3, 5, 6, 10):
                assert has_distinct(values, count, first=first) == (np.unique(values).size >= count)
