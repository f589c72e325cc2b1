"""Missing-indicator columns (``data.missing: indicator``) as covariates of the usual-care and Q-models.

The cohort is made up: blood pressure goes unrecorded mostly when it is high (missing not at random), and
clinicians step up more often when it is high, so the indicator carries information the median fill hides.
"""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import yaml
from support.tiny import tiny_protocol_dict

from regimewise.core.features import QFeatures, StateScaler, action_codes
from regimewise.data.validate import validate_records
from regimewise.errors import UserInputError
from regimewise.protocol import load_protocol
from regimewise.regime.learning import learn_regime
from regimewise.regime.readable import distill_regime
from regimewise.usual_care.fitting import fit_usual_care

ACTIONS = ("hold", "up", "down")


def mnar_decisions(n_episodes=200, seed=3) -> pd.DataFrame:
    """Made-up decisions: bp missing with probability 0.6 when above 150 mmHg, 0.05 otherwise."""
    rng = np.random.default_rng(seed)
    n = n_episodes * 3
    bp = rng.normal(145, 15, n).round(1)
    flag = rng.integers(0, 2, n)
    logits = np.column_stack([np.zeros(n), 0.06 * (bp - 145), 0.4 * flag - 0.5])
    proba = np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)
    action = (rng.random(n)[:, None] > proba.cumsum(axis=1)).sum(axis=1)
    missing = rng.random(n) < np.where(bp > 150, 0.6, 0.05)
    return pd.DataFrame(
        {
            "episode_id": [f"E{i // 3:04d}" for i in range(n)],
            "patient_id": [f"P{i // 6:04d}" for i in range(n)],
            "step": np.tile([0, 1, 2], n_episodes),
            "day": np.tile([0, 90, 180], n_episodes),
            "bp": np.where(missing, np.nan, bp),
            "flag": flag,
            "action": np.asarray(ACTIONS)[action],
            "reward": rng.normal(size=n).round(3),
        }
    )


def clean_records(folder, frame, policy="indicator"):
    """The validated decisions and the protocol, with the given missing-data policy for bp."""
    folder.mkdir(parents=True, exist_ok=True)
    frame.to_csv(folder / "decisions.csv", index=False)
    raw = tiny_protocol_dict()
    raw["data"]["missing"] = {"bp": policy}
    (folder / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    pf = load_protocol(folder / "protocol.yaml")
    return validate_records(pf).decisions, pf.protocol


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    return clean_records(tmp_path_factory.mktemp("mnar"), mnar_decisions())


def test_the_indicator_is_a_covariate_of_the_usual_care_model_and_the_q_model(cohort):
    decisions, protocol = cohort
    assert 0 < decisions["bp_missing"].mean() < 1
    usual = fit_usual_care(decisions, protocol)
    assert usual.design.names == ["bp", "flag", "bp_missing", "step_fraction"]
    assert usual.scaler.to_dict()["missing_indicators"] == ["bp_missing"]
    learned = learn_regime(decisions, protocol)
    assert learned.q_features.names[:3] == ["bp", "flag", "bp_missing"]
    X = learned.q_features.transform(decisions)
    np.testing.assert_array_equal(X[:, 2], decisions["bp_missing"].to_numpy())  # 0/1, not scaled
    # The readable tree is offered the indicator like any binary state.
    readable = distill_regime(
        decisions, learned(decisions), learned.q_features.scaler.covariate_states(protocol), protocol.action_labels
    )
    assert "bp_missing" in readable.importance


def test_usual_care_coefficients_match_statsmodels_mnlogit_on_the_same_design(cohort):
    decisions, protocol = cohort
    usual = fit_usual_care(decisions, protocol)
    design = usual.design.transform(decisions)
    codes = action_codes(decisions, protocol.action_labels)
    # External reference: statsmodels' MNLogit fitted directly on the same design plus a constant (Newton).
    reference = sm.MNLogit(codes, sm.add_constant(design, has_constant="add")).fit(method="newton", maxiter=200, disp=0)
    row = 1 + usual.design.names.index("bp_missing")  # row 0 holds the intercepts
    np.testing.assert_allclose(usual.model.params_[row], np.asarray(reference.params)[row], atol=1e-6)
    np.testing.assert_allclose(usual.model.params_, np.asarray(reference.params), atol=1e-6)
    # Made-up cohort: clinicians step up more when bp is high, and high bp goes missing more, so the indicator's
    # log-odds of "up" against "hold" is positive (a check of the direction only; the size depends on the draw).
    assert usual.model.params_[row, 0] > 0


def test_a_table_without_the_indicator_column_is_read_as_fully_observed(cohort):
    decisions, protocol = cohort
    usual = fit_usual_care(decisions, protocol)
    complete = decisions.drop(columns="bp_missing")
    np.testing.assert_allclose(
        usual.predict_proba(complete), usual.predict_proba(decisions.assign(bp_missing=0)), rtol=0, atol=0
    )
    gap = complete.assign(bp=complete["bp"].mask(complete.index == 4))
    with pytest.raises(UserInputError, match="lacks its indicator column 'bp_missing'"):
        usual.predict_proba(gap)


def test_a_constant_indicator_is_left_out_and_said_so(tmp_path, caplog):
    complete = mnar_decisions()
    complete["bp"] = complete["bp"].fillna(150.0)  # nothing missing: the indicator is all 0
    decisions, protocol = clean_records(tmp_path, complete)
    assert (decisions["bp_missing"] == 0).all()
    with caplog.at_level(logging.INFO, logger="regimewise"):
        usual = fit_usual_care(decisions, protocol)
    assert usual.design.names == ["bp", "flag", "step_fraction"]  # no singular design: the column is not there
    assert usual.scaler.to_dict()["missing_indicators_dropped_constant"] == ["bp_missing"]
    assert any("bp_missing is constant" in r.getMessage() for r in caplog.records)


def test_without_the_indicator_policy_the_covariates_are_unchanged(tmp_path):
    complete = mnar_decisions()
    complete["bp"] = complete["bp"].fillna(150.0)
    decisions, protocol = clean_records(tmp_path, complete, policy="refuse")
    scaler = StateScaler.fit(decisions, protocol)
    assert scaler.names == ("bp", "flag")
    assert set(scaler.to_dict()) == {"names", "means", "scales"}  # the same summary keys as before indicators
    assert QFeatures.from_protocol(scaler, protocol).names == ["bp", "flag"]
    assert scaler.covariate_states(protocol) == tuple(protocol.states)
