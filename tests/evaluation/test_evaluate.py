"""The evaluate stage's arithmetic: reliability floor, identities on real records, weight histograms, nulls.

Sources of truth: the identities of self-normalised importance sampling (usual care evaluated against itself
has unit weights, so every weighted estimator is the mean observed return and ESS = n; Precup, Sutton &
Singh 2000), DR with Q ≡ 0 equals per-decision IS (Thomas & Brunskill 2016), scipy.stats.sem for the
closed-form standard error of a mean, and the issue's reliability floor max(30, 5% of episodes)
(common practice, no source).
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from scipy import stats
from support.tiny import REPOSITORY

import regimewise.evaluation.values as values_module
from regimewise.data.records import clean_decisions
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.evaluation.fqe import FittedQEvaluation
from regimewise.evaluation.strategies import changed_by_row, share_changed
from regimewise.evaluation.values import (
    LoggedDecisions,
    evaluate_all,
    minimum_reliable_ess,
)
from regimewise.evaluation.verdicts import unsupported_by_row, unsupported_share
from regimewise.protocol import EvaluationSpec, load_protocol
from regimewise.regime.learning import crossfit_folds, learn_regime
from regimewise.regime.qmodels import target_rows

ALL = ["is", "wis", "pdis", "pdwis", "dr", "wdr", "fqe"]


@pytest.fixture(scope="module")
def setting():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    protocol = pf.protocol.model_copy(
        update={"evaluation": pf.protocol.evaluation.model_copy(update={"estimators": ALL}), "strategies": None}
    )  # the strategies: test_strategies_are_evaluated_with_verdicts
    decisions = clean_decisions(pf, simulate_cohort(400, seed=3, confounding_strength=0.0).decisions)
    learned = learn_regime(decisions, protocol)
    proba = learned.usual_care.predict_proba(decisions)
    values = evaluate_all(decisions, proba, learned.recommend(decisions, proba), protocol)
    return decisions, proba, protocol, values


@pytest.mark.parametrize("episodes, floor", [(100, 30.0), (600, 30.0), (3000, 150.0), (10_000, 500.0)])
def test_minimum_reliable_ess_is_5_percent_but_never_below_30(episodes, floor):
    # the rule: 5% of episodes, never below 30 (common practice, no source)
    assert minimum_reliable_ess(episodes, EvaluationSpec()) == floor


def test_the_floor_follows_the_protocol():
    spec = EvaluationSpec(minimum_ess=50, minimum_ess_fraction=0.1)
    assert minimum_reliable_ess(3000, spec) == 300.0
    assert minimum_reliable_ess(100, spec) == 50.0
    with pytest.raises(ValueError):
        EvaluationSpec(minimum_ess=10)  # never below 30


def test_usual_care_against_itself_gives_the_mean_return_by_every_weighted_estimator(setting):
    decisions, _, _, values = setting
    returns = decisions.groupby("episode_id", sort=False)["reward"].sum().to_numpy()
    usual = next(r for r in values["regimes"] if r["name"] == "usual_care")["estimates"]
    assert set(usual) == set(ALL)
    for name in ("is", "wis", "pdis", "pdwis"):
        assert usual[name]["value"] == pytest.approx(returns.mean(), abs=1e-9)  # unit weights
        assert usual[name]["ess"] == pytest.approx(len(returns))
        assert usual[name]["low_ess"] is False
    # with unit weights IS is the plain mean: its closed-form SE is the standard error of the mean (scipy)
    assert usual["is"]["se"] == pytest.approx(stats.sem(returns))
    assert usual["pdwis"]["se"] is None and usual["fqe"]["se"] is None  # no closed form: bootstrap only


def test_low_ess_flag_matches_the_floor(setting):
    _, _, _, values = setting
    floor = values["minimum_reliable_ess"]
    assert floor == 30.0
    for r in values["regimes"]:
        for e in r["estimates"].values():
            if e["ess"] is not None:
                assert e["low_ess"] == (e["ess"] < floor)


def test_weight_histograms_count_every_episode_at_every_step(setting):
    decisions, _, protocol, values = setting
    histograms = values["learned_weight_histograms"]
    assert len(histograms["by_step"]) == protocol.horizon
    n = decisions["episode_id"].nunique()
    for h in histograms["by_step"]:
        assert h["zero"] + sum(h["counts"]) == n
    following = values["regimes"][0]["estimates"]["pdwis"]["n_following"]
    assert n - histograms["by_step"][-1]["zero"] == following  # nonzero final weight = follows throughout


def test_an_unfittable_model_based_estimate_is_null_only_when_not_strict(setting):
    decisions, proba, protocol, _ = setting
    keep = ~((decisions["step"] == 2) & (decisions["action"] == "step_down")).to_numpy()
    episodes_kept = decisions.loc[~keep, "episode_id"].unique()
    thin = decisions[~decisions["episode_id"].isin(episodes_kept)].reset_index(drop=True)
    thin_proba = proba[~decisions["episode_id"].isin(episodes_kept).to_numpy()]
    recommended = np.zeros(len(thin), dtype=np.int64)
    with pytest.raises(UserInputError, match="never occurs") as err:
        evaluate_all(thin, thin_proba, recommended, protocol)
    # the message names the action by the protocol's label, not by its code (1)
    assert "action 'step_down'" in str(err.value) and not re.search(r"action (code )?1\b", str(err.value))
    out = evaluate_all(thin, thin_proba, recommended, protocol, strict=False)
    usual = next(r for r in out["regimes"] if r["name"] == "usual_care")["estimates"]
    assert usual["fqe"]["value"] is None and usual["wdr"]["value"] is None and usual["dr"]["value"] is None
    assert usual["pdwis"]["value"] == pytest.approx(
        thin.groupby("episode_id", sort=False)["reward"].sum().mean(), abs=1e-9
    )


def test_the_regime_stage_names_an_action_missing_at_a_step_by_its_label(setting):
    decisions, _, protocol, _ = setting
    missing = (decisions["step"] == 2) & (decisions["action"] == "step_down")
    thin = decisions[~decisions["episode_id"].isin(decisions.loc[missing, "episode_id"])].reset_index(drop=True)
    with pytest.warns(StatisticalWarning, match="no decisions with") as caught:
        learn_regime(thin, protocol)
    message = " ".join(str(w.message) for w in caught if "no decisions with" in str(w.message))
    assert "step 2 action 'step_down'" in message and not re.search(r"action (code )?1\b", message), message


def test_a_zero_usual_care_probability_of_the_taken_action_is_named_by_its_label(setting):
    decisions, proba, protocol, _ = setting
    row = int(np.flatnonzero(decisions["action"].to_numpy() == "add_agent")[0])
    broken = proba.copy()
    broken[row, 3] = 0.0
    broken[row] /= broken[row].sum()
    recommended = np.zeros(len(decisions), dtype=np.int64)
    with pytest.raises(UserInputError, match="is 0") as err:
        evaluate_all(decisions, broken, recommended, protocol)
    message = str(err.value)
    assert "taken action 'add_agent'" in message and not re.search(r"action (code )?3\b", message), message


def test_the_evaluation_models_take_their_own_ridge_penalty_even_when_learning_chooses_it_by_cv(setting):
    # Wiring check: the fqe value is the one FittedQEvaluation gives with evaluation.fqe_ridge_alpha (whose
    # penalised fit is checked against scikit-learn's Ridge in test_fqi.py, fitted-Q evaluation test); a learning
    # protocol with
    # q_model.ridge_alpha = "cv" (a choice the evaluation models do not make) evaluates without error.
    decisions, proba, protocol, _ = setting
    cv = protocol.model_copy(update={"q_model": protocol.q_model.model_copy(update={"ridge_alpha": "cv"})})
    recommended = learn_regime(decisions, cv).recommend(decisions, proba)
    logged = LoggedDecisions.from_frame(decisions, proba, cv)
    target = np.eye(len(cv.actions))[recommended]
    first = logged.step == 0
    values = []
    for alpha in (0.0, 1.0, 50.0):
        spec = cv.evaluation.model_copy(update={"fqe_ridge_alpha": alpha})
        out = evaluate_all(decisions, proba, recommended, cv.model_copy(update={"evaluation": spec}))
        value = next(r for r in out["regimes"] if r["name"] == "learned")["estimates"]["fqe"]["value"]
        direct = FittedQEvaluation(len(cv.actions), cv.horizon, gamma=cv.discount, alpha=alpha).fit(
            logged.X, logged.step, logged.action, logged.reward, logged.episode, target
        )
        assert value == pytest.approx(direct.value_estimate(logged.X[first], target[first]), abs=1e-9)
        values.append(value)
    assert len(set(values)) == 3  # the penalty reaches the estimate


def test_strategies_are_evaluated_with_verdicts(setting):
    # source: the definitions of the verdicts (evaluation/verdicts.py) applied to the reported ESS and shares
    decisions, proba, protocol, _ = setting
    demo = load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol
    protocol = protocol.model_copy(update={"strategies": demo.strategies})
    learned = learn_regime(decisions, protocol)
    recommended, q = learned.recommend(decisions, proba), learned.q_values(decisions)
    with pytest.raises(UserInputError, match="cross-fitted Q-values"):
        evaluate_all(decisions, proba, recommended, protocol)
    values = evaluate_all(decisions, proba, recommended, protocol, learned_q=q)
    by_name = {r["name"]: r for r in values["regimes"]}
    floor = values["minimum_reliable_ess"]
    for name in ("partial_adoption_0.2", "override_gain_3", "incremental_odds_4"):
        r = by_name[name]
        assert 0.0 <= r["share_changed"] <= 1.0 and r["family"] in name
        for est, e in r["estimates"].items():
            expected = "supported" if e["ess"] >= floor and est != "fqe" else "model projection"
            if e["unsupported_share"] > protocol.evaluation.unidentified_share or e["ess"] < 1:
                expected = "not identified"
            assert e["verdict"] == expected, (name, est)
            if est == "fqe" and expected == "model projection":
                assert e["outcome_model_share"] == 1.0 and "rests entirely on the outcome model" in e["verdict_reason"]
    # usual care is the regime the records follow: there its fitted-Q value is supported like the others
    usual = by_name["usual_care"]["estimates"]
    assert {est: e["verdict"] for est, e in usual.items()} == dict.fromkeys(usual, "supported")
    # partial adoption moves away from usual care as its share grows: the effective sample shrinks
    ess = [by_name[f"partial_adoption_{e:g}"]["estimates"]["pdwis"]["ess"] for e in (0.2, 0.4, 0.6)]
    assert ess[0] > ess[1] > ess[2]
    assert {c["regime"] for c in values["contrasts"]} >= {"learned", "partial_adoption_0.4", "override_gain_2"}


@pytest.fixture(scope="module")
def with_strategies(setting):
    """The setting with the demo protocol's strategies: decisions, usual care, protocol, the learned regime's
    recommendations and Q-values."""
    decisions, proba, protocol, _ = setting
    demo = load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol
    protocol = protocol.model_copy(update={"strategies": demo.strategies})
    learned = learn_regime(decisions, protocol)
    return decisions, proba, protocol, learned.recommend(decisions, proba), learned.q_values(decisions)


def test_a_regimes_values_do_not_depend_on_how_many_regimes_share_its_pass(with_strategies, monkeypatch):
    # source: evaluate_policies solves each regime's least squares on its own (same design, same rows, same order),
    # so the passes a large study is cut into must give exactly the numbers of one pass (identity, no tolerance)
    decisions, proba, protocol, recommended, q = with_strategies
    side = {"hold_only": np.zeros(len(decisions), dtype=np.int64), "as_recommended": recommended}
    kwargs = {"learned_folds": crossfit_folds(decisions, protocol), "learned_q": q}
    assert values_module.regimes_per_pass(len(decisions)) > 20  # one pass here
    together = evaluate_all(decisions, proba, recommended, protocol, side, **kwargs)
    monkeypatch.setattr(values_module, "regimes_per_pass", lambda *shape: 1)  # one regime per pass
    apart = evaluate_all(decisions, proba, recommended, protocol, side, **kwargs)
    assert len(together["regimes"]) > 10 and len(together["side_by_side"]) == 2
    assert apart == together


def test_targets_built_by_rows_equal_the_whole_targets(with_strategies, monkeypatch):
    # source: regime_targets' (n, K) probabilities of every regime (one-hot for the deterministic ones, each
    # strategy built whole); the forms the evaluation keeps (action codes, a strategy built for the rows asked
    # for) give the same numbers bit for bit, whole (filled in blocks smaller than the table), at any rows, and
    # in the means over decisions of the shares computed a block at a time
    decisions, proba, protocol, recommended, q = with_strategies
    monkeypatch.setattr(values_module, "SHARE_ROWS", 1000)  # several blocks, the last one short
    assert len(decisions) % 1000
    whole = list(values_module.regime_targets(decisions, proba, recommended, protocol, q))
    by_rows = list(values_module.regime_targets(decisions, proba, recommended, protocol, q, by_rows=True))
    assert [t["name"] for t in whole] == [t["name"] for t in by_rows] and len(whole) > 10
    rows = np.random.default_rng(4).permutation(len(decisions))[:500]
    k = len(protocol.actions)
    for dense, kept in zip(whole, by_rows):
        assert np.array_equal(values_module.whole_target(kept["target"], proba), dense["target"]), dense["name"]
        assert np.array_equal(target_rows(kept["target"], rows, k), dense["target"][rows]), dense["name"]
        for by_row, share in (
            (changed_by_row, share_changed),
            (lambda t, b: unsupported_by_row(t, b, 0.05), lambda t, b: unsupported_share(t, b, 0.05)),
        ):
            assert values_module.row_mean(kept["target"], proba, by_row) == share(dense["target"], proba)


def test_the_number_of_passes_stops_growing_with_the_records():
    # the rule's purpose (no outside source): each pass repeats work in proportion to n, so above the memory
    # budget the regimes per pass must stay constant, or the stage's time would grow as n squared
    per_pass = [values_module.regimes_per_pass(n) for n in (120_000_000, 1_200_000_000, 12_000_000_000)]
    assert per_pass[0] == per_pass[1] == per_pass[2] >= 3
    # 1M episodes x 12: the learned regime and its 9 strategies of the demo protocol in one pass
    assert values_module.regimes_per_pass(12_000_000) >= 10
    assert values_module.regimes_per_pass(24_000) > 100  # a demo-sized study: every regime in one pass
    assert values_module.regimes_per_pass(10**12) >= 1  # never zero
