"""Tests of the invented Harbourline demo simulator (regimewise.demo.simulate).

External yardsticks: the binomial / Poisson-binomial standard error of a count, the Monte Carlo central
limit theorem (two independent estimates of one expectation agree within a few standard errors), the
exponential-rate maximum-likelihood estimate with its Poisson standard error, and the scenario's documented
equations (synthetic_cohort/README.md) recomputed here independently of the module's code.
"""

import filecmp
import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from regimewise import cli
from regimewise.demo.files import write_cohort
from regimewise.demo.scenario import ACTIONS, STATE_RANGES, STATES, ScenarioParams
from regimewise.demo.simulate import simulate_cohort
from regimewise.demo.truth import always, induced_gamma, true_returns, true_value
from regimewise.demo.usual_care import usual_care_probabilities
from regimewise.errors import UserInputError

REPO = Path(__file__).resolve().parents[2]
COMMITTED = REPO / "synthetic_cohort"
DECISION_COLUMNS = ["episode_id", "patient_id", "step", "day", *STATES, "action", "reward"]
EPISODE_COLUMNS = ["episode_id", "patient_id", "age_at_index", "female", "diabetes", "followup_days", "event"]


@pytest.fixture(scope="module")
def large_cohort():
    """One large usual-care cohort shared by the statistical checks."""
    return simulate_cohort(30_000, seed=202)


def sensible_regime(states):
    """Step up when pressure is above 140 mmHg and potassium below 5.0 mmol/L, hold otherwise."""
    return np.where((states["sbp"] > 140) & (states["potassium"] < 5.0), ACTIONS.index("step_up"), 0)


def threshold_regime(threshold):
    """Step up above ``threshold`` mmHg, hold otherwise (two nearby thresholds make two similar regimes)."""
    return lambda states: np.where(states["sbp"] > threshold, "step_up", "hold")


def episode_returns(decisions, gamma=1.0):
    """Discounted return per episode, computed from the decisions table."""
    weighted = decisions["reward"] * gamma ** decisions["step"]
    return weighted.groupby(decisions["episode_id"], sort=True).sum()


def cluster_se(values, clusters):
    """Standard error of a mean with patients as independent clusters (sandwich form)."""
    centred = pd.Series(values - values.mean()).groupby(np.asarray(clusters)).sum()
    g = centred.size
    return float(np.sqrt(g / (g - 1) * np.sum(centred**2)) / values.size)


# --- reproducibility -------------------------------------------------------------------------------


def test_same_seed_gives_identical_tables():
    a, b = simulate_cohort(400, seed=7), simulate_cohort(400, seed=7)
    pd.testing.assert_frame_equal(a.decisions, b.decisions)
    pd.testing.assert_frame_equal(a.episodes, b.episodes)
    np.testing.assert_array_equal(a.behaviour_proba, b.behaviour_proba)
    assert not a.decisions.equals(simulate_cohort(400, seed=8).decisions)


def test_write_cohort_twice_gives_identical_bytes(tmp_path):
    first = write_cohort(tmp_path / "one", n_episodes=300, seed=5, n_truth=2_000)
    second = write_cohort(tmp_path / "two", n_episodes=300, seed=5, n_truth=2_000)
    for name, path in first.items():
        assert path.read_bytes() == second[name].read_bytes(), name
        assert b"\r" not in path.read_bytes()


def test_committed_cohort_is_regenerated_byte_for_byte(tmp_path):
    # The command documented in synthetic_cohort/README.md, run through the package's command line.
    assert (
        cli.main(["simulate", "--out", str(tmp_path), "--episodes", "3000", "--seed", "20261201", "--strength", "1.0"])
        == 0
    )
    for name in ("decisions.csv", "episodes.csv", "truth.json"):
        assert filecmp.cmp(tmp_path / name, COMMITTED / name, shallow=False), name


# --- data contract -----------------------------------------------------------------------------------


