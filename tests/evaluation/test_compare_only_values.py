"""A study that learns no regime (``analysis.learn_regime: false``): the stages value the named strategies only.

On one decision per patient the trajectory importance-sampling estimators are the textbook inverse-probability
weighted means, so the value of "always treat" is checked against the Horvitz–Thompson and Hájek estimators
computed by hand with a propensity from statsmodels' binary ``Logit`` (a different model class from the
multinomial logit the usual-care model uses; Horvitz & Thompson 1952, JASA 47:663; Hájek 1971, in Foundations of
Statistical Inference; the IPW form of both for a treatment mean, e.g. Lunceford & Davidian 2004, Stat Med
23:2937, eqs. 3 and 4 — equation numbers from memory).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import yaml

from regimewise.io import read_json, read_parquet
from regimewise.workflow.stages import behaviour_stage, evaluate_stage, regime_stage, validate_stage


def _one_decision_study(folder, n=300, seed=11):
    """Invented records: one decision per patient, treatment more likely at a higher score, reward rising with both."""
    rng = np.random.default_rng(seed)
    score = np.round(rng.normal(0.0, 1.0, n), 3)
    treat = rng.random(n) < 1.0 / (1.0 + np.exp(-(0.3 + 0.8 * score)))
    reward = np.round(1.0 + 0.5 * score + 1.0 * treat + rng.normal(0.0, 1.0, n), 4)
    frame = pd.DataFrame(
        {
            "episode_id": [f"E{i:04d}" for i in range(n)],
            "patient_id": [f"P{i:04d}" for i in range(n)],
            "step": 0,
            "day": 0,
            "score": score,
            "action": np.where(treat, "treat", "none"),
            "reward": reward,
        }
    )
    folder.mkdir(parents=True, exist_ok=True)
    frame.to_csv(folder / "decisions.csv", index=False)
    protocol = {
        "study": {"title": "One decision", "question": "Is always treating better?", "version": "1", "run_name": "one"},
        "data": {"decisions": "decisions.csv"},
        "states": [{"name": "score", "label": "Score", "kind": "continuous", "plausible_range": [-10, 10]}],
        "actions": [{"label": "none", "description": "no treatment"}, {"label": "treat", "description": "treat"}],
        "reward": {"description": "made-up outcome"},
        "horizon": 1,
        "seed": 3,
        "behaviour_model": {"include_step": False, "folds": 1},
        "evaluation": {"estimators": ["is", "wis"], "replicates": 0},
        "analysis": {"learn_regime": False, "headline": "always_treat"},
    }
    (folder / "protocol.yaml").write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return folder / "protocol.yaml", frame


@pytest.fixture(scope="module")
def stages(tmp_path_factory):
    folder = tmp_path_factory.mktemp("one_decision")
    protocol, frame = _one_decision_study(folder)
    out = {name: folder / name for name in ("decisions.parquet", "episodes.parquet", "validation.json")}
    validate_stage(str(protocol), out["decisions.parquet"], out["episodes.parquet"], out["validation.json"])
    paths = {k: folder / k for k in ("proba.parquet", "behaviour.json", "table.parquet", "regime.json", "values.json")}
    behaviour_stage(str(protocol), out["decisions.parquet"], paths["proba.parquet"], paths["behaviour.json"])
    regime_stage(
        str(protocol), out["decisions.parquet"], paths["proba.parquet"], paths["table.parquet"], paths["regime.json"]
    )
    evaluate_stage(
        str(protocol), out["decisions.parquet"], paths["proba.parquet"], paths["table.parquet"], paths["values.json"]
    )
    return frame, paths


def test_no_regime_is_learned(stages):
    _, paths = stages
    regime = read_json(paths["regime.json"])
    assert regime["learned"] is False and regime["headline"] == "always_treat"
    assert regime["named_strategies"] == ["always_none", "always_treat"]
    assert list(read_parquet(paths["table.parquet"]).columns) == ["episode_id", "step", "action"]


def test_only_usual_care_and_the_named_strategies_are_valued(stages):
    _, paths = stages
    values = read_json(paths["values.json"])
    assert [r["name"] for r in values["regimes"]] == ["usual_care", "always_none", "always_treat"]
    assert "learned_weight_histograms" not in values and "side_by_side" not in values
    pairs = [(c["regime"], c["versus"], c["estimator"]) for c in values["contrasts"]]
    assert pairs == [(a, "usual_care", e) for a in ("always_none", "always_treat") for e in ("is", "wis")]


def test_always_treat_equals_the_inverse_probability_weighted_means_by_hand(stages):
    frame, paths = stages
    values = read_json(paths["values.json"])
    estimates = next(r["estimates"] for r in values["regimes"] if r["name"] == "always_treat")
    # Propensity by statsmodels' binary logistic regression of treatment on the score (maximum likelihood).
    treated = (frame["action"] == "treat").to_numpy(dtype=float)
    fit = sm.Logit(treated, sm.add_constant(frame["score"].to_numpy())).fit(disp=0)
    e = fit.predict(sm.add_constant(frame["score"].to_numpy()))
    y = frame["reward"].to_numpy()
    w = treated / e
    horvitz_thompson = np.mean(w * y)
    hajek = np.sum(w * y) / np.sum(w)
    assert estimates["is"]["value"] == pytest.approx(horvitz_thompson, rel=1e-6)
    assert estimates["wis"]["value"] == pytest.approx(hajek, rel=1e-6)
    # Kish's effective sample size of the weights, (Σw)² / Σw² (Kish 1965, Survey Sampling).
    assert estimates["wis"]["ess"] == pytest.approx(np.sum(w) ** 2 / np.sum(w**2), rel=1e-6)
    # The contrast with usual care: usual care's weights are all 1, so its wis value is the mean reward.
    contrast = next(c for c in values["contrasts"] if (c["regime"], c["estimator"]) == ("always_treat", "wis"))
    assert contrast["difference"] == pytest.approx(hajek - np.mean(y), rel=1e-6)
