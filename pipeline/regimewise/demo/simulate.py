"""Simulating a cohort of the invented Harbourline scenario: population, visits, usual care's choices with the
hidden frailty, transitions, rewards, follow-up and events (every equation in :mod:`regimewise.demo.scenario`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import expit

from regimewise.demo.scenario import (
    ACTIONS,
    ADD_AGENT,
    DAYS_PER_YEAR,
    DECIMALS,
    DECISION_COLUMNS,
    EPISODE_COLUMNS,
    HOLD,
    LEVEL_CHANGE,
    MAX_LEVEL,
    N_STEPS,
    STATE_RANGES,
    STATES,
    ScenarioParams,
)
from regimewise.demo.usual_care import usual_care_probabilities
from regimewise.errors import UserInputError

"""Action labels; an action's code is its index in this tuple."""


"""State columns of the decisions table, in order."""


"""Plausible range (low, high) of each state: mmHg, mL/min/1.73m2, mmol/L, years (never above 89), 0/1, 0/1,
share of doses taken, number of intensity steps."""


"""Decision points per episode (quarterly reviews over two years)."""


@dataclass(frozen=True, eq=False)
class SimulatedCohort:
    """A simulated demo cohort under usual care.

    Attributes
    ----------
    decisions : DataFrame with columns :data:`DECISION_COLUMNS`, one row per decision, episode-major.
    episodes : DataFrame with columns :data:`EPISODE_COLUMNS`, one row per episode.
    behaviour_proba : ndarray (n_decisions, 4), true usual-care probability of each action, rows aligned
        with ``decisions``.
    frailty : ndarray (n_episodes,), the hidden frailty of each episode's patient (never in the tables).
    confounding_strength : the strength s used.
    params : the scenario coefficients used.
    """

    decisions: pd.DataFrame
    episodes: pd.DataFrame
    behaviour_proba: np.ndarray
    frailty: np.ndarray
    confounding_strength: float
    params: ScenarioParams = field(repr=False)


@dataclass(frozen=True, eq=False)
class _Population:
    """Baseline of each episode: patient index, hidden frailty and the step-0 state."""

    patient: np.ndarray
    frailty: np.ndarray
    state: dict


@dataclass(frozen=True, eq=False)
class _Noise:
    """Action-independent draws, each (n, n_steps): standard normals and uniforms."""

    sbp: np.ndarray
    egfr: np.ndarray
    potassium: np.ndarray
    adherence: np.ndarray
    fall: np.ndarray
    behaviour: np.ndarray


@dataclass(frozen=True, eq=False)
class _Trajectory:
    """States at steps 0..n_steps (the last is the end state), actions, rewards, usual-care probabilities."""

    states: dict
    actions: np.ndarray
    rewards: np.ndarray
    proba: np.ndarray | None


def _streams(seed):
    """Independent generators for each source of randomness, spawned from one root seed."""
    names = ("population", "transition", "behaviour", "visits", "followup")
    children = np.random.SeedSequence(seed).spawn(len(names))
    return {name: np.random.default_rng(child) for name, child in zip(names, children)}


def _round_state(name, values):
    """Clip a state to its plausible range and round it as recorded."""
    low, high = STATE_RANGES[name]
    return np.round(np.clip(values, low, high), DECIMALS[name])


def _patients(n, rng, p):
    """Patient index of each of ``n`` episodes: each patient has a second episode with ``repeat_share``."""
    counts = 1 + (rng.random(n) < p.repeat_share)
    patient = np.repeat(np.arange(n), counts)[:n]
    first = np.r_[True, patient[1:] != patient[:-1]]
    return patient, first