def check_contract(decisions, episodes):
    """The data contract of DESIGN.md for the demo tables."""
    assert list(decisions.columns) == DECISION_COLUMNS
    assert list(episodes.columns) == EPISODE_COLUMNS
    assert not decisions.isna().any().any() and not episodes.isna().any().any()
    assert decisions["episode_id"].str.fullmatch(r"E\d{5,}").all()
    assert decisions["patient_id"].str.fullmatch(r"P\d{5,}").all()
    by_episode = decisions.groupby("episode_id", sort=False)
    assert by_episode["step"].apply(lambda steps: list(steps) == list(range(8))).all()
    assert (by_episode["day"].diff().dropna() >= 0).all()
    assert decisions.loc[decisions["step"] == 0, "day"].between(0, 7).all()
    for name, (low, high) in STATE_RANGES.items():
        assert decisions[name].between(low, high).all(), name
    assert decisions["age"].max() <= 89 and episodes["age_at_index"].max() <= 89
    assert set(decisions["action"]) <= set(ACTIONS)
    assert episodes["episode_id"].is_unique
    assert set(episodes["event"]) <= {0, 1}
    last_day = by_episode["day"].max().reindex(episodes["episode_id"]).to_numpy()
    censored = episodes["event"].to_numpy() == 0
    assert (episodes["followup_days"].to_numpy()[censored] >= last_day[censored]).all()
    assert (episodes["followup_days"] >= 1).all()
    # fixed covariates agree between the tables, and a patient's episodes share sex and diabetes
    first = decisions[decisions["step"] == 0].set_index("episode_id")
    merged = episodes.set_index("episode_id")
    assert (first["age"] == merged["age_at_index"]).all()
    assert (first[["female", "diabetes"]] == merged[["female", "diabetes"]]).all().all()
    assert (episodes.groupby("patient_id")[["female", "diabetes"]].nunique() == 1).all().all()


def test_simulated_tables_keep_the_data_contract(large_cohort):
    check_contract(large_cohort.decisions, large_cohort.episodes)
    repeats = large_cohort.episodes["patient_id"].value_counts()
    assert set(repeats) == {1, 2}
    # about 10 % of patients have two episodes (repeat_share); binomial 4-SE band (binomial standard error)
    share, n_patients = (repeats == 2).mean(), repeats.size
    assert abs(share - 0.10) < 4 * np.sqrt(0.10 * 0.90 / n_patients)


def test_committed_files_keep_the_data_contract():
    decisions = pd.read_csv(COMMITTED / "decisions.csv")
    episodes = pd.read_csv(COMMITTED / "episodes.csv")
    check_contract(decisions, episodes)
    truth = json.loads((COMMITTED / "truth.json").read_text())
    assert truth["n_episodes"] == episodes.shape[0] == 3000 and truth["seed"] == 20261201
    assert set(truth["true_values"]) == {"usual_care", *(f"always_{a}" for a in ACTIONS)}


# --- usual care ----------------------------------------------------------------------------------------


def test_usual_care_probabilities_are_valid(large_cohort):
    proba, decisions = large_cohort.behaviour_proba, large_cohort.decisions
    assert proba.shape == (len(decisions), len(ACTIONS))
    np.testing.assert_allclose(proba.sum(axis=1), 1.0, atol=1e-12)
    level0 = decisions["therapy_level"].to_numpy() == 0
    assert level0.any() and np.all(proba[level0, ACTIONS.index("step_down")] == 0.0)
    assert not (decisions.loc[level0, "action"] == "step_down").any()
    permitted = np.ones_like(proba, dtype=bool)
    permitted[level0, ACTIONS.index("step_down")] = False
    assert proba[permitted].min() >= 0.02 - 1e-12


def test_recorded_probabilities_equal_the_public_function(large_cohort):
    decisions = large_cohort.decisions
    frailty = np.repeat(large_cohort.frailty, 8)
    recomputed = usual_care_probabilities(decisions, frailty, 1.0)
    np.testing.assert_allclose(large_cohort.behaviour_proba, recomputed, rtol=0, atol=1e-12)


def test_action_frequencies_match_the_true_probabilities(large_cohort):
    # Each decision's action is a draw with known probability p_i, so the count of an action has mean
    # sum p_i and variance sum p_i (1 - p_i) (binomial / Poisson-binomial standard error); allow 4 SE.
    proba, actions = large_cohort.behaviour_proba, large_cohort.decisions["action"].to_numpy()
    level = large_cohort.decisions["therapy_level"].to_numpy()
    for rows in (np.ones(level.size, dtype=bool), level == 0, level == 4):
        for code, label in enumerate(ACTIONS):
            p = proba[rows, code]
            observed = np.sum(actions[rows] == label)
            se = np.sqrt(np.sum(p * (1 - p)))
            assert abs(observed - p.sum()) <= 4 * se + 1e-9, (label, observed, p.sum(), se)


