"""The evaluation's Q-features read by rows (``FeatureRows``) against the features of the whole table."""

from __future__ import annotations

import numpy as np
import pandas as pd
from support.tiny import tiny_protocol_dict

from regimewise.core.features import QFeatures, StateScaler
from regimewise.evaluation.values import FeatureRows
from regimewise.protocol import Protocol


def test_feature_rows_read_the_missing_indicators():
    # a block built from the states' columns alone read every indicator as 0 (its state filled by validation)
    raw = tiny_protocol_dict()
    raw["data"]["missing"] = {"bp": "indicator"}
    p = Protocol.model_validate(raw)
    rng = np.random.default_rng(0)
    frame = pd.DataFrame(
        {"bp": rng.normal(140, 15, 60), "flag": rng.integers(0, 2, 60), "bp_missing": (rng.random(60) < 0.3) * 1.0}
    )
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    assert "bp_missing" in features.names
    rows = np.arange(0, 60, 3)
    got = FeatureRows(features, frame, p)[rows]
    assert np.array_equal(got, features.transform(frame)[rows])
    assert got[:, features.names.index("bp_missing")].sum() > 0