def _draw_population(n, rng, p):
    """Draw ``n`` episodes' baseline: patient-level sex, diabetes, frailty and age, episode-level state.

    A second episode of a patient shares sex, diabetes and frailty; its age is the first age plus
    ``repeat_gap_years`` (at most 89); its other baseline values are drawn afresh.
    """
    patient, first = _patients(n, rng, p)
    frailty = rng.standard_normal(n)[patient]
    female = (rng.random(n) < p.female_share).astype(np.int64)[patient]
    age_first = np.clip(np.round(rng.normal(p.age_mean, p.age_sd, n)), 30, 89).astype(np.int64)
    diabetes_p = expit(p.diabetes_intercept + p.diabetes_age * (age_first - 63.0) / 10.0)
    diabetes = (rng.random(n) < diabetes_p).astype(np.int64)[patient]
    age = np.where(first, age_first[patient], np.minimum(age_first[patient] + p.repeat_gap_years, 89))
    sbp = np.clip(rng.normal(p.sbp0_mean, p.sbp0_sd, n), p.sbp0_low, p.sbp0_high)
    egfr_mean = p.egfr0_mean + p.egfr0_age * (age - 63.0) / 10.0 + p.egfr0_diabetes * diabetes
    egfr = np.clip(rng.normal(egfr_mean, p.egfr0_sd), p.egfr0_low, p.egfr0_high)
    k_mean = p.potassium0_mean + p.potassium0_renal * np.maximum(0.0, 60.0 - egfr) / 10.0
    potassium = np.clip(rng.normal(k_mean, p.potassium0_sd), p.potassium0_low, p.potassium0_high)
    adherence = rng.beta(p.adherence0_a, p.adherence0_b, n)
    level = rng.choice(MAX_LEVEL + 1, size=n, p=np.asarray(p.level0_proba))
    state = {
        "sbp": _round_state("sbp", sbp),
        "egfr": _round_state("egfr", egfr),
        "potassium": _round_state("potassium", potassium),
        "age": age.astype(np.int64),
        "female": female,
        "diabetes": diabetes,
        "adherence": _round_state("adherence", adherence),
        "therapy_level": level.astype(np.int64),
    }
    return _Population(patient=patient, frailty=frailty, state=state)


def _draw_noise(n, n_steps, transition_rng, behaviour_rng):
    """Draw every quarter's noise up front, so it does not depend on the actions taken."""
    shape = (n, n_steps)
    normals = {name: transition_rng.standard_normal(shape) for name in ("sbp", "egfr", "potassium", "adherence")}
    return _Noise(fall=transition_rng.random(shape), behaviour=behaviour_rng.random(shape), **normals)


def _draw_actions(proba, uniforms):
    """Inverse-CDF draw of one action per row: the first action whose cumulative probability exceeds u."""
    cumulative = np.cumsum(proba, axis=1)
    return np.minimum((uniforms[:, None] >= cumulative).sum(axis=1), len(ACTIONS) - 1)


def _transition(state, action, noise, t, frailty, strength, p):
    """Next quarter's state and the adverse events of the quarter (see the module docstring)."""
    level = state["therapy_level"]
    new_level = np.clip(level + LEVEL_CHANGE[action], 0, MAX_LEVEL)
    effective = np.where(new_level != level, action, HOLD)
    is_add = effective == ADD_AGENT
    response = p.sbp_response_floor + (1.0 - p.sbp_response_floor) * state["adherence"]
    sbp = state["sbp"] + p.sbp_drift + np.asarray(p.sbp_effect)[effective] * response
    sbp = _round_state("sbp", sbp + p.sbp_noise_sd * noise.sbp[:, t])
    hit = np.asarray(p.egfr_hit)[effective] * np.exp(strength * p.egfr_hit_frailty * frailty)
    log_egfr = (
        np.log(state["egfr"])
        - p.egfr_decline
        - p.egfr_decline_diabetes * state["diabetes"]
        - hit
        + p.egfr_noise_sd * noise.egfr[:, t]
    )
    egfr = _round_state("egfr", np.exp(log_egfr))
    k_target = p.potassium_mean + p.potassium_renal * np.maximum(0.0, 60.0 - egfr) / 10.0
    potassium = (
        state["potassium"]
        + p.potassium_reversion * (k_target - state["potassium"])
        + p.potassium_add * is_add
        + p.potassium_noise_sd * noise.potassium[:, t]
    )
    adherence = (
        state["adherence"]
        + p.adherence_reversion * (p.adherence_mean - state["adherence"])
        - p.adherence_add * is_add
        + p.adherence_noise_sd * noise.adherence[:, t]
    )
    fall_logit = (
        p.fall_intercept
        + p.fall_low * (p.fall_sbp - sbp) / 10.0
        + p.fall_age * (state["age"] - 65.0) / 10.0
        + strength * p.fall_frailty * frailty
    )
    nxt = dict(
        state,
        sbp=sbp,
        egfr=egfr,
        potassium=_round_state("potassium", potassium),
        adherence=_round_state("adherence", adherence),
        therapy_level=new_level,
    )
    events = {
        "fall": (sbp < p.fall_sbp) & (noise.fall[:, t] < expit(fall_logit)),
        "hyperkalaemia": nxt["potassium"] > p.hyperkalaemia,
        "aki": egfr < (1.0 - p.aki_drop) * state["egfr"],
    }
    return nxt, events


