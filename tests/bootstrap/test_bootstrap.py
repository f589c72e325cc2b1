"""The patient bootstrap: shards rerun to the same bytes, clusters kept whole, intervals and the adaptive m.

Sources of truth: numpy.array_split (an independent partition of replicates into shards); the plug-in
standard error of a mean, which the bootstrap standard error of a mean approaches (Efron & Tibshirani 1993,
An Introduction to the Bootstrap, ch. 6, from memory); the resample-size formula
m = ceil(n^((1 + α(1 − p̂)) / (1 + α))) of Chakraborty, Laber & Zhao (2013, Biometrics 69:714) evaluated by
hand; and simulated data whose actions are exactly tied or far apart by construction.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import yaml
from support.tiny import REPOSITORY, tiny_decisions, tiny_protocol_dict

from regimewise.bootstrap.intervals import (
    collect_replicates,
    disagreements,
    interval,
    percentile_interval,
    regime_pairs,
)
from regimewise.bootstrap.m_out_of_n import (
    adaptive_m,
    nonregularity_share,
    resample_size,
)
from regimewise.bootstrap.replicates import (
    draw_patients,
    patient_groups,
    replicate_rng,
    resample_frame,
    resample_patients,
    run_shard,
    shard_replicates,
)
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import UserInputError
from regimewise.evaluation.values import clustered_mean, evaluate_all, point_values
from regimewise.io import write_json, write_parquet
from regimewise.protocol import Protocol, load_protocol
from regimewise.regime.learning import crossfit_folds, learn_regime, record_proba
from regimewise.workflow.stages import bootstrap_shard_stage, bootstrap_stage

N_REPLICATES = 12


def with_evaluation(protocol: Protocol, **settings) -> Protocol:
    return protocol.model_copy(update={"evaluation": protocol.evaluation.model_copy(update=settings)})


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """The demo protocol with a 12-replicate, 3-shard bootstrap on 200 simulated episodes."""
    folder = tmp_path_factory.mktemp("boot")
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    decisions = clean_decisions(pf, simulate_cohort(200, seed=11, confounding_strength=0.0).decisions)
    write_parquet(folder / "decisions.parquet", decisions)
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"] = {"decisions": str(REPOSITORY / "synthetic_cohort" / "decisions.csv"), "root": str(REPOSITORY)}
    raw.pop("survival", None)  # no episodes table here
    raw["evaluation"].update({"replicates": N_REPLICATES, "shards": 3})
    (folder / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return folder, decisions, load_protocol(folder / "protocol.yaml").protocol


@pytest.fixture(scope="module")
def shards(study):
    folder, _, _ = study
    paths = [folder / f"shard_{k}.json" for k in range(3)]
    for k, path in enumerate(paths):
        bootstrap_shard_stage(folder / "protocol.yaml", folder / "decisions.parquet", str(k), path)
    return paths


def test_a_shard_rerun_alone_gives_the_same_bytes(study, shards, tmp_path):
    folder, _, _ = study
    again = tmp_path / "shard_1.json"
    bootstrap_shard_stage(folder / "protocol.yaml", folder / "decisions.parquet", "1", again)
    assert again.read_bytes() == shards[1].read_bytes()


def test_replicates_do_not_depend_on_the_shard_layout(study, shards):
    # replicate r is seeded by r alone: with 6 shards, shard 2 holds replicates 4 and 5, which the 3-shard run
    # put in its shard 1
    _, decisions, protocol = study
    six = run_shard(decisions, with_evaluation(protocol, shards=6), 2)
    three = json.loads(shards[1].read_text())["replicates"]
    assert [r["replicate"] for r in six["replicates"]] == [4, 5]
    assert json.dumps(six["replicates"], sort_keys=True) == json.dumps(three[:2], sort_keys=True)


@pytest.mark.parametrize("n_replicates, n_shards", [(200, 4), (10, 3), (5, 5), (7, 1), (0, 2)])
def test_shards_partition_the_replicates(n_replicates, n_shards):
    expected = np.array_split(np.arange(n_replicates), n_shards)  # numpy's own split as the reference
    for k in range(n_shards):
        assert list(shard_replicates(n_replicates, n_shards, k)) == expected[k].tolist()


def test_resampling_keeps_every_patient_whole(study):
    _, decisions, _ = study
    groups = patient_groups(decisions)
    resample = resample_patients(decisions, groups, np.random.default_rng(3), size=50)
    assert resample["patient_id"].nunique() == 50
    columns = [c for c in decisions.columns if c not in ("episode_id", "patient_id")]

    def fingerprint(frame):
        return frame[columns].to_csv(index=False)

    originals = {fingerprint(rows) for _, rows in decisions.groupby("patient_id", sort=False)}
    for _, copy in resample.groupby("patient_id", sort=False):
        assert fingerprint(copy) in originals, "a resampled patient differs from every original patient"
        assert copy["episode_id"].str.split("/").str[0].nunique() == 1  # each copy has its own id prefix
    steps = resample.groupby("episode_id", sort=False)["step"].apply(list)
    assert all(s == list(range(len(s))) for s in steps)  # episodes stay contiguous and in step order


def test_bootstrap_se_of_a_mean_return_matches_the_clustered_standard_error(study):
    # The bootstrap SE of a mean approaches the plug-in standard error, here clustered by patient (Efron &
    # Tibshirani 1993, ch. 6); 400 resamples give the SE to about 1/sqrt(2·399) ≈ 3.5%, so 12% is over 3 of its errors.
    _, decisions, protocol = study
    groups = patient_groups(decisions)
    means = [
        resample_patients(decisions, groups, replicate_rng(protocol.seed, r), len(groups))
        .groupby("episode_id", sort=False)["reward"]
        .sum()
        .mean()
        for r in range(400)
    ]
    returns = decisions.groupby("episode_id", sort=False)["reward"].sum().to_numpy()
    patients = pd.factorize(decisions.groupby("episode_id", sort=False)["patient_id"].first())[0]
    assert np.std(means, ddof=1) == pytest.approx(clustered_mean(returns, patients)[1], rel=0.12)


def test_combined_intervals_use_the_replicates(study, shards, tmp_path):
    folder, decisions, protocol = study
    values = tmp_path / "values.json"
    point = point_values_file(decisions, protocol, values)
    intervals = tmp_path / "intervals.json"
    bootstrap_stage(folder / "protocol.yaml", values, shards, intervals)
    out = json.loads(intervals.read_text())
    assert out["replicates_used"] == N_REPLICATES and out["replicates_failed"] == []
    replicates = [r for p in shards for r in json.loads(p.read_text())["replicates"]]
    # usual care against itself has unit weights: its pdwis value in a replicate is the resample's mean return
    groups = patient_groups(decisions)  # the default fixed regime resamples patients within their folds
    folds = crossfit_folds(decisions, protocol)
    strata = np.array([folds[g[0]] for g in groups])
    first = resample_frame(decisions, draw_patients(groups, replicate_rng(protocol.seed, 0), len(groups), strata))
    mean_return = first.groupby("episode_id", sort=False)["reward"].sum().mean()
    assert replicates[0]["values"]["usual_care"]["pdwis"] == pytest.approx(mean_return, abs=1e-9)
    draws = [r["values"]["usual_care"]["pdwis"] for r in replicates]
    usual = out["values"]["usual_care"]["pdwis"]
    # quantile rule of Davison & Hinkley (1997, §5.2), position (R + 1)α: numpy's "weibull" method
    assert (usual["low"], usual["high"]) == pytest.approx(tuple(np.quantile(draws, [0.025, 0.975], method="weibull")))
    # contrasts are differences within the same replicates (replicates where no episode follows the learned
    # regime leave its pdwis undefined and are left out)
    pairs = [(r["values"]["learned"]["pdwis"], r["values"]["usual_care"]["pdwis"]) for r in replicates]
    diffs = [a - b for a, b in pairs if a is not None]
    assert len(diffs) >= N_REPLICATES // 2
    contrast = next(
        c for c in out["contrasts"] if (c["regime"], c["versus"], c["estimator"]) == ("learned", "usual_care", "pdwis")
    )
    assert (contrast["low"], contrast["high"]) == pytest.approx(
        tuple(np.quantile(diffs, [0.025, 0.975], method="weibull"))
    )
    assert contrast["difference"] == pytest.approx(point["learned"]["pdwis"] - point["usual_care"]["pdwis"])


def test_without_replicates_the_bootstrap_combines_no_shards(study, tmp_path):
    """evaluation.replicates: 0 runs no shard job; the combining stage then reports every value without an
    interval (the point estimates are kept) instead of refusing the empty shard list."""
    folder, decisions, protocol = study
    raw = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    raw["evaluation"]["replicates"] = 0
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    values = tmp_path / "values.json"
    point = point_values_file(decisions, with_evaluation(protocol, replicates=0), values)
    bootstrap_stage(tmp_path / "protocol.yaml", values, [], tmp_path / "intervals.json")
    out = json.loads((tmp_path / "intervals.json").read_text())
    assert (out["replicates"], out["replicates_used"], out["resample"]["n"]) == (0, 0, 0)
    usual = out["values"]["usual_care"]["pdwis"]
    assert usual["value"] == pytest.approx(point["usual_care"]["pdwis"]) and usual["low"] is None


def point_values_file(decisions, protocol, path):
    """Point estimates on the full records, written like the evaluate stage writes them."""
    learned = learn_regime(decisions, protocol)
    proba = record_proba(learned, decisions)
    recommended, q = learned.recommend(decisions, proba), learned.q_values(decisions)
    values = evaluate_all(decisions, proba, recommended, protocol, learned_q=q)
    write_json(path, values)
    return point_values(values)


def test_missing_replicates_are_refused(study, shards):
    _, _, protocol = study
    payloads = [json.loads(p.read_text()) for p in shards[:2]]
    with pytest.raises(UserInputError, match="rerun the bootstrap"):
        collect_replicates(payloads, N_REPLICATES)


def test_every_pair_of_regimes_is_contrasted_once_against_usual_care_as_reference():
    pairs = regime_pairs(["learned", "usual_care", "always_a", "always_b"])
    assert len(pairs) == 6
    assert ("learned", "usual_care") in pairs and ("always_a", "usual_care") in pairs
    assert ("always_a", "always_b") in pairs and ("learned", "always_b") in pairs


def test_disagreeing_estimators_are_flagged_with_an_explanation():
    ok = {"low": 0.0, "high": 2.0}
    far = {"low": 3.0, "high": 4.0}
    flags = disagreements({"learned": {"pdwis": ok, "wdr": {"low": 1.5, "high": 2.5}, "fqe": far}})
    assert [f["estimators"] for f in flags] == [["pdwis", "fqe"], ["wdr", "fqe"]]
    assert "Q-model" in flags[0]["explanation"] and "weights" in flags[0]["explanation"]


# --------------------------------------------------------------------------------------------------------
# adaptive m-out-of-n (Chakraborty, Laber & Zhao 2013)


def test_adaptive_m_follows_the_published_formula():
    # m = ceil(n^((1 + α(1 − p)) / (1 + α))), worked by hand: n = 1000, α = 0.1, p = 0.5 → 1000^(1.05/1.1)
    assert adaptive_m(1000, 0.5, 0.1) == math.ceil(1000 ** (1.05 / 1.1)) == 731
    assert adaptive_m(1000, 0.0, 0.1) == 1000  # regular setting: the ordinary bootstrap
    assert adaptive_m(1000, 1.0, 0.1) == math.ceil(1000 ** (1 / 1.1))


def separated_or_tied(gap: float, n_episodes=300) -> tuple[pd.DataFrame, Protocol]:
    """Tiny-protocol records with random actions; 'hold' earns ``gap`` more at every step (0 = exact ties)."""
    frame = tiny_decisions(n_episodes, seed=4)
    rng = np.random.default_rng(9)
    frame["reward"] = gap * (frame["action"] == "hold") + rng.normal(size=len(frame))
    evaluation = {"m_out_of_n": True, "bootstrap_regime": "refit"}
    protocol = Protocol.model_validate({**tiny_protocol_dict(), "evaluation": evaluation})
    return frame, protocol


def test_near_tie_share_is_high_when_actions_tie_and_low_when_they_are_far_apart():
    # Constructed truth: with no action effect every decision is an exact tie (the pretest at ν = 0.001
    # should accept equality almost always); with a gap of 5 reward units no decision is tied.
    tied = nonregularity_share(*separated_or_tied(0.0))
    apart = nonregularity_share(*separated_or_tied(5.0))
    assert tied > 0.9
    assert apart < 0.05
    frame, protocol = separated_or_tied(0.0)
    size = resample_size(frame, protocol)
    assert size["m"] < size["n"] == frame["patient_id"].nunique()


def test_m_out_of_n_interval_is_rescaled_around_the_estimate():
    # θ̂ − √(m/n)(q*_{1−a/2} − θ̂), θ̂ − √(m/n)(q*_{a/2} − θ̂) (Chakraborty, Laber & Zhao 2013), by hand:
    # draws 0..100 (R = 101) → quantiles at positions 102·0.025 = 2.55 and 102·0.975 = 99.45 of the ordered
    # draws: 1.55 and 98.45; θ̂ = 50, scale 0.5 → 50 − 0.5·48.45, 50 + 0.5·48.45
    out = interval(50.0, list(np.arange(101.0)), 0.95, 0.5)
    assert (out["low"], out["high"]) == pytest.approx((25.775, 74.225))


def test_basic_interval_reflects_the_quantiles_around_the_estimate():
    # basic bootstrap interval 2θ̂ − q*_{1−a/2}, 2θ̂ − q*_{a/2} (Davison & Hinkley 1997, §5.2), by hand:
    # draws 10..110 (quantiles 11.55 and 108.45, positions (R + 1)α as above), θ̂ = 50 → 100 − 108.45,
    # 100 − 11.55; it moves against the bias
    out = interval(50.0, list(np.arange(10.0, 111.0)), 0.95, 1.0, basic=True)
    assert (out["low"], out["high"]) == pytest.approx((-8.45, 88.45))


@pytest.mark.parametrize(
    "n_replicates, level, ranks", [(199, 0.95, (5, 195)), (999, 0.95, (25, 975)), (99, 0.90, (5, 95))]
)
def test_percentile_limits_are_the_textbook_order_statistics(n_replicates, level, ranks):
    # Davison & Hinkley (1997, §5.2): with R replicates the α and 1 − α limits are the (R + 1)α-th and
    # (R + 1)(1 − α)-th ordered replicates, whole numbers for R = 199, 999 (α = 0.025) and 99 (α = 0.05)
    draws = np.random.default_rng(n_replicates).standard_normal(n_replicates)
    ordered = np.sort(draws)
    low, high = percentile_interval(draws, level)
    assert (low, high) == pytest.approx((ordered[ranks[0] - 1], ordered[ranks[1] - 1]), abs=1e-12)
    assert (low, high) != pytest.approx((ordered[ranks[0]], ordered[ranks[1] - 2]), abs=1e-6)  # not the neighbours