def test_strength_zero_removes_frailty_from_usual_care(large_cohort):
    states = large_cohort.decisions
    rng = np.random.default_rng(1)
    u1, u2 = rng.standard_normal(len(states)), rng.standard_normal(len(states))
    np.testing.assert_array_equal(usual_care_probabilities(states, u1, 0.0), usual_care_probabilities(states, u2, 0.0))
    assert not np.allclose(usual_care_probabilities(states, u1, 1.0), usual_care_probabilities(states, u2, 1.0))


def documented_probabilities(row, u, p):
    """Usual care for one decision, re-derived from the equations in synthetic_cohort/README.md with
    scipy.special.softmax (an implementation independent of the simulator's vectorised code)."""
    from scipy.special import softmax

    eta = {
        "hold": 0.0,
        "step_down": p.down_intercept
        + p.down_sbp * (120 - row.sbp) / 10
        + p.down_potassium * max(0, row.potassium - 5)
        + p.down_age * (row.age - 65) / 10
        + p.down_frailty * u,
        "step_up": p.up_intercept
        + p.up_sbp * (row.sbp - 140) / 10
        + p.up_adherence * (row.adherence - 0.7)
        - p.up_potassium * max(0, row.potassium - 4.8)
        - p.up_level * row.therapy_level
        - p.up_frailty * u,
        "add_agent": p.add_intercept
        + p.add_sbp * (row.sbp - 150) / 10
        + p.add_egfr * (row.egfr - 60) / 10
        - p.add_potassium * max(0, row.potassium - 4.5)
        + p.add_diabetes * row.diabetes
        - p.add_frailty * u,
    }
    allowed = [a for a in ACTIONS if a != "step_down" or row.therapy_level > 0]
    mixed = (1 - len(allowed) * p.proba_floor) * softmax([eta[a] for a in allowed]) + p.proba_floor
    return dict(zip(allowed, mixed))


def test_induced_gamma_is_the_largest_odds_ratio_of_the_documented_usual_care():
    cohort = simulate_cohort(60, seed=4, confounding_strength=1.5)
    frailty = np.repeat(cohort.frailty, 8)  # 8 decisions per episode, episode-major
    ratios = []
    for row, u in zip(cohort.decisions.itertuples(), frailty):
        with_u, without_u = (
            documented_probabilities(row, 1.5 * u, cohort.params),
            documented_probabilities(row, 0.0, cohort.params),
        )
        for a in with_u:
            ratio = (with_u[a] / (1 - with_u[a])) / (without_u[a] / (1 - without_u[a]))
            ratios.append(max(ratio, 1 / ratio))
    found = induced_gamma(cohort)
    assert found.maximum == pytest.approx(max(ratios), rel=1e-10)
    assert found.q99 == pytest.approx(np.quantile(ratios, 0.99), rel=1e-10)
    assert induced_gamma(simulate_cohort(60, seed=4, confounding_strength=0.0)).maximum == 1.0
    assert induced_gamma(simulate_cohort(60, seed=4, confounding_strength=3.0)).maximum > found.maximum


def test_strength_zero_removes_frailty_from_outcomes():
    # With s = 0 the frailty coefficients vanish; making them 0 outright must give the same returns.
    zeroed = replace(
        ScenarioParams(),
        egfr_hit_frailty=0.0,
        fall_frailty=0.0,
        down_frailty=0.0,
        up_frailty=0.0,
        add_frailty=0.0,
        hazard_frailty=0.0,
    )
    a = simulate_cohort(2_000, seed=9, confounding_strength=0.0)
    b = simulate_cohort(2_000, seed=9, confounding_strength=1.0, params=zeroed)
    pd.testing.assert_frame_equal(a.decisions, b.decisions)
    pd.testing.assert_frame_equal(a.episodes, b.episodes)


# --- true values -----------------------------------------------------------------------------------------