def _reward(next_state, events, p):
    """Quarterly reward: distance from target pressure and penalties for adverse events, 3 decimals."""
    reward = (
        -np.abs(next_state["sbp"] - p.target_sbp) / p.sbp_scale
        - p.fall_penalty * events["fall"]
        - p.hyperkalaemia_penalty * events["hyperkalaemia"]
        - p.aki_penalty * events["aki"]
    )
    return np.round(reward, 3) + 0.0  # + 0.0 turns -0.0 into 0.0


def _regime_codes(output, n, step):
    """Action codes from a regime's output (codes or labels), checked."""
    values = np.asarray(output)
    where = f"regime output at step {step}"
    if values.shape != (n,):
        raise UserInputError(f"{where}: expected {n} actions (one per row), got shape {values.shape}")
    if values.dtype.kind in "OUS":
        lookup = {label: code for code, label in enumerate(ACTIONS)}
        unknown = sorted({str(v) for v in values} - set(lookup))
        if unknown:
            raise UserInputError(f"{where}: unknown action labels {unknown[:5]}; use one of {ACTIONS}")
        return np.array([lookup[v] for v in values], dtype=np.int64)
    if values.dtype.kind not in "iuf" or not np.all(np.isin(values, np.arange(len(ACTIONS)))):
        raise UserInputError(f"{where}: action codes must be integers 0..{len(ACTIONS) - 1} ({ACTIONS})")
    return values.astype(np.int64)


def _usual_care_chooser(frailty, noise, strength, p):
    """Choose actions by usual care: true probabilities and a draw from usual care's own uniforms."""

    def choose(t, state):
        proba = usual_care_probabilities(state, frailty, strength, p)
        return _draw_actions(proba, noise.behaviour[:, t]), proba

    return choose


def _regime_chooser(regime):
    """Choose actions by a user regime: it sees a DataFrame of the STATES columns plus ``step``."""

    def choose(t, state):
        frame = pd.DataFrame({name: state[name] for name in STATES})
        frame["step"] = t
        return _regime_codes(regime(frame), len(frame), t), None

    return choose


def _natural_action_chooser(strategy, frailty, noise, strength, p, coins):
    """Choose actions by a strategy that sees the action usual care would take (its natural value).

    The natural action is usual care's draw with usual care's own uniforms (so it equals the action taken under
    usual care for as long as the states agree); ``strategy.modify(frame, natural, proba, coins)`` returns the
    action taken, with ``coins`` one uniform per episode from a stream of its own (spawn key 5, which leaves the
    five streams of :func:`_streams` unchanged).
    """

    def choose(t, state):
        proba = usual_care_probabilities(state, frailty, strength, p)
        natural = _draw_actions(proba, noise.behaviour[:, t])
        frame = pd.DataFrame({name: state[name] for name in STATES})
        frame["step"] = t
        return _regime_codes(strategy.modify(frame, natural, proba, coins[:, t]), len(frame), t), None

    return choose


def _rollout(population, noise, choose, strength, p):
    """Run all episodes through the decisions (as many as the noise has columns; vectorised over episodes)."""
    n, n_steps = noise.sbp.shape
    states = {name: np.empty((n, n_steps + 1), dtype=values.dtype) for name, values in population.state.items()}
    actions = np.empty((n, n_steps), dtype=np.int64)
    rewards = np.empty((n, n_steps))
    proba = []
    state = population.state
    for t in range(n_steps):
        for name in STATES:
            states[name][:, t] = state[name]
        actions[:, t], step_proba = choose(t, state)
        proba.append(step_proba)
        state, events = _transition(state, actions[:, t], noise, t, population.frailty, strength, p)
        rewards[:, t] = _reward(state, events, p)
    for name in STATES:
        states[name][:, n_steps] = state[name]
    stacked = None if proba[0] is None else np.stack(proba, axis=1)
    return _Trajectory(states=states, actions=actions, rewards=rewards, proba=stacked)


