"""The bootstrap with the learned regime held fixed (``evaluation.bootstrap_regime: fixed``, the default).

Sources of truth: the fold regimes themselves (:func:`regimewise.regime.learning.fold_regimes`), applied afresh to
the resampled patients' states — a regime is a function of the state, so a copy of a patient must get the action
and Q-values its original got from the regime learned without its fold; the cross-fitting fold split, whose
patient counts a resample within folds must keep (the stratified bootstrap of a design with fixed strata: Davison
& Hinkley 1997, §3.7, from memory); and, for contrast, the refitting replicate, which learns another regime.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import yaml
from support.tiny import REPOSITORY

from regimewise.bootstrap.intervals import shared_regime
from regimewise.bootstrap.replicates import (
    draw_patients,
    fit_replicate,
    held_regime,
    patient_groups,
    replicate_rng,
    resample_frame,
    run_replicate,
    run_shard,
)
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import ProtocolError, UserInputError
from regimewise.evaluation.values import evaluate_all, point_values
from regimewise.io import write_parquet
from regimewise.protocol import load_protocol
from regimewise.regime.learning import crossfit_folds, fold_regimes
from regimewise.usual_care.fitting import fit_usual_care
from regimewise.workflow.stages import bootstrap_shard_stage, evaluated_q_columns


@pytest.fixture(scope="module")
def study():
    """The demo protocol (2 cross-fitting folds, derived strategies) on 160 simulated episodes, 2 replicates."""
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    decisions = clean_decisions(pf, simulate_cohort(160, seed=5, confounding_strength=0.0).decisions)
    evaluation = pf.protocol.evaluation.model_copy(update={"replicates": 2, "shards": 1})
    protocol = pf.protocol.model_copy(update={"evaluation": evaluation, "survival": None})
    return decisions, protocol


@pytest.fixture(scope="module")
def resample(study):
    """Replicate 0's draws within the folds, its frame and the held regime at its rows."""
    decisions, protocol = study
    held = held_regime(decisions, protocol)
    groups = patient_groups(decisions)
    strata = np.array([held.folds[g[0]] for g in groups])
    draws = draw_patients(groups, replicate_rng(protocol.seed, 0), len(groups), strata)
    return held, strata, draws, resample_frame(decisions, draws)


def test_every_copy_gets_the_action_and_q_values_of_the_regime_learned_without_its_fold(study, resample):
    decisions, protocol = study
    held, _, draws, frame = resample
    rows = np.concatenate(draws)
    at = held.at(rows)
    for in_fold, learned in fold_regimes(decisions, protocol, held.folds):
        mine = in_fold[rows]  # copies whose original patient is in this fold
        copies = frame.loc[mine].reset_index(drop=True)
        assert np.array_equal(at.recommended[mine], learned.recommend(copies))
        assert np.allclose(at.q[mine], learned.q_values(copies), equal_nan=True)  # nan: action never taken
        assert np.all(at.folds[mine] == held.folds[in_fold][0])


def test_a_resample_within_folds_keeps_each_folds_patient_count(study, resample):
    decisions, protocol = study
    _, strata, draws, frame = resample
    folds = crossfit_folds(decisions, protocol)
    drawn = np.array([folds[d[0]] for d in draws])
    assert np.array_equal(np.bincount(drawn), np.bincount(strata))
    assert frame["patient_id"].nunique() == decisions["patient_id"].nunique()
    assert frame["resampled_from"].nunique() < decisions["patient_id"].nunique()  # with replacement: repeats


def test_a_fixed_replicate_evaluates_the_held_regime_and_a_refit_one_another(study, resample):
    decisions, protocol = study
    held, _, draws, frame = resample
    rows = np.concatenate(draws)
    out = run_replicate(decisions, patient_groups(decisions), protocol, 0, len(patient_groups(decisions)), held=held)
    # the same evaluation computed here from the held regime's arrays, usual care refitted on the resample
    at = held.at(rows)
    proba = fit_usual_care(frame, protocol).record_proba
    expected = evaluate_all(
        frame, proba, at.recommended, protocol, strict=False, learned_folds=at.folds, learned_q=at.q
    )
    assert json.dumps(out["values"], sort_keys=True) == json.dumps(point_values(expected), sort_keys=True)
    # a refitting replicate learns other regimes on the resample: their actions differ at some copies
    _, relearned, _, _ = fit_replicate(frame, protocol)
    assert 0 < np.sum(relearned != at.recommended) < len(frame)


def test_the_shard_job_reads_the_held_regime_from_the_regime_stages_table(study, tmp_path):
    decisions, protocol = study
    held = held_regime(decisions, protocol)
    labels = np.asarray(protocol.action_labels)
    table = pd.DataFrame({"action": decisions["action"], "evaluated": labels[held.recommended]})
    table[evaluated_q_columns(protocol.action_labels)] = held.q
    write_parquet(tmp_path / "recommendations.parquet", table)
    write_parquet(tmp_path / "decisions.parquet", decisions)
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"] = {"decisions": str(REPOSITORY / "synthetic_cohort" / "decisions.csv"), "root": str(REPOSITORY)}
    raw.pop("survival")
    raw["evaluation"].update({"replicates": 2, "shards": 1})
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    out = tmp_path / "shard_0.json"
    bootstrap_shard_stage(
        tmp_path / "protocol.yaml", tmp_path / "decisions.parquet", "0", out, table=tmp_path / "recommendations.parquet"
    )
    shard = json.loads(out.read_text())
    assert shard["regime"] == "fixed"
    direct = run_shard(decisions, protocol, 0, held=held)
    assert json.dumps(shard["replicates"], sort_keys=True) == json.dumps(direct["replicates"], sort_keys=True)


def test_m_out_of_n_with_a_held_regime_is_refused_in_one_line(tmp_path):
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"] = {"decisions": str(REPOSITORY / "synthetic_cohort" / "decisions.csv"), "root": str(REPOSITORY)}
    raw["evaluation"]["m_out_of_n"] = True
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    with pytest.raises(ProtocolError, match="bootstrap_regime: refit") as caught:
        load_protocol(tmp_path / "protocol.yaml")
    assert "\n" not in str(caught.value)


def test_shards_computed_for_the_other_estimand_are_refused():
    # a shard left from a run with bootstrap_regime: refit must not be combined into fixed-regime intervals
    assert shared_regime([{"regime": "fixed"}, {"regime": "fixed"}], "fixed") == "fixed"
    with pytest.raises(UserInputError, match="rerun every bootstrap shard"):
        shared_regime([{"regime": "fixed"}, {"regime": "refit"}], "fixed")
    with pytest.raises(UserInputError, match="rerun every bootstrap shard"):
        shared_regime([{"shard": 0}], "fixed")  # written before the setting existed