def test_usual_care_returns_equal_the_cohort_returns():
    cohort = simulate_cohort(1_000, seed=31)
    for gamma in (1.0, 0.9):
        expected = episode_returns(cohort.decisions, gamma).to_numpy()
        np.testing.assert_allclose(
            true_returns("usual_care", n=1_000, seed=31, gamma=gamma), expected, rtol=0, atol=1e-9
        )


def test_common_random_numbers_shrink_the_paired_standard_error():
    a = true_returns(threshold_regime(140), n=20_000, seed=11)
    b = true_returns(threshold_regime(145), n=20_000, seed=11)
    b_other = true_returns(threshold_regime(145), n=20_000, seed=12)
    paired_se = np.std(a - b, ddof=1) / np.sqrt(a.size)
    unpaired_se = np.sqrt((np.var(a, ddof=1) + np.var(b_other, ddof=1)) / a.size)
    assert paired_se < 0.25 * unpaired_se
    np.testing.assert_array_equal(a, true_returns(threshold_regime(140), n=20_000, seed=11))


def test_true_value_of_usual_care_matches_an_independent_cohort(large_cohort):
    # Two independent Monte Carlo estimates of the same expectation: their difference is within
    # 4 combined standard errors (central limit theorem; patients as clusters).
    truth = true_value("usual_care", n=50_000, seed=101)
    returns = episode_returns(large_cohort.decisions)
    patients = large_cohort.episodes.set_index("episode_id").loc[returns.index, "patient_id"]
    observed_se = cluster_se(returns.to_numpy(), patients.to_numpy())
    assert truth.n == 50_000 and truth.se > 0
    assert abs(truth.value - returns.mean()) < 4 * np.hypot(truth.se, observed_se)


def test_true_value_se_is_sd_over_root_n_without_repeat_patients():
    params = replace(ScenarioParams(), repeat_share=0.0)
    returns = true_returns(always("hold"), n=3_000, seed=4, params=params)
    value = true_value(always("hold"), n=3_000, seed=4, params=params)
    assert value.value == pytest.approx(returns.mean())
    assert value.se == pytest.approx(np.std(returns, ddof=1) / np.sqrt(returns.size), rel=1e-12)


def test_a_sensible_regime_beats_usual_care_clearly():
    sensible = true_returns(sensible_regime, n=20_000, seed=21)
    usual = true_returns("usual_care", n=20_000, seed=21)
    difference = sensible - usual
    paired_se = np.std(difference, ddof=1) / np.sqrt(difference.size)
    assert difference.mean() > 3 * paired_se


# --- the documented equations -------------------------------------------------------------------------


def test_quarterly_transitions_follow_the_documented_equations():
    # Noise switched off and s = 0: each next state must equal the README's equation, recomputed here,
    # up to one unit of the recorded rounding.
    quiet = replace(
        ScenarioParams(), sbp_noise_sd=0.0, egfr_noise_sd=0.0, potassium_noise_sd=0.0, adherence_noise_sd=0.0
    )
    d = simulate_cohort(2_000, seed=41, confounding_strength=0.0, params=quiet).decisions
    now, nxt = d[d["step"] < 7].reset_index(drop=True), d[d["step"] > 0].reset_index(drop=True)
    change = now["action"].map({"hold": 0, "step_down": -1, "step_up": 1, "add_agent": 1})
    level = (now["therapy_level"] + change).clip(0, 4)
    moved = level != now["therapy_level"]
    action = now["action"].where(moved, "hold")
    effect = action.map({"hold": 0.0, "step_down": 8.0, "step_up": -10.0, "add_agent": -16.0})
    sbp = (now["sbp"] + 2.0 + effect * (0.4 + 0.6 * now["adherence"])).clip(70, 250)
    hit = action.map({"hold": 0.0, "step_down": 0.0, "step_up": 0.03, "add_agent": 0.10})
    egfr = np.exp(np.log(now["egfr"]) - 0.01 - 0.01 * now["diabetes"] - hit).clip(5, 150)
    k_target = 4.3 + 0.15 * np.maximum(0.0, 60.0 - nxt["egfr"]) / 10.0
    potassium = now["potassium"] + 0.4 * (k_target - now["potassium"]) + 0.45 * (action == "add_agent")
    adherence = (now["adherence"] + 0.3 * (0.75 - now["adherence"]) - 0.03 * (action == "add_agent")).clip(0, 1)
    np.testing.assert_array_equal(nxt["therapy_level"], level)
    np.testing.assert_allclose(nxt["sbp"], sbp, atol=0.1 + 1e-9, rtol=0)
    np.testing.assert_allclose(nxt["egfr"], egfr, atol=0.1 + 1e-9, rtol=0)
    np.testing.assert_allclose(nxt["potassium"], potassium.clip(2.0, 7.5), atol=0.01 + 1e-9, rtol=0)
    np.testing.assert_allclose(nxt["adherence"], adherence, atol=0.01 + 1e-9, rtol=0)
    # reward of the quarter where no fall is possible (sbp' >= 120)
    aki = nxt["egfr"] < 0.8 * now["egfr"]
    reward = -np.abs(nxt["sbp"] - 130) / 10 - 2.0 * (nxt["potassium"] > 5.5) - 3.0 * aki
    safe = (nxt["sbp"] >= 120).to_numpy()
    np.testing.assert_allclose(now["reward"][safe], reward[safe], atol=1e-3 + 1e-9, rtol=0)