def check_arguments(n, strength, gamma=1.0, n_steps=N_STEPS):
    """Refuse arguments a user could get wrong, with a one-line message."""
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise UserInputError(f"number of episodes: got {n!r}; give a positive integer")
    if isinstance(n_steps, bool) or not isinstance(n_steps, (int, np.integer)) or not 1 <= n_steps <= 200:
        raise UserInputError(f"number of decision points: got {n_steps!r}; give an integer from 1 to 200")
    if not np.isfinite(strength) or strength < 0:
        raise UserInputError(f"confounding_strength: got {strength!r}; give a finite number >= 0")
    if not 0.0 < gamma <= 1.0:
        raise UserInputError(f"gamma: got {gamma!r}; give a discount in (0, 1]")


def simulate(regime, n, seed, strength, p, n_steps=N_STEPS):
    """Population, noise and trajectory of ``n`` episodes of ``n_steps`` decisions under ``regime``.

    Common random numbers: the same seed gives the same draws; with ``n_steps`` = :data:`N_STEPS` (the demo's
    horizon) the draws are exactly those of the demo.
    """
    rngs = _streams(seed)
    population = _draw_population(n, rngs["population"], p)
    noise = _draw_noise(n, n_steps, rngs["transition"], rngs["behaviour"])
    if isinstance(regime, str) and regime == "usual_care":
        choose = _usual_care_chooser(population.frailty, noise, strength, p)
    elif hasattr(regime, "modify"):  # a strategy acting on the clinician's natural action
        coins = np.random.default_rng(np.random.SeedSequence(seed).spawn(6)[5]).random((n, N_STEPS))
        choose = _natural_action_chooser(regime, population.frailty, noise, strength, p, coins)
    elif callable(regime):
        choose = _regime_chooser(regime)
    else:
        raise UserInputError(f"regime: got {regime!r}; give 'usual_care' or a function of a state DataFrame")
    return population, _rollout(population, noise, choose, strength, p), rngs


def _visit_days(n, n_steps, rng, p):
    """Integer day of each review since the index date: a short first delay, then gaps near 91 days."""
    first = rng.integers(0, p.first_visit_max_delay + 1, size=(n, 1))
    gaps = np.clip(
        np.round(rng.normal(p.visit_gap_mean, p.visit_gap_sd, (n, n_steps - 1))), p.visit_gap_min, p.visit_gap_max
    )
    return np.cumsum(np.hstack([first, gaps]), axis=1).astype(np.int64)


def _yearly_hazard(states, frailty, strength, p):
    """Event hazard per year at each of the n_steps + 1 recorded states, (n, n_steps + 1)."""
    log_hr = (
        p.hazard_sbp * (states["sbp"] - 130.0) / 10.0
        + p.hazard_age * (states["age"] - 65.0) / 10.0
        + p.hazard_diabetes * states["diabetes"]
        + p.hazard_egfr * np.maximum(0.0, 60.0 - states["egfr"]) / 10.0
        + strength * p.hazard_frailty * frailty[:, None]
    )
    return p.hazard_base * np.exp(log_hr)


def _event_days(hazard, days, exp_draws, p):
    """First event day by inverting the piecewise-constant cumulative hazard at an Exp(1) draw.

    Quarter t runs from day_t (day 0 for t = 0) to day_{t+1}, with day_T = day_{T-1} + visit_gap_mean (T
    decisions); it uses the hazard of state t. After day_T the hazard of the end state applies.
    """
    n = days.shape[0]
    starts = np.hstack([np.zeros((n, 1)), days[:, 1:], days[:, -1:] + p.visit_gap_mean])
    rate = hazard / DAYS_PER_YEAR
    cumulative = np.cumsum(rate[:, :-1] * np.diff(starts, axis=1), axis=1)
    interval = (cumulative < exp_draws[:, None]).sum(axis=1)
    before = np.hstack([np.zeros((n, 1)), cumulative])[np.arange(n), interval]
    time = starts[np.arange(n), interval] + (exp_draws - before) / rate[np.arange(n), interval]
    return np.maximum(1, np.ceil(time)).astype(np.int64)


def event_days(trajectory, population, days, exp_draws, strength, p):
    """Day of each episode's first event, uncensored: the potential event time under the rollout's regime."""
    hazard = _yearly_hazard(trajectory.states, population.frailty, strength, p)
    return _event_days(hazard, days, exp_draws, p)


