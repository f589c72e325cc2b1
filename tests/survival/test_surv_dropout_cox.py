"""Dropout weights (pooled logistic) and the optional weighted Cox model."""

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from surv_helpers import gehan, point_treatment, random_cohort

from regimewise.survival import DropoutModel, clone_censor_weight, make_timeline, weighted_cox
from regimewise.survival.cox import CAUTION, robust_cox_covariance


def test_dropout_model_with_steps_only_is_the_per_step_dropout_proportion():
    # Source: the unpenalised maximum-likelihood fit of a logistic model saturated in the step is the observed
    # proportion at each step (exact), recounted here with pandas from the records; weights are
    # 1 / Π_{u<=t} (1 - ĥ_u) (Robins & Finkelstein 2000, Biometrics 56:779).
    decisions, episodes, proba, _ = random_cohort(14, n_episodes=600)
    horizon = 100.0
    timeline = make_timeline(decisions, episodes, proba, horizon)
    merged = decisions.merge(episodes, on="episode_id")
    end = np.minimum(merged["followup_days"], horizon)
    kept = merged[merged["day"] < end].copy()
    next_day = kept.groupby("episode_id")["day"].shift(-1)
    is_last = next_day.isna()
    kept["dropout"] = is_last & (kept["event"] == 0) & (kept["followup_days"] < horizon)
    proportion = kept.groupby("step")["dropout"].mean()
    model = DropoutModel().fit(timeline)
    np.testing.assert_allclose(model.predict_proba(timeline), proportion.loc[kept["step"]].to_numpy(), atol=1e-9)
    expected = 1 / (1 - proportion.loc[kept["step"]]).groupby(kept["episode_id"].to_numpy(), sort=False).cumprod()
    np.testing.assert_allclose(model.weights(timeline), expected.to_numpy(), rtol=1e-8)
    assert model.n_dropouts_ == int(kept["dropout"].sum())


def test_no_dropout_gives_weight_one():
    # Source: exact; with no dropout the fitted hazard is 0 at every step, so every weight is 1.
    decisions, episodes, proba, states = random_cohort(15, n_episodes=50)
    episodes = episodes.assign(event=1)  # every episode ends with an event: nobody is lost to follow-up
    timeline = make_timeline(decisions, episodes, proba, 100.0)
    model = DropoutModel().fit(timeline, states)
    assert model.n_dropouts_ == 0 and np.all(model.weights(timeline, states) == 1.0)


def _gehan_tables():
    tables = {}
    data = gehan()
    for group, name in ((2, "6-MP"), (1, "placebo")):
        arm = data[data["group"] == group].reset_index(drop=True)
        decisions, episodes = point_treatment(
            [f"{name}{i}" for i in arm.index], np.zeros(len(arm)), arm["weeks"], arm["relapse"]
        )
        timeline = make_timeline(decisions, episodes, np.ones((len(arm), 1)), float(arm["weeks"].max()))
        tables[name] = clone_censor_weight(timeline, name=name)
    return tables


def test_cox_on_gehan_matches_the_published_fit_and_lifelines():
    # Source: Cox model of Gehan's data, placebo vs 6-MP, Efron ties: coefficient 1.572, model-based SE 0.412
    # (R survival's coxph on MASS::gehan; value from memory); lifelines CoxPHFitter on the plain two-arm data.
    result = weighted_cox(_gehan_tables(), reference="6-MP")
    assert result.names == ("placebo",) and result.log_hazard_ratio[0] == pytest.approx(1.572, abs=1e-3)
    data = gehan().assign(placebo=lambda d: (d["group"] == 1).astype(float)).drop(columns="group")
    direct = CoxPHFitter().fit(data, "weeks", "relapse")
    assert result.log_hazard_ratio[0] == pytest.approx(direct.params_["placebo"], abs=1e-7)
    assert result.caution == CAUTION and "Hernán 2010" in CAUTION
    json.dumps(result.to_dict(), allow_nan=False)


def _no_tie_data(seed, n=300):
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    return pd.DataFrame(
        {
            "stop": rng.exponential(1.0, n),
            "event": rng.random(n) < 0.7,
            "x1": rng.normal(size=n),
            "x2": rng.integers(0, 2, n).astype(float),
            "weight": rng.gamma(2.0, 1.0, n),
            "cluster": rng.integers(0, 100, n),
        }
    )


def test_robust_covariance_equals_lifelines_sandwich_without_entry_times():
    # Source: lifelines CoxPHFitter(robust=True, cluster_col=...) (Lin & Wei 1989 sandwich) as reference, on
    # one-row-per-subject data without ties, where its omission of entry times does not matter.
    data = _no_tie_data(16)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fitted = CoxPHFitter().fit(data, "stop", "event", weights_col="weight", robust=True, cluster_col="cluster")
    x = data[["x1", "x2"]].to_numpy()
    covariance = robust_cox_covariance(
        fitted.params_.to_numpy(),
        x,
        np.zeros(len(data)),
        data["stop"].to_numpy(),
        data["event"].to_numpy(),
        data["weight"].to_numpy(),
        data["cluster"].to_numpy(),
    )
    np.testing.assert_allclose(np.sqrt(np.diag(covariance)), fitted.standard_errors_.to_numpy(), rtol=1e-6)


def test_robust_covariance_is_unchanged_when_rows_are_split():
    # Source: exact invariance of the counting-process likelihood and score residuals (Andersen & Gill 1982):
    # cutting each subject's (0, T] into (0, c] and (c, T] with the same covariates, weight and cluster changes
    # nothing.
    data = _no_tie_data(17)
    beta = np.array([0.3, -0.5])
    x = data[["x1", "x2"]].to_numpy()
    whole = robust_cox_covariance(
        beta,
        x,
        np.zeros(len(data)),
        data["stop"].to_numpy(),
        data["event"].to_numpy(),
        data["weight"].to_numpy(),
        data["cluster"].to_numpy(),
    )
    cut = data["stop"].to_numpy() * np.random.default_rng(np.random.SeedSequence(18)).uniform(0.2, 0.8, len(data))
    split = robust_cox_covariance(
        beta,
        np.vstack([x, x]),
        np.concatenate([np.zeros(len(data)), cut]),
        np.concatenate([cut, data["stop"]]),
        np.concatenate([np.zeros(len(data), dtype=bool), data["event"]]),
        np.tile(data["weight"].to_numpy(), 2),
        np.tile(data["cluster"].to_numpy(), 2),
    )
    np.testing.assert_allclose(split, whole, rtol=1e-10)