def test_event_rate_matches_a_constant_hazard():
    # With every hazard covariate switched off the hazard is constant, so the exponential-rate MLE
    # events / person-time must lie within 4 Poisson standard errors (sqrt(D) / T) of it
    # (exponential likelihood; Kalbfleisch & Prentice 2002, ch. 3, chapter from memory).
    flat = replace(
        ScenarioParams(),
        hazard_base=0.3,
        hazard_sbp=0.0,
        hazard_age=0.0,
        hazard_diabetes=0.0,
        hazard_egfr=0.0,
        hazard_frailty=0.0,
    )
    episodes = simulate_cohort(10_000, seed=51, params=flat).episodes
    events, years = episodes["event"].sum(), episodes["followup_days"].sum() / 365.25
    assert abs(events / years - 0.3) < 4 * np.sqrt(events) / years


# --- user errors ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "call",
    [
        lambda: simulate_cohort(0, seed=1),
        lambda: simulate_cohort(10, seed=1, confounding_strength=-1.0),
        lambda: true_returns("best_guess", n=10),
        lambda: true_returns(lambda s: np.full(len(s), 7), n=10),
        lambda: true_returns(lambda s: np.full(len(s), "stop"), n=10),
        lambda: true_returns(lambda s: np.zeros(3, dtype=int), n=10),
        lambda: true_returns(always("hold"), n=10, gamma=0.0),
        lambda: always("discharge"),
    ],
)
def test_user_errors_are_refused_with_a_clear_message(call):
    with pytest.raises(UserInputError):
        call()


def test_command_line_reports_a_bad_argument(tmp_path, capsys):
    assert cli.main(["simulate", "--out", str(tmp_path), "--episodes", "0"]) == 1
    assert capsys.readouterr().err.startswith("regimewise error: --episodes must be at least 1")


def test_horizon_option_keeps_the_demo_draws_and_extends_episodes():
    # exact computation: the default horizon must reproduce the demo's 8-step draws; 12 steps keep the same
    # population (the population stream is drawn before the per-step noise) and give 12 consecutive steps
    demo = simulate_cohort(50, seed=3)
    pd.testing.assert_frame_equal(demo.decisions, simulate_cohort(50, seed=3, n_steps=8).decisions)
    longer = simulate_cohort(50, seed=3, n_steps=12)
    assert len(longer.decisions) == 50 * 12
    assert longer.decisions.groupby("episode_id")["step"].apply(list).map(lambda s: s == list(range(12))).all()
    first = ["episode_id", "patient_id", *STATES]
    pd.testing.assert_frame_equal(
        demo.decisions.loc[demo.decisions["step"] == 0, first].reset_index(drop=True),
        longer.decisions.loc[longer.decisions["step"] == 0, first].reset_index(drop=True),
    )
    assert longer.behaviour_proba.shape == (600, len(ACTIONS))
    assert (longer.decisions.groupby("episode_id")["day"].diff().dropna() > 0).all()


@pytest.mark.parametrize("bad", [0, -1, 1.5, True, 201])
def test_a_bad_horizon_is_refused_in_one_line(bad):
    with pytest.raises(UserInputError, match="number of decision points"):
        simulate_cohort(10, seed=1, n_steps=bad)
