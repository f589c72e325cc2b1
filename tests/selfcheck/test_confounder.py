"""The look-alike world's hidden confounder (issue 19): the tilt of usual care within the marginal sensitivity model
(Tan 2006, JASA 101:1619) checked exactly, Γ = 1 leaving every byte as before, the confounder checked against an
independent importance-sampling computation with the true probabilities, the summary's shares against hand
arithmetic (Morris, White & Crowther 2019, Stat Med 38:2074, Table 6), the command's and the workflow stages'
bytes, and the refusals."""

import json
import math

import numpy as np
import pytest
from support.tiny import REPOSITORY, tiny_decisions, tiny_protocol_dict, write_tiny

from regimewise.cli import main
from regimewise.core.features import action_codes, episode_codes
from regimewise.data.records import clean_decisions
from regimewise.data.validate import validate_records
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import UserInputError
from regimewise.io import dumps_json, write_parquet
from regimewise.protocol import load_protocol
from regimewise.protocol.loading import ProtocolFile
from regimewise.protocol.model import Protocol
from regimewise.report.html import template_environment
from regimewise.selfcheck.cohort import run_cohort
from regimewise.selfcheck.fitcheck import episode_returns
from regimewise.selfcheck.page import _share_in_words
from regimewise.selfcheck.run import confounding_summary
from regimewise.selfcheck.world import CONFOUNDER_REWARD_SHIFT, LookAlikeWorld, tilted_probabilities
from regimewise.workflow.stages import selfcheck_cohort_stage, selfcheck_stage


def _odds(p):
    return p / (1.0 - p)


# ---------------------------------------------------------------------------------------------- the tilt
def test_tilt_by_hand():
    # Two actions at e = (0.5, 0.5), Γ = 3: scaling e = 0.5 by c gives the odds ratio c(1 − e)/(1 − ce), which is 3
    # at c = 1.5 (0.75 against 0.25: odds 3 against 1) and 1/3 at c = 0.5; both directions allow the mass 0.25.
    high, low = tilted_probabilities(np.array([[0.5, 0.5]]), 3.0)
    np.testing.assert_allclose(high, [[0.25, 0.75]], atol=1e-15)
    np.testing.assert_allclose(low, [[0.75, 0.25]], atol=1e-15)
    # Three actions (0.2, 0.5, 0.3), Γ = 2: the middle one keeps 0.5. Upper half {2}, e = 0.3: raising to the odds
    # ratio 2 takes c = 2/(0.7 + 0.6) = 2/1.3, lowering to 1/2 takes c = 1/(1.4 + 0.3) = 1/1.7; lower half {0},
    # e = 0.2: c = 2/1.2 and 1/1.8. The mass moved is the least of 0.3(2/1.3 − 1), 0.3(1 − 1/1.7), 0.2(2/1.2 − 1)
    # and 0.2(1 − 1/1.8) = 0.08889: 0.2(1 − 1/1.8) = 0.2 · 0.8/1.8 = 4/45, binding the lower action at U = 1.
    high, low = tilted_probabilities(np.array([[0.2, 0.5, 0.3]]), 2.0)
    delta = 4 / 45
    np.testing.assert_allclose(high, [[0.2 - delta, 0.5, 0.3 + delta]], atol=1e-15)
    np.testing.assert_allclose(low, [[0.2 + delta, 0.5, 0.3 - delta]], atol=1e-15)
    assert _odds(high[0, 0]) / _odds(0.2) == pytest.approx(0.5, rel=1e-12)