def potential_event_days(regime, n, seed, strength, p):
    """Event days of ``n`` episodes had every decision followed ``regime`` (no loss to follow-up, no cut-off).

    Common random numbers: the population, the noise, the visit days and the Exp(1) draw that sets each event
    are those of :func:`simulate_cohort` with the same seed, whatever the regime. Also returns each episode's
    patient index (for clustered standard errors) and its discounted-return-ready rewards.
    """
    population, trajectory, rngs = simulate(regime, n, seed, strength, p)
    days = _visit_days(n, N_STEPS, rngs["visits"], p)
    exp_draws = rngs["followup"].standard_exponential(n)
    return event_days(trajectory, population, days, exp_draws, strength, p), population.patient, trajectory.rewards


def _follow_up(trajectory, population, days, rng, strength, p):
    """Follow-up days and event indicator: first event versus cut-off or loss to follow-up after the last review."""
    n = days.shape[0]
    exp_draws = rng.standard_exponential(n)
    cutoff = days[:, -1] + rng.integers(p.cutoff_min_days, p.cutoff_max_days + 1, size=n)
    dropout = days[:, -1] + np.ceil(rng.exponential(p.dropout_mean_years * DAYS_PER_YEAR, n)).astype(np.int64)
    censor = np.minimum(cutoff, dropout)
    event_day = event_days(trajectory, population, days, exp_draws, strength, p)
    event = event_day <= censor
    return np.where(event, event_day, censor), event.astype(np.int64)


def _identifiers(prefix, index, n_total):
    """Identifiers like E00001 (zero-padded to at least 5 digits)."""
    width = max(5, len(str(n_total)))
    return np.array([f"{prefix}{i + 1:0{width}d}" for i in index], dtype=object)


def _decisions_frame(trajectory, days, episode_ids, patient_ids):
    """The decisions table, one row per decision, episode-major."""
    n, n_steps = days.shape
    columns = {
        "episode_id": np.repeat(episode_ids, n_steps),
        "patient_id": np.repeat(patient_ids, n_steps),
        "step": np.tile(np.arange(n_steps), n),
        "day": days.ravel(),
    }
    columns.update({name: trajectory.states[name][:, :n_steps].ravel() for name in STATES})
    columns["action"] = np.asarray(ACTIONS, dtype=object)[trajectory.actions.ravel()]
    columns["reward"] = trajectory.rewards.ravel()
    return pd.DataFrame(columns, columns=list(DECISION_COLUMNS))


def simulate_cohort(n_episodes, seed, confounding_strength=1.0, params=None, n_steps=N_STEPS):
    """Simulate a demo cohort of ``n_episodes`` episodes under usual care.

    Parameters
    ----------
    n_episodes : int, number of episodes (about 10 % of patients contribute two).
    seed : int, root seed of ``numpy.random.SeedSequence``.
    confounding_strength : float >= 0, multiplies every hidden-frailty coefficient.
    params : ScenarioParams or None for the defaults.
    n_steps : int, decision points per episode (default :data:`N_STEPS` = 8, the demo's two years of quarterly
        reviews; the scale benchmark uses 12). The demo's draws are unchanged at 8.

    Returns
    -------
    SimulatedCohort

    Examples
    --------
    >>> cohort = simulate_cohort(20, seed=1)
    >>> cohort.decisions.shape
    (160, 14)
    """
    check_arguments(n_episodes, confounding_strength, n_steps=n_steps)
    p = params or ScenarioParams()
    population, trajectory, rngs = simulate("usual_care", n_episodes, seed, confounding_strength, p, n_steps)
    days = _visit_days(n_episodes, n_steps, rngs["visits"], p)
    followup, event = _follow_up(trajectory, population, days, rngs["followup"], confounding_strength, p)
    episode_ids = _identifiers("E", np.arange(n_episodes), n_episodes)
    patient_ids = _identifiers("P", population.patient, n_episodes)
    episodes = pd.DataFrame(
        {
            "episode_id": episode_ids,
            "patient_id": patient_ids,
            "age_at_index": population.state["age"],
            "female": population.state["female"],
            "diabetes": population.state["diabetes"],
            "followup_days": followup,
            "event": event,
        },
        columns=list(EPISODE_COLUMNS),
    )
    return SimulatedCohort(
        decisions=_decisions_frame(trajectory, days, episode_ids, patient_ids),
        episodes=episodes,
        behaviour_proba=trajectory.proba.reshape(-1, len(ACTIONS)),
        frailty=population.frailty,
        confounding_strength=float(confounding_strength),
        params=p,
    )


"""The grid of the reference family (mmHg): every combination with raise_above <= add_above."""