@pytest.mark.parametrize("k", [2, 3, 4, 6])
def test_tilt_averages_to_e_and_stays_within_gamma(k):
    # The marginal sensitivity model (Tan 2006): P(a|x,U) averaged over U ~ Bernoulli(½) is e(a|x) exactly, and the
    # odds ratio of P(a|x,U) against e(a|x) lies in [1/Γ, Γ] for every action; the tilt goes as far as Γ allows, so
    # the binding action of every row reaches Γ or 1/Γ.
    rng = np.random.default_rng(k)
    e = rng.dirichlet(np.full(k, 0.7), size=2000)
    gamma = 1.0 + rng.exponential(3.0)
    high, low = tilted_probabilities(e, gamma)
    np.testing.assert_allclose((high + low) / 2, e, rtol=0, atol=1e-12)
    np.testing.assert_allclose(high.sum(axis=1), 1.0, atol=1e-12)
    assert (high >= 0).all() and (low >= 0).all()
    # The odds ratio lies in [1/Γ, Γ] exactly when P lies in [e/(e + Γ(1 − e)), Γe/(Γe + 1 − e)]; on that scale the
    # check is free of the rounding that odds near e = 1 amplify.
    top, bottom = gamma * e / (gamma * e + 1 - e), e / (e + gamma * (1 - e))
    for tilted in (high, low):
        assert (tilted <= top + 1e-12).all() and (tilted >= bottom - 1e-12).all()
    moderate = np.tile((e > 0.01) & (e < 0.99), 2)
    ratios = np.concatenate([_odds(high) / _odds(e), _odds(low) / _odds(e)], axis=1)[moderate]
    assert (ratios <= gamma * (1 + 1e-12)).all() and (ratios >= (1 - 1e-12) / gamma).all()
    moved = np.abs(np.concatenate([top - e, e - bottom] * 2, axis=1)) > 1e-9
    gaps = np.abs(np.concatenate([high - top, low - bottom, low - top, high - bottom], axis=1))
    assert ((gaps <= 1e-12) & moved).any(axis=1).all()  # every row reaches Γ or 1/Γ for some action
    if k % 2:  # the middle action of an odd number keeps its probability
        np.testing.assert_array_equal(high[:, k // 2], e[:, k // 2])


def test_gamma_one_does_not_tilt_and_bad_gammas_are_refused():
    e = np.random.default_rng(0).dirichlet(np.ones(4), size=50)
    high, low = tilted_probabilities(e, 1.0)
    np.testing.assert_array_equal(high, e)
    np.testing.assert_array_equal(low, e)
    for bad in (0.5, math.nan, math.inf, True, "2"):
        with pytest.raises(UserInputError, match="hidden confounder's strength") as err:
            tilted_probabilities(e, bad)
        assert "\n" not in str(err.value)


# ---------------------------------------------------------------------------------------------- the world
def _tiny(n_episodes=300, seed=0, protocol=None):
    protocol = protocol or Protocol.model_validate(tiny_protocol_dict())
    pf = ProtocolFile(protocol=protocol, path=REPOSITORY / "config" / "protocol.yaml", sha256="0" * 64)
    return protocol, clean_decisions(pf, tiny_decisions(n_episodes, seed))


@pytest.fixture(scope="module")
def tiny_world():
    protocol, records = _tiny()
    return protocol, LookAlikeWorld.fit(records, protocol)


def test_gamma_one_changes_no_byte(tiny_world):
    protocol, world = tiny_world
    same = world.with_confounder(1.0)
    assert "hidden" not in same._draws(10, 1) and not same.confounded_steps().any()
    a, pa = world.simulate(200, seed=4)
    b, pb = same.simulate(200, seed=4)
    assert a.to_csv() == b.to_csv() and pa.tobytes() == pb.tobytes()
    hold = lambda frame: np.zeros(len(frame), dtype=np.int64)  # noqa: E731
    assert world.returns(hold, 300, 2).tobytes() == same.returns(hold, 300, 2).tobytes()
    small = protocol.model_copy(
        update={"evaluation": protocol.evaluation.model_copy(update={"estimators": ["wis", "wdr"]})}
    )
    plain = dumps_json(run_cohort(world, small, 1, replicates=20, truth_episodes=1000))
    assert plain == dumps_json(run_cohort(same, small, 1, replicates=20, truth_episodes=1000))
    assert "confounding" not in json.loads(plain)


def test_the_reward_shift_uses_the_hidden_stream(tiny_world):
    # Exact independent computation: every tiny episode has three decisions, and a regime that ignores usual care
    # meets the same states with or without the confounder (common random numbers), so its returns differ by
    # Σ_t κ·(2U_t − 1)·σ_t, with U from the seed's seventh child stream and σ_t the SD of step t's reward residuals.
    protocol, world = tiny_world
    confounded = world.with_confounder(2.5)
    hold = lambda frame: np.zeros(len(frame), dtype=np.int64)  # noqa: E731
    n, seed = 400, 12
    u = np.random.default_rng(np.random.SeedSequence(seed).spawn(7)[6]).random((n, 3)) < 0.5
    sd = np.array([np.std(step.reward_residuals, ddof=1) for step in world.steps])
    expected = CONFOUNDER_REWARD_SHIFT * ((2.0 * u - 1.0) * sd).sum(axis=1)
    np.testing.assert_allclose(confounded.returns(hold, n, seed) - world.returns(hold, n, seed), expected, atol=1e-12)


def test_only_the_named_decisions_are_confounded():
    protocol, records = _tiny()
    first_only = protocol.model_copy(
        update={"sensitivity": protocol.sensitivity.model_copy(update={"confounded_decisions": "first"})}
    )
    world = LookAlikeWorld.fit(records, first_only).with_confounder(4.0)
    np.testing.assert_array_equal(world.confounded_steps(), [True, False, False])
    simulated, proba = world.simulate(500, seed=3)
    marginal = world.usual_care.predict_proba(simulated)
    later = simulated["step"].to_numpy() > 0
    np.testing.assert_array_equal(proba[later], marginal[later])
    assert np.abs(proba[~later] - marginal[~later]).max() > 0.05


def test_true_probabilities_recover_the_truth_and_estimated_ones_do_not(tiny_world):
    # Importance sampling with the probabilities usual care really used, P(a|x,U), is unbiased for a fixed regime's
    # value (Precup, Sutton & Singh 2000); the Monte Carlo truth comes from the world's own rollout of the regime.
    # The estimate with the marginal e(a|x), all an analysis can see, is biased for a regime of the lower or upper
    # half: that is the confounder doing what it claims.
    protocol, world = tiny_world
    confounded = world.with_confounder(3.0)
    simulated, proba = confounded.simulate(20_000, seed=5)
    codes = action_codes(simulated, protocol.action_labels)
    episode = episode_codes(simulated)
    returns = np.bincount(episode, weights=simulated["reward"].to_numpy())
    marginal = confounded.usual_care.predict_proba(simulated)

    def importance_sampling(probabilities, code):
        factor = np.where(codes == code, 1.0 / probabilities[np.arange(len(codes)), codes], 0.0)
        weight = np.ones(returns.size)
        np.multiply.at(weight, episode, factor)
        terms = weight * returns
        return terms.mean(), terms.std(ddof=1) / math.sqrt(terms.size)

    for code in (0, 2):  # hold: the lower half; down: the upper half of the tiny protocol's three actions
        truth = confounded.returns(lambda frame, c=code: np.full(len(frame), c, dtype=np.int64), 100_000, seed=9)
        mcse = truth.std(ddof=1) / math.sqrt(truth.size)
        estimate, se = importance_sampling(proba, code)
        assert abs(estimate - truth.mean()) < 3 * math.hypot(se, mcse)
        naive, naive_se = importance_sampling(marginal, code)
        assert abs(naive - truth.mean()) > 5 * math.hypot(naive_se, mcse)


@pytest.fixture(scope="module")
def demo_world():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    records = clean_decisions(pf, simulate_cohort(2000, seed=31, confounding_strength=0.0).decisions)
    return pf.protocol, LookAlikeWorld.fit(records, pf.protocol)


def test_usual_care_truth_matches_its_cohorts_under_confounding(demo_world):
    # As without the confounder (tests/selfcheck/test_world.py): the world's usual-care truth equals the mean return
    # of its simulated cohorts within 3 Monte Carlo SEs. The tilt keeps usual care's marginal probabilities and the
    # reward shift averages zero, so the value also equals the unconfounded world's (independent draws, 3 MCSEs).
    protocol, world = demo_world
    confounded = world.with_confounder(3.0)
    means = np.array(
        [episode_returns(confounded.simulate(500, seed=100 + c)[0], protocol.discount).mean() for c in range(20)]
    )
    truth = confounded.returns("usual_care", 40_000, seed=7)
    mcse = np.sqrt(means.var(ddof=1) / means.size + truth.var(ddof=1) / truth.size)
    assert abs(means.mean() - truth.mean()) < 3 * mcse
    plain = world.returns("usual_care", 40_000, seed=8)
    assert abs(plain.mean() - truth.mean()) < 3 * math.hypot(plain.std(ddof=1), truth.std(ddof=1)) / math.sqrt(40_000)


# ---------------------------------------------------------------------------------------------- summary
def _entry(truth, bounds, interval):
    return {
        "confounding": {
            "gamma": 2.0,
            "strategy": "learned",
            "strategy_words": "the learned regime",
            "true_contrast": truth,
            "at_gamma": {"gamma": 2.0, "bounds": bounds, "interval": interval},
        }
    }


def test_confounding_summary_by_hand():
    # Truths 0.3, 0.3, 0.3, 0.3, -1.0. Bounds [0, 0.5] hold 0.3, [0.4, 0.6] do not, undefined bounds are left out,
    # [0.1, 0.3] hold it at the edge, [-2, -1.5] do not hold -1.0: 2 of 4, MCSE sqrt(0.5 · 0.5 / 4) = 0.25
    # (Morris et al. 2019 Table 6, coverage). Intervals: 3 of 5 hold the truth: 0.6, MCSE sqrt(0.6 · 0.4 / 5).
    results = [
        _entry(0.3, [0.0, 0.5], [-0.2, 0.7]),
        _entry(0.3, [0.4, 0.6], [0.2, 0.8]),
        _entry(0.3, [None, None], [0.31, 0.9]),
        _entry(0.3, [0.1, 0.3], [0.0, 0.5]),
        _entry(-1.0, [-2.0, -1.5], [-2.5, -1.2]),
    ]
    naive = {"coverage": 0.4, "coverage_mcse": 0.2191, "n_used": 5}
    out = confounding_summary(results, naive)
    assert out["truth_within_bounds"] == 0.5 and out["cohorts_with_bounds"] == 4
    assert out["truth_within_bounds_mcse"] == pytest.approx(0.25)
    assert out["truth_within_interval"] == pytest.approx(0.6) and out["cohorts_with_interval"] == 5
    assert out["truth_within_interval_mcse"] == pytest.approx(math.sqrt(0.6 * 0.4 / 5))
    assert (out["naive_coverage"], out["naive_coverage_mcse"], out["naive_cohorts"]) == (0.4, 0.2191, 5)
    assert out["mean_true_contrast"] == pytest.approx((4 * 0.3 - 1.0) / 5)
    assert (out["gamma"], out["cohorts"]) == (2.0, 5)


# ---------------------------------------------------------------------------------------------- the command
def _tiny_study(folder, gamma=None):
    protocol = tiny_protocol_dict()
    protocol["evaluation"] = {"estimators": ["wis", "wdr"]}
    if gamma is not None:
        protocol["selfcheck"] = {"cohorts": 3, "replicates": 20, "truth_episodes": 1000, "confounder_gamma": gamma}
    return write_tiny(folder, protocol=protocol, decisions=tiny_decisions(120, 1))


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    folder = tmp_path_factory.mktemp("confounded")
    path = _tiny_study(folder / "study", gamma=2.0)
    argv = ["selfcheck", str(path), "--out", str(folder / "out"), "--cores", "1"]
    assert main(argv) == 0
    return path, folder / "out", json.loads((folder / "out" / "selfcheck.json").read_text(encoding="utf-8"))


def test_the_summary_counts_the_cohorts_by_hand(finished):
    # Hand computation from the stored cohorts; MCSE sqrt(p(1 − p)/R) (Morris et al. 2019 Table 6).
    _, _, document = finished
    assert document["settings"]["confounder_gamma"] == 2.0
    c = document["summary"]["confounding"]
    entries = [cohort["confounding"] for cohort in document["cohorts"]]
    assert [e["strategy"] for e in entries] == ["learned"] * 3 and {e["gamma"] for e in entries} == {2.0}
    for e, cohort in zip(entries, document["cohorts"]):
        assert e["true_contrast"] == cohort["truths"]["learned"]["contrast"]
        low, high = e["at_gamma"]["bounds"]
        one_low, one_high = e["at_one"]["bounds"]
        assert one_low == pytest.approx(one_high) and low <= one_low and one_high <= high  # Γ = 1: a point
        assert e["at_gamma"]["interval"][0] <= low and high <= e["at_gamma"]["interval"][1]
    for key, limits in (("truth_within_bounds", "bounds"), ("truth_within_interval", "interval")):
        hits = [e["at_gamma"][limits][0] <= e["true_contrast"] <= e["at_gamma"][limits][1] for e in entries]
        p = sum(hits) / 3
        assert c[key] == pytest.approx(p)
        assert c[f"{key}_mcse"] == pytest.approx(math.sqrt(p * (1 - p) / 3))
    estimator = document["summary"]["estimator"]
    naive = [
        cohort["estimates"]["learned"][estimator]["contrast_interval"][0]
        <= cohort["truths"]["learned"]["contrast"]
        <= cohort["estimates"]["learned"][estimator]["contrast_interval"][1]
        for cohort in document["cohorts"]
    ]
    assert c["naive_coverage"] == pytest.approx(sum(naive) / 3) and c["naive_cohorts"] == 3


def test_the_page_and_the_report_say_it_in_words(finished):
    path, out, document = finished
    c = document["summary"]["confounding"]
    page = (out / "selfcheck.html").read_text(encoding="utf-8")
    expected = (
        "With a hidden confounder of strength Γ = 2 built into the look-alike world (one particular confounder within "
        "the sensitivity model, not the worst case it allows), the sensitivity bounds at Γ = 2 of the difference "
        "between the learned regime and usual care contained the true difference in "
        + _share_in_words(c["truth_within_bounds"], c["truth_within_bounds_mcse"], c["cohorts_with_bounds"])
    )
    assert expected in page and "usual-care model and no hidden confounding" not in page
    protocol = load_protocol(path).protocol
    section = template_environment(protocol).get_template("sections/selfcheck.html")
    html = section.render(selfcheck=document, p=protocol)
    assert "the sensitivity bounds at Γ = 2 of the difference between the learned regime and usual care" in html
    p, n = c["truth_within_interval"], c["cohorts_with_interval"]
    share = f"all {n} of {n}" if p == 1 else f"none of {n}" if p == 0 else f"{100 * p:.1f}% (MCSE"
    assert f"their bootstrap intervals in {share}" in html
    assert "not the worst case" in html and "model above and no hidden confounding" not in html
    plain = {**document, "summary": {k: v for k, v in document["summary"].items() if k != "confounding"}}
    assert "hidden confounder" not in section.render(selfcheck=plain, p=protocol)


def test_the_workflow_stages_write_the_commands_bytes(finished, tmp_path):
    # The workflow's stages read the protocol's selfcheck.confounder_gamma, as the command did.
    path, out, _ = finished
    pf = load_protocol(path)
    decisions, episodes = tmp_path / "decisions.parquet", tmp_path / "episodes.parquet"
    validated = validate_records(pf)
    write_parquet(decisions, validated.decisions)
    write_parquet(episodes, validated.episodes)
    cohorts = [tmp_path / f"cohort_{c}.json" for c in range(3)]
    for c, result in enumerate(cohorts):
        selfcheck_cohort_stage(str(path), str(decisions), str(episodes), c, str(result))
    pages = (tmp_path / "s.json", tmp_path / "s.html")
    selfcheck_stage(str(path), str(decisions), str(episodes), [str(c) for c in cohorts], *pages)
    assert (tmp_path / "s.json").read_bytes() == (out / "selfcheck.json").read_bytes()
    assert (tmp_path / "s.html").read_bytes() == (out / "selfcheck.html").read_bytes()


@pytest.mark.parametrize(
    ("value", "words"),
    [
        ("0.5", "greater than or equal to 1"),
        ("abc", "not a number"),
        ("nan", "finite"),
        ("6", "must not exceed sensitivity.gamma_max (5)"),
    ],
)
def test_bad_confounder_gammas_are_refused_in_one_line(tmp_path, capsys, value, words):
    path = _tiny_study(tmp_path / "study")
    argv = ["selfcheck", str(path), "--cohorts", "2", "--confounder-gamma", value, "--out", str(tmp_path / "out")]
    assert main(argv) == 1
    err = capsys.readouterr().err.strip()
    assert "confounder_gamma" in err and "--confounder-gamma" in err and words in err and "\n" not in err
    assert not (tmp_path / "out").exists()


def test_a_protocol_confounder_above_gamma_max_is_refused(tmp_path, capsys):
    path = _tiny_study(tmp_path / "study", gamma=7.5)
    assert main(["check", str(path)]) == 1
    err = capsys.readouterr().err.strip()
    assert "selfcheck.confounder_gamma must not exceed sensitivity.gamma_max (5)" in err and "\n" not in err


def test_a_share_of_cohorts_in_words():
    # MCSE of a coverage √(p(1 − p)/R) (Morris, White & Crowther 2019, Table 6): 0.8 of 50 gives 5.66 points; at
    # p = 0 or 1 it is 0, which says nothing, so the words give the count instead.
    assert _share_in_words(0.8, math.sqrt(0.8 * 0.2 / 50), 50) == "80.0% (Monte Carlo SE 5.7 points) of 50"
    assert _share_in_words(1.0, 0.0, 50) == "all 50 of 50"
    assert _share_in_words(0.0, 0.0, 7) == "none of 7"
    assert _share_in_words(None, None, 0) == "— of the"
