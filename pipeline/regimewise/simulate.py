"""Simulator of the invented Harbourline demo scenario: blood-pressure therapy reviewed every quarter.

Everything here is made up for the demo. The Harbourline community clinics do not exist and every number
(coefficients, rates, penalties) is invented; nothing in this module describes real patients, real drugs
or real clinical practice. Research use only, not medical advice: treatment decisions stay with licensed
clinicians, under local law and with ethics approval.

The scenario
------------
Each episode is one patient's two years of quarterly reviews: 8 decision points (steps 0..7, about 91
days apart). At each review the clinician sees the state (:data:`STATES`) and chooses one of
:data:`ACTIONS`; the next quarter's state follows from the equations below, and the reward of the
decision is read off that next state. A hidden frailty score ``U ~ N(0, 1)`` per patient, never written to
the tables, shapes both usual care and outcomes; ``confounding_strength`` (s) multiplies every frailty
coefficient, so ``s = 0`` removes hidden confounding.

Dynamics per quarter (state at step t unprimed, next state primed; every coefficient is a field of
:class:`ScenarioParams`, named in brackets):

* therapy level: ``L' = clip(L + change(a), 0, 4)`` with change hold 0, step_down -1, step_up +1,
  add_agent +1. An action whose level change is blocked (step_down at 0, step_up or add_agent at 4)
  changes nothing and acts as hold.
* systolic pressure: ``sbp' = sbp + drift + effect(a) * (floor + (1 - floor) * adherence) + e``,
  ``e ~ N(0, sd)`` [sbp_drift, sbp_effect, sbp_response_floor, sbp_noise_sd].
* eGFR on the log scale: ``log egfr' = log egfr - decline - decline_dm * diabetes
  - hit(a) * exp(s * k * U) + e`` [egfr_decline, egfr_decline_diabetes, egfr_hit, egfr_hit_frailty,
  egfr_noise_sd]; acute kidney injury (AKI) when ``egfr' < (1 - aki_drop) * egfr``.
* potassium: ``K' = K + rho * (mu(egfr') - K) + add * [a = add_agent] + e`` with
  ``mu(g) = mean + renal * max(0, 60 - g) / 10`` [potassium_*]; hyperkalaemia when ``K' > 5.5``.
* adherence: ``A' = clip(A + rho * (mean - A) - burden * [a = add_agent] + e, 0, 1)`` [adherence_*].
* age, sex and diabetes stay as at the index date.
* a fall with low pressure happens when ``sbp' < fall_sbp`` and a uniform draw falls below
  ``expit(c0 + c1 * (fall_sbp - sbp') / 10 + c2 * (age - 65) / 10 + s * c3 * U)`` [fall_*].

Each value is clipped to :data:`STATE_RANGES` and rounded as recorded (sbp, egfr 1 decimal; potassium,
adherence 2 decimals); the dynamics continue from the rounded values, so the recorded state is the true
state. The reward of step t is ``-|sbp' - target| / 10 - 3 [fall] - 2 [K' > 5.5] - 3 [AKI]``, rounded to
3 decimals [target_sbp, sbp_scale, *_penalty].

Usual care is a multinomial logit (hold is the reference) with strong clinical inertia, mixed with a floor
so that every permitted action keeps probability at least ``proba_floor``; step_down has probability 0 at
therapy level 0 (see :func:`usual_care_probabilities`).

A first major cardiovascular event (non-fatal: it does not stop the decisions) follows a
piecewise-constant hazard per year ``h0 * exp(b1 (sbp - 130)/10 + b2 (age - 65)/10 + b3 diabetes
+ b4 max(0, 60 - egfr)/10 + s * b5 * U)``, using the state recorded at the start of each quarter and the
end state after the last quarter [hazard_*]. Follow-up runs past the last review until a data cut-off
(uniform 91..276 days later) or loss to follow-up (exponential), whichever comes first. An event can
occur before the last review; the reviews then continue and ``followup_days`` is the event day.

Common random numbers: all randomness comes from streams spawned by ``numpy.random.SeedSequence`` and
drawn in fixed-size blocks before the episodes run, so the same seed gives the same population and the
same noise for every regime; usual care draws its actions from its own stream of uniforms.

References
----------
Glasserman, P. (2004). *Monte Carlo Methods in Financial Engineering*, ch. 4 (variance reduction,
including common random numbers for comparing systems). Springer. (Chapter recalled from memory.)
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
from scipy.special import expit

from regimewise.errors import UserInputError

ACTIONS = ("hold", "step_down", "step_up", "add_agent")
"""Action labels; an action's code is its index in this tuple."""

STATES = ("sbp", "egfr", "potassium", "age", "female", "diabetes", "adherence", "therapy_level")
"""State columns of the decisions table, in order."""

STATE_RANGES = {
    "sbp": (70.0, 250.0),
    "egfr": (5.0, 150.0),
    "potassium": (2.0, 7.5),
    "age": (30, 89),
    "female": (0, 1),
    "diabetes": (0, 1),
    "adherence": (0.0, 1.0),
    "therapy_level": (0, 4),
}
"""Plausible range (low, high) of each state: mmHg, mL/min/1.73m2, mmol/L, years (never above 89), 0/1, 0/1,
share of doses taken, number of intensity steps."""

N_STEPS = 8
"""Decision points per episode (quarterly reviews over two years)."""

HOLD, STEP_DOWN, STEP_UP, ADD_AGENT = range(len(ACTIONS))
MAX_LEVEL = STATE_RANGES["therapy_level"][1]
LEVEL_CHANGE = np.array([0, -1, 1, 1])
DECIMALS = {"sbp": 1, "egfr": 1, "potassium": 2, "adherence": 2}
DECISION_COLUMNS = ("episode_id", "patient_id", "step", "day", *STATES, "action", "reward")
EPISODE_COLUMNS = ("episode_id", "patient_id", "age_at_index", "female", "diabetes", "followup_days", "event")
DAYS_PER_YEAR = 365.25


@dataclass(frozen=True)
class ScenarioParams:
    """Every coefficient of the invented scenario (all values made up for the demo).

    Per-action tuples are ordered as :data:`ACTIONS` (hold, step_down, step_up, add_agent). Frailty
    coefficients (``*_frailty``) are multiplied by the confounding strength.

    Attributes
    ----------
    repeat_share : probability that a patient has a second episode (0.10).
    repeat_gap_years : years between a patient's two index dates, added to the age (3).
    age_mean, age_sd : age at index, normal, rounded, clipped to 30..89 (63, 11 years).
    female_share : probability of female sex (0.52).
    diabetes_intercept, diabetes_age : logit of diabetes at age 63, per 10 years of age (-1.0, 0.3).
    sbp0_mean, sbp0_sd, sbp0_low, sbp0_high : baseline systolic pressure, clipped (148, 16, 95, 220 mmHg).
    egfr0_mean, egfr0_age, egfr0_diabetes, egfr0_sd, egfr0_low, egfr0_high : baseline eGFR at age 63,
        change per 10 years, with diabetes, sd, clip limits (78, -6, -6, 18, 15, 130).
    potassium0_mean, potassium0_renal, potassium0_sd, potassium0_low, potassium0_high : baseline potassium,
        rise per 10 mL/min of eGFR below 60, sd, clip limits (4.4, 0.15, 0.35, 3.2, 5.8 mmol/L).
    adherence0_a, adherence0_b : beta distribution of baseline adherence (6, 2.5; mean 0.71).
    level0_proba : probabilities of therapy level 0..4 at index (0.20, 0.35, 0.27, 0.13, 0.05).
    first_visit_max_delay : step 0 falls on day 0..this (7).
    visit_gap_mean, visit_gap_sd, visit_gap_min, visit_gap_max : days between reviews, normal, rounded,
        clipped (91, 4, 77, 105).
    sbp_drift : rise of pressure per quarter (2 mmHg).
    sbp_effect : change of pressure per action at full adherence (0, +8, -10, -16 mmHg).
    sbp_response_floor : share of the effect kept at adherence 0 (0.4).
    sbp_noise_sd : quarterly noise (6 mmHg).
    egfr_decline, egfr_decline_diabetes : log-eGFR loss per quarter, extra with diabetes (0.01, 0.01).
    egfr_hit : log-eGFR loss per action (0, 0, 0.03, 0.10).
    egfr_hit_frailty : frailty log-multiplier of that loss (0.6).
    egfr_noise_sd : quarterly noise on the log scale (0.06).
    aki_drop : relative eGFR drop counted as acute kidney injury (0.20).
    potassium_mean, potassium_renal, potassium_reversion : level potassium returns to, its rise per 10 mL/min
        of eGFR below 60, share of the gap closed per quarter (4.3, 0.15, 0.4).
    potassium_add : potassium rise when an agent is added (0.45 mmol/L).
    potassium_noise_sd : quarterly noise (0.2 mmol/L).
    hyperkalaemia : potassium above which the hyperkalaemia penalty applies (5.5 mmol/L).
    adherence_mean, adherence_reversion, adherence_add, adherence_noise_sd : adherence returns to 0.75,
        closing 0.3 of the gap per quarter; an added agent lowers it by 0.03; noise sd 0.07.
    fall_sbp : pressure below which falls can happen (120 mmHg).
    fall_intercept, fall_low, fall_age, fall_frailty : logit of a fall at the threshold, per 10 mmHg below
        it, per 10 years above 65, per unit frailty (-2.5, 0.8, 0.3, 0.7).
    target_sbp, sbp_scale : reward target pressure and the mmHg per reward unit (130, 10).
    fall_penalty, hyperkalaemia_penalty, aki_penalty : reward penalties (3, 2, 3).
    down_intercept, down_sbp, down_potassium, down_age, down_frailty : usual-care logit of step_down
        versus hold: intercept at 120 mmHg, per 10 mmHg below 120, per mmol/L above 5.0, per 10 years
        above 65, per unit frailty (-3.0, 0.8, 1.5, 0.2, 0.5).
    up_intercept, up_sbp, up_adherence, up_potassium, up_level, up_frailty : logit of step_up: at 140 mmHg,
        per 10 mmHg above, per unit adherence above 0.7, per mmol/L above 4.8 (lowers), per therapy level
        (lowers), per unit frailty (lowers) (-2.0, 0.5, 1.0, 1.5, 0.3, 0.5).
    add_intercept, add_sbp, add_egfr, add_potassium, add_diabetes, add_frailty : logit of add_agent: at
        150 mmHg, per 10 mmHg above, per 10 mL/min of eGFR above 60, per mmol/L above 4.5 (lowers),
        with diabetes, per unit frailty (lowers) (-3.0, 0.5, 0.1, 2.0, 0.3, 0.6).
    proba_floor : smallest probability of every permitted action (0.02).
    hazard_base : yearly event hazard at 130 mmHg, age 65, no diabetes, eGFR >= 60, U = 0 (0.03).
    hazard_sbp, hazard_age, hazard_diabetes, hazard_egfr, hazard_frailty : log hazard ratios per 10 mmHg
        above 130, per 10 years above 65, for diabetes, per 10 mL/min below 60, per unit frailty
        (0.2, 0.5, 0.4, 0.15, 0.5).
    cutoff_min_days, cutoff_max_days : data cut-off after the last review, uniform (91, 276 days).
    dropout_mean_years : mean time to loss to follow-up after the last review, exponential (4).
    """

    repeat_share: float = 0.10
    repeat_gap_years: int = 3
    age_mean: float = 63.0
    age_sd: float = 11.0
    female_share: float = 0.52
    diabetes_intercept: float = -1.0
    diabetes_age: float = 0.3
    sbp0_mean: float = 148.0
    sbp0_sd: float = 16.0
    sbp0_low: float = 95.0
    sbp0_high: float = 220.0
    egfr0_mean: float = 78.0
    egfr0_age: float = -6.0
    egfr0_diabetes: float = -6.0
    egfr0_sd: float = 18.0
    egfr0_low: float = 15.0
    egfr0_high: float = 130.0
    potassium0_mean: float = 4.4
    potassium0_renal: float = 0.15
    potassium0_sd: float = 0.35
    potassium0_low: float = 3.2
    potassium0_high: float = 5.8
    adherence0_a: float = 6.0
    adherence0_b: float = 2.5
    level0_proba: tuple[float, ...] = (0.20, 0.35, 0.27, 0.13, 0.05)
    first_visit_max_delay: int = 7
    visit_gap_mean: float = 91.0
    visit_gap_sd: float = 4.0
    visit_gap_min: int = 77
    visit_gap_max: int = 105
    sbp_drift: float = 2.0
    sbp_effect: tuple[float, ...] = (0.0, 8.0, -10.0, -16.0)
    sbp_response_floor: float = 0.4
    sbp_noise_sd: float = 6.0
    egfr_decline: float = 0.01
    egfr_decline_diabetes: float = 0.01
    egfr_hit: tuple[float, ...] = (0.0, 0.0, 0.03, 0.10)
    egfr_hit_frailty: float = 0.6
    egfr_noise_sd: float = 0.06
    aki_drop: float = 0.20
    potassium_mean: float = 4.3
    potassium_renal: float = 0.15
    potassium_reversion: float = 0.4
    potassium_add: float = 0.45
    potassium_noise_sd: float = 0.2
    hyperkalaemia: float = 5.5
    adherence_mean: float = 0.75
    adherence_reversion: float = 0.3
    adherence_add: float = 0.03
    adherence_noise_sd: float = 0.07
    fall_sbp: float = 120.0
    fall_intercept: float = -2.5
    fall_low: float = 0.8
    fall_age: float = 0.3
    fall_frailty: float = 0.7
    target_sbp: float = 130.0
    sbp_scale: float = 10.0
    fall_penalty: float = 3.0
    hyperkalaemia_penalty: float = 2.0
    aki_penalty: float = 3.0
    down_intercept: float = -3.0
    down_sbp: float = 0.8
    down_potassium: float = 1.5
    down_age: float = 0.2
    down_frailty: float = 0.5
    up_intercept: float = -2.0
    up_sbp: float = 0.5
    up_adherence: float = 1.0
    up_potassium: float = 1.5
    up_level: float = 0.3
    up_frailty: float = 0.5
    add_intercept: float = -3.0
    add_sbp: float = 0.5
    add_egfr: float = 0.1
    add_potassium: float = 2.0
    add_diabetes: float = 0.3
    add_frailty: float = 0.6
    proba_floor: float = 0.02
    hazard_base: float = 0.03
    hazard_sbp: float = 0.2
    hazard_age: float = 0.5
    hazard_diabetes: float = 0.4
    hazard_egfr: float = 0.15
    hazard_frailty: float = 0.5
    cutoff_min_days: int = 91
    cutoff_max_days: int = 276
    dropout_mean_years: float = 4.0

    def __post_init__(self):
        if len(self.level0_proba) != MAX_LEVEL + 1 or not np.isclose(sum(self.level0_proba), 1.0):
            raise UserInputError("ScenarioParams.level0_proba: give 5 probabilities (levels 0..4) summing to 1")
        for name in ("sbp_effect", "egfr_hit"):
            if len(getattr(self, name)) != len(ACTIONS):
                raise UserInputError(f"ScenarioParams.{name}: give one value per action {ACTIONS}")
        if not 0.0 <= self.proba_floor * len(ACTIONS) < 1.0:
            raise UserInputError("ScenarioParams.proba_floor: must lie in [0, 0.25) so probabilities stay valid")


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


@dataclass(frozen=True)
class TrueValue:
    """Monte Carlo value of a regime: mean return, its standard error (patients as clusters), episodes."""

    value: float
    se: float
    n: int


@dataclass(frozen=True, eq=False)
class _Population:
    """Baseline of each episode: patient index, hidden frailty and the step-0 state."""

    patient: np.ndarray
    frailty: np.ndarray
    state: dict


@dataclass(frozen=True, eq=False)
class _Noise:
    """Action-independent draws, each (n, N_STEPS): standard normals and uniforms."""

    sbp: np.ndarray
    egfr: np.ndarray
    potassium: np.ndarray
    adherence: np.ndarray
    fall: np.ndarray
    behaviour: np.ndarray


@dataclass(frozen=True, eq=False)
class _Trajectory:
    """States at steps 0..N_STEPS (the last is the end state), actions, rewards, usual-care probabilities."""

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


def _draw_noise(n, transition_rng, behaviour_rng):
    """Draw every quarter's noise up front, so it does not depend on the actions taken."""
    shape = (n, N_STEPS)
    normals = {name: transition_rng.standard_normal(shape) for name in ("sbp", "egfr", "potassium", "adherence")}
    return _Noise(fall=transition_rng.random(shape), behaviour=behaviour_rng.random(shape), **normals)


def usual_care_probabilities(states, frailty, confounding_strength=1.0, params=None):
    """True usual-care probability of each action given the state and the hidden frailty.

    Multinomial logit with hold as reference (linear predictors ``eta``; see :class:`ScenarioParams` for
    the coefficients), then mixed with a floor: ``p = (1 - k f) softmax(eta) + f`` over the ``k`` permitted
    actions, so every permitted action has probability at least ``f = proba_floor``. step_down is not
    permitted at therapy level 0 (probability exactly 0). Clinical inertia: the intercepts make hold the
    most likely action even well above target pressure.

    Parameters
    ----------
    states : mapping or DataFrame with the :data:`STATES` columns (arrays of equal length).
    frailty : array of the hidden frailty, one per row.
    confounding_strength : float, multiplies the frailty coefficients (0 removes them).
    params : ScenarioParams or None for the defaults.

    Returns
    -------
    ndarray (n, 4), rows summing to 1, columns ordered as :data:`ACTIONS`.

    Examples
    --------
    >>> import numpy as np
    >>> s = {"sbp": np.array([165.0]), "egfr": np.array([70.0]), "potassium": np.array([4.2]),
    ...      "age": np.array([60]), "diabetes": np.array([0]), "adherence": np.array([0.8]),
    ...      "therapy_level": np.array([0])}
    >>> float(usual_care_probabilities(s, np.zeros(1))[0, 1])  # step_down at therapy level 0
    0.0
    """
    p = params or ScenarioParams()
    su = confounding_strength * np.asarray(frailty, dtype=float)
    sbp, k, level = (np.asarray(states[c], dtype=float) for c in ("sbp", "potassium", "therapy_level"))
    eta = np.zeros((sbp.size, len(ACTIONS)))
    eta[:, STEP_DOWN] = (p.down_intercept + p.down_sbp * (120.0 - sbp) / 10.0
                         + p.down_potassium * np.maximum(0.0, k - 5.0)
                         + p.down_age * (np.asarray(states["age"]) - 65.0) / 10.0 + p.down_frailty * su)
    eta[:, STEP_UP] = (p.up_intercept + p.up_sbp * (sbp - 140.0) / 10.0
                       + p.up_adherence * (np.asarray(states["adherence"]) - 0.7)
                       - p.up_potassium * np.maximum(0.0, k - 4.8) - p.up_level * level - p.up_frailty * su)
    eta[:, ADD_AGENT] = (p.add_intercept + p.add_sbp * (sbp - 150.0) / 10.0
                         + p.add_egfr * (np.asarray(states["egfr"]) - 60.0) / 10.0
                         - p.add_potassium * np.maximum(0.0, k - 4.5)
                         + p.add_diabetes * np.asarray(states["diabetes"]) - p.add_frailty * su)
    permitted = np.ones_like(eta, dtype=bool)
    permitted[:, STEP_DOWN] = level > 0
    weight = np.where(permitted, np.exp(eta - eta.max(axis=1, keepdims=True)), 0.0)
    softmax = weight / weight.sum(axis=1, keepdims=True)
    k_permitted = permitted.sum(axis=1, keepdims=True)
    return np.where(permitted, (1.0 - k_permitted * p.proba_floor) * softmax + p.proba_floor, 0.0)


@dataclass(frozen=True)
class InducedGamma:
    """How strongly the hidden frailty moved usual care's choices, on the scale of Tan's (2006) model.

    ``maximum`` is the largest odds ratio, over the cohort's decisions and their permitted actions, between
    the true usual-care probability of an action with the patient's frailty and with the frailty term removed
    (``U = 0``), taken in whichever direction exceeds 1; ``q99`` is the 99th percentile of the same ratios.
    A marginal sensitivity model with ``Gamma >= maximum`` holds for every recorded decision when the
    frailty-free probability stands in for the identified one. (Tan's model bounds the ratio against the
    propensity given the recorded history, which averages over ``U``; this simulator's yardstick uses
    ``U = 0``, as its documentation states.)
    """

    maximum: float
    q99: float


def induced_gamma(cohort: SimulatedCohort) -> InducedGamma:
    """Odds ratios by which the hidden frailty moved the true usual-care probabilities of ``cohort``.

    Examples
    --------
    >>> induced_gamma(simulate_cohort(50, seed=1, confounding_strength=0.0)).maximum
    1.0
    """
    frailty = cohort.frailty[pd.factorize(cohort.decisions["episode_id"], sort=False)[0]]
    s, p = cohort.confounding_strength, cohort.params
    with_u = usual_care_probabilities(cohort.decisions, frailty, s, p)
    without_u = usual_care_probabilities(cohort.decisions, np.zeros_like(frailty), s, p)
    permitted = with_u > 0
    odds = lambda q: q / (1.0 - q)  # noqa: E731
    log_ratio = np.abs(np.log(odds(with_u[permitted])) - np.log(odds(without_u[permitted])))
    ratios = np.exp(log_ratio)
    return InducedGamma(maximum=float(ratios.max()), q99=float(np.quantile(ratios, 0.99)))


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
    log_egfr = (np.log(state["egfr"]) - p.egfr_decline - p.egfr_decline_diabetes * state["diabetes"]
                - hit + p.egfr_noise_sd * noise.egfr[:, t])
    egfr = _round_state("egfr", np.exp(log_egfr))
    k_target = p.potassium_mean + p.potassium_renal * np.maximum(0.0, 60.0 - egfr) / 10.0
    potassium = (state["potassium"] + p.potassium_reversion * (k_target - state["potassium"])
                 + p.potassium_add * is_add + p.potassium_noise_sd * noise.potassium[:, t])
    adherence = (state["adherence"] + p.adherence_reversion * (p.adherence_mean - state["adherence"])
                 - p.adherence_add * is_add + p.adherence_noise_sd * noise.adherence[:, t])
    fall_logit = (p.fall_intercept + p.fall_low * (p.fall_sbp - sbp) / 10.0
                  + p.fall_age * (state["age"] - 65.0) / 10.0 + strength * p.fall_frailty * frailty)
    nxt = dict(state, sbp=sbp, egfr=egfr, potassium=_round_state("potassium", potassium),
               adherence=_round_state("adherence", adherence), therapy_level=new_level)
    events = {
        "fall": (sbp < p.fall_sbp) & (noise.fall[:, t] < expit(fall_logit)),
        "hyperkalaemia": nxt["potassium"] > p.hyperkalaemia,
        "aki": egfr < (1.0 - p.aki_drop) * state["egfr"],
    }
    return nxt, events


def _reward(next_state, events, p):
    """Quarterly reward: distance from target pressure and penalties for adverse events, 3 decimals."""
    reward = (-np.abs(next_state["sbp"] - p.target_sbp) / p.sbp_scale - p.fall_penalty * events["fall"]
              - p.hyperkalaemia_penalty * events["hyperkalaemia"] - p.aki_penalty * events["aki"])
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


def _rollout(population, noise, choose, strength, p):
    """Run all episodes through the N_STEPS decisions (vectorised over episodes)."""
    n = population.frailty.size
    states = {name: np.empty((n, N_STEPS + 1), dtype=values.dtype)
              for name, values in population.state.items()}
    actions = np.empty((n, N_STEPS), dtype=np.int64)
    rewards = np.empty((n, N_STEPS))
    proba = []
    state = population.state
    for t in range(N_STEPS):
        for name in STATES:
            states[name][:, t] = state[name]
        actions[:, t], step_proba = choose(t, state)
        proba.append(step_proba)
        state, events = _transition(state, actions[:, t], noise, t, population.frailty, strength, p)
        rewards[:, t] = _reward(state, events, p)
    for name in STATES:
        states[name][:, N_STEPS] = state[name]
    stacked = None if proba[0] is None else np.stack(proba, axis=1)
    return _Trajectory(states=states, actions=actions, rewards=rewards, proba=stacked)


def _check_arguments(n, strength, gamma=1.0):
    """Refuse arguments a user could get wrong, with a one-line message."""
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise UserInputError(f"number of episodes: got {n!r}; give a positive integer")
    if not np.isfinite(strength) or strength < 0:
        raise UserInputError(f"confounding_strength: got {strength!r}; give a finite number >= 0")
    if not 0.0 < gamma <= 1.0:
        raise UserInputError(f"gamma: got {gamma!r}; give a discount in (0, 1]")


def _simulate(regime, n, seed, strength, p):
    """Population, noise and trajectory of ``n`` episodes under ``regime`` (CRN: same seed, same draws)."""
    rngs = _streams(seed)
    population = _draw_population(n, rngs["population"], p)
    noise = _draw_noise(n, rngs["transition"], rngs["behaviour"])
    if isinstance(regime, str) and regime == "usual_care":
        choose = _usual_care_chooser(population.frailty, noise, strength, p)
    elif callable(regime):
        choose = _regime_chooser(regime)
    else:
        raise UserInputError(f"regime: got {regime!r}; give 'usual_care' or a function of a state DataFrame")
    return population, _rollout(population, noise, choose, strength, p), rngs


def _visit_days(n, rng, p):
    """Integer day of each review since the index date: a short first delay, then gaps near 91 days."""
    first = rng.integers(0, p.first_visit_max_delay + 1, size=(n, 1))
    gaps = np.clip(np.round(rng.normal(p.visit_gap_mean, p.visit_gap_sd, (n, N_STEPS - 1))),
                   p.visit_gap_min, p.visit_gap_max)
    return np.cumsum(np.hstack([first, gaps]), axis=1).astype(np.int64)


def _yearly_hazard(states, frailty, strength, p):
    """Event hazard per year at each of the N_STEPS + 1 recorded states, (n, N_STEPS + 1)."""
    log_hr = (p.hazard_sbp * (states["sbp"] - 130.0) / 10.0 + p.hazard_age * (states["age"] - 65.0) / 10.0
              + p.hazard_diabetes * states["diabetes"]
              + p.hazard_egfr * np.maximum(0.0, 60.0 - states["egfr"]) / 10.0
              + strength * p.hazard_frailty * frailty[:, None])
    return p.hazard_base * np.exp(log_hr)


def _event_days(hazard, days, exp_draws, p):
    """First event day by inverting the piecewise-constant cumulative hazard at an Exp(1) draw.

    Quarter t runs from day_t (day 0 for t = 0) to day_{t+1}, with day_8 = day_7 + visit_gap_mean; it uses
    the hazard of state t. After day_8 the hazard of the end state applies.
    """
    n = days.shape[0]
    starts = np.hstack([np.zeros((n, 1)), days[:, 1:], days[:, -1:] + p.visit_gap_mean])
    rate = hazard / DAYS_PER_YEAR
    cumulative = np.cumsum(rate[:, :-1] * np.diff(starts, axis=1), axis=1)
    interval = (cumulative < exp_draws[:, None]).sum(axis=1)
    before = np.hstack([np.zeros((n, 1)), cumulative])[np.arange(n), interval]
    time = starts[np.arange(n), interval] + (exp_draws - before) / rate[np.arange(n), interval]
    return np.maximum(1, np.ceil(time)).astype(np.int64)


def _follow_up(trajectory, population, days, rng, strength, p):
    """Follow-up days and event indicator: first event versus cut-off or loss to follow-up after day_7."""
    n = days.shape[0]
    exp_draws = rng.standard_exponential(n)
    cutoff = days[:, -1] + rng.integers(p.cutoff_min_days, p.cutoff_max_days + 1, size=n)
    dropout = days[:, -1] + np.ceil(rng.exponential(p.dropout_mean_years * DAYS_PER_YEAR, n)).astype(np.int64)
    censor = np.minimum(cutoff, dropout)
    hazard = _yearly_hazard(trajectory.states, population.frailty, strength, p)
    event_day = _event_days(hazard, days, exp_draws, p)
    event = event_day <= censor
    return np.where(event, event_day, censor), event.astype(np.int64)


def _identifiers(prefix, index, n_total):
    """Identifiers like E00001 (zero-padded to at least 5 digits)."""
    width = max(5, len(str(n_total)))
    return np.array([f"{prefix}{i + 1:0{width}d}" for i in index], dtype=object)


def _decisions_frame(trajectory, days, episode_ids, patient_ids):
    """The decisions table, one row per decision, episode-major."""
    n = days.shape[0]
    columns = {
        "episode_id": np.repeat(episode_ids, N_STEPS),
        "patient_id": np.repeat(patient_ids, N_STEPS),
        "step": np.tile(np.arange(N_STEPS), n),
        "day": days.ravel(),
    }
    columns.update({name: trajectory.states[name][:, :N_STEPS].ravel() for name in STATES})
    columns["action"] = np.asarray(ACTIONS, dtype=object)[trajectory.actions.ravel()]
    columns["reward"] = trajectory.rewards.ravel()
    return pd.DataFrame(columns, columns=list(DECISION_COLUMNS))


def simulate_cohort(n_episodes, seed, confounding_strength=1.0, params=None):
    """Simulate a demo cohort of ``n_episodes`` episodes under usual care.

    Parameters
    ----------
    n_episodes : int, number of episodes (about 10 % of patients contribute two).
    seed : int, root seed of ``numpy.random.SeedSequence``.
    confounding_strength : float >= 0, multiplies every hidden-frailty coefficient.
    params : ScenarioParams or None for the defaults.

    Returns
    -------
    SimulatedCohort

    Examples
    --------
    >>> cohort = simulate_cohort(20, seed=1)
    >>> cohort.decisions.shape
    (160, 14)
    """
    _check_arguments(n_episodes, confounding_strength)
    p = params or ScenarioParams()
    population, trajectory, rngs = _simulate("usual_care", n_episodes, seed, confounding_strength, p)
    days = _visit_days(n_episodes, rngs["visits"], p)
    followup, event = _follow_up(trajectory, population, days, rngs["followup"], confounding_strength, p)
    episode_ids = _identifiers("E", np.arange(n_episodes), n_episodes)
    patient_ids = _identifiers("P", population.patient, n_episodes)
    episodes = pd.DataFrame({
        "episode_id": episode_ids,
        "patient_id": patient_ids,
        "age_at_index": population.state["age"],
        "female": population.state["female"],
        "diabetes": population.state["diabetes"],
        "followup_days": followup,
        "event": event,
    }, columns=list(EPISODE_COLUMNS))
    return SimulatedCohort(
        decisions=_decisions_frame(trajectory, days, episode_ids, patient_ids),
        episodes=episodes,
        behaviour_proba=trajectory.proba.reshape(-1, len(ACTIONS)),
        frailty=population.frailty,
        confounding_strength=float(confounding_strength),
        params=p,
    )


def _discounted(rewards, gamma):
    """Per-episode return: sum over t of gamma**t * r_t."""
    return rewards @ (gamma ** np.arange(rewards.shape[1]))


def true_returns(regime, n=100_000, seed=0, confounding_strength=1.0, gamma=1.0, params=None):
    """Per-episode discounted return when every decision follows ``regime``.

    Common random numbers: for one seed the baseline population and every noise draw are the same whatever
    the regime, so ``true_returns(a) - true_returns(b)`` is a paired difference (Glasserman 2004, ch. 4).
    ``true_returns("usual_care", n, seed)`` equals the returns of ``simulate_cohort(n, seed)``.

    Parameters
    ----------
    regime : "usual_care" (the stochastic usual-care policy) or a callable taking a DataFrame with the
        :data:`STATES` columns plus ``step`` (one row per episode) and returning action codes or labels.
    n : int, episodes.
    seed : int, root seed.
    confounding_strength : float >= 0.
    gamma : float in (0, 1], discount.
    params : ScenarioParams or None.

    Returns
    -------
    ndarray (n,)

    Examples
    --------
    >>> paired = true_returns(always("step_up"), n=1000, seed=3) - true_returns(always("hold"), n=1000, seed=3)
    >>> paired.shape
    (1000,)
    """
    return _returns_and_patients(regime, n, seed, confounding_strength, gamma, params)[0]


def _returns_and_patients(regime, n, seed, strength, gamma, params):
    """Discounted returns under ``regime`` and each episode's patient index."""
    _check_arguments(n, strength, gamma)
    population, trajectory, _ = _simulate(regime, n, seed, strength, params or ScenarioParams())
    return _discounted(trajectory.rewards, gamma), population.patient


def _clustered_se(values, cluster):
    """Standard error of a mean with clusters as independent units (sandwich form, small-sample factor).

    With one value per cluster it equals sd / sqrt(n) (sd with n - 1 in the denominator).
    """
    n = values.size
    sums = np.bincount(cluster, weights=values - values.mean())
    n_clusters = np.unique(cluster).size
    if n_clusters < 2:
        return float("nan")
    return float(np.sqrt(n_clusters / (n_clusters - 1) * np.sum(sums ** 2)) / n)


def true_value(regime, n=100_000, seed=0, confounding_strength=1.0, gamma=1.0, params=None):
    """Monte Carlo value of ``regime``: the mean of :func:`true_returns` with its standard error.

    The standard error treats patients (not episodes) as independent units, because a patient's two
    episodes share the hidden frailty; with one episode per patient it is sd / sqrt(n).

    Examples
    --------
    >>> v = true_value("usual_care", n=2000, seed=5)
    >>> v.n
    2000
    """
    returns, patient = _returns_and_patients(regime, n, seed, confounding_strength, gamma, params)
    return TrueValue(value=float(returns.mean()), se=_clustered_se(returns, patient), n=int(n))


def always(action):
    """The fixed regime that takes ``action`` (a label of :data:`ACTIONS`) at every decision.

    A blocked change (step_down at level 0, step_up or add_agent at level 4) acts as hold.
    """
    if action not in ACTIONS:
        raise UserInputError(f"always(): unknown action {action!r}; use one of {ACTIONS}")
    code = ACTIONS.index(action)

    def regime(states):
        return np.full(len(states), code, dtype=np.int64)
    regime.__name__ = f"always_{action}"
    return regime


@dataclass(frozen=True)
class ThresholdRule:
    """One member of the documented family of threshold rules: the simulator's reference strategies.

    At each review, in this order:

    1. if potassium > ``potassium_max`` or eGFR < ``egfr_min`` (the demo protocol's clinical rules): step_down
       when sbp < ``lower_below`` and the therapy level is above 0, otherwise hold;
    2. else if sbp >= ``add_above``: add_agent;
    3. else if sbp >= ``raise_above``: step_up;
    4. else if sbp < ``lower_below`` and the therapy level is above 0: step_down;
    5. else hold.

    The rule never breaks the demo protocol's clinical rules (no step_up or add_agent with potassium > 5.5 or
    eGFR < 30, no step_down at level 0). Invented for the demo; not medical advice.
    """

    raise_above: float
    add_above: float
    lower_below: float
    potassium_max: float = 5.5
    egfr_min: float = 30.0

    def __call__(self, states) -> np.ndarray:
        sbp, k, egfr, level = (np.asarray(states[c], dtype=float) for c in ("sbp", "potassium", "egfr", "therapy_level"))
        unsafe = (k > self.potassium_max) | (egfr < self.egfr_min)
        lower = (sbp < self.lower_below) & (level > 0)
        codes = np.where(sbp >= self.raise_above, STEP_UP, HOLD)
        codes = np.where(sbp >= self.add_above, ADD_AGENT, codes)
        codes = np.where(lower, STEP_DOWN, codes)
        return np.where(unsafe, np.where(lower, STEP_DOWN, HOLD), codes).astype(np.int64)


THRESHOLD_GRID = {
    "raise_above": (125.0, 130.0, 135.0, 140.0, 145.0, 150.0),
    "add_above": (135.0, 140.0, 145.0, 150.0, 155.0, 160.0, 170.0, float("inf")),
    "lower_below": (110.0, 115.0, 120.0, 125.0, 130.0),
}
"""The grid of the reference family (mmHg): every combination with raise_above <= add_above."""


@dataclass(frozen=True)
class ThresholdSearch:
    """Result of the grid search: the best rule, its Monte Carlo value and SE, and every rule's value."""

    best: ThresholdRule
    value: float
    se: float
    n: int
    seed: int
    values: tuple[tuple[ThresholdRule, float], ...]


def threshold_rules(grid=None):
    """Every :class:`ThresholdRule` of ``grid`` (default :data:`THRESHOLD_GRID`) with raise_above <= add_above."""
    grid = grid or THRESHOLD_GRID
    return [
        ThresholdRule(r, a, low)
        for r in grid["raise_above"] for a in grid["add_above"] for low in grid["lower_below"] if r <= a
    ]  # fmt: skip


def best_threshold_rule(n=20_000, seed=0, confounding_strength=1.0, gamma=1.0, params=None, grid=None):
    """Grid search of the threshold family on simulator true values (common random numbers across rules).

    Every rule is valued on the same ``n`` simulated episodes (:func:`true_value`), so the comparison is
    paired; the best value is optimistic by the selection (winner's curse), so re-value the chosen rule with
    another seed before using it as a yardstick.

    Examples
    --------
    >>> search = best_threshold_rule(n=500, seed=4, grid={"raise_above": (140.0,), "add_above": (160.0,),
    ...                                                   "lower_below": (110.0, 120.0)})
    >>> len(search.values)
    2
    """
    values = []
    for rule in threshold_rules(grid):
        v = true_value(rule, n=n, seed=seed, confounding_strength=confounding_strength, gamma=gamma, params=params)
        values.append((rule, v))
    best_rule, best = max(values, key=lambda item: item[1].value)
    return ThresholdSearch(best_rule, best.value, best.se, int(n), int(seed),
                           tuple((rule, v.value) for rule, v in values))  # fmt: skip


def _format_table(frame):
    """CSV text with fixed float formatting and '\\n' line endings."""
    out = frame.copy()
    for name, decimals in {**DECIMALS, "reward": 3}.items():
        if name in out:
            out[name] = np.char.mod(f"%.{decimals}f", out[name].to_numpy(dtype=float))
    return out.to_csv(index=False, lineterminator="\n")


def _write_text_atomic(path, text):
    """Write ``text`` to ``path`` whole or not at all (temporary file in the same folder, then rename)."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "w", encoding="utf-8", newline="\n") as stream:
            stream.write(text)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _truth(seed, strength, n_truth, gamma, p):
    """True values (6 decimals) of usual care and of each always-<action> regime, with their SEs."""
    regimes = {"usual_care": "usual_care", **{f"always_{a}": always(a) for a in ACTIONS}}
    values = {}
    for name, regime in regimes.items():
        v = true_value(regime, n=n_truth, seed=seed, confounding_strength=strength, gamma=gamma, params=p)
        values[name] = {"value": round(v.value, 6), "se": round(v.se, 6)}
    return values


def write_cohort(out_dir, n_episodes=3000, seed=20261201, confounding_strength=1.0, n_truth=100_000):
    """Write decisions.csv, episodes.csv and truth.json to ``out_dir``, byte-reproducibly.

    The true values in truth.json are computed at ``n_truth`` episodes with seed ``seed + 1`` (independent
    of the cohort's draws) and gamma = 1, using the default :class:`ScenarioParams`, which truth.json also
    lists. Fixed column order, fixed decimals, '\\n' line endings and sorted JSON keys make the files
    byte-identical for the same arguments.

    Returns
    -------
    dict mapping file name to its path.
    """
    _check_arguments(n_episodes, confounding_strength)
    p = ScenarioParams()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    cohort = simulate_cohort(n_episodes, seed, confounding_strength, p)
    _check_arguments(n_truth, confounding_strength)
    truth_seed, gamma = seed + 1, 1.0
    truth = {
        "scenario": "Harbourline demo (invented data, for the demo only; research use only, not medical advice)",
        "seed": int(seed),
        "n_episodes": int(n_episodes),
        "n_decisions": int(len(cohort.decisions)),
        "confounding_strength": round(float(confounding_strength), 6),
        "actions": list(ACTIONS),
        "truth_seed": int(truth_seed),
        "truth_n": int(n_truth),
        "gamma": gamma,
        "true_values": _truth(truth_seed, confounding_strength, n_truth, gamma, p),
        "induced_gamma": {k: round(v, 6) for k, v in asdict(induced_gamma(cohort)).items()},
        "params": asdict(p),
    }
    paths = {name: out / name for name in ("decisions.csv", "episodes.csv", "truth.json")}
    _write_text_atomic(paths["decisions.csv"], _format_table(cohort.decisions))
    _write_text_atomic(paths["episodes.csv"], _format_table(cohort.episodes))
    _write_text_atomic(paths["truth.json"], json.dumps(truth, sort_keys=True, indent=2) + "\n")
    return paths


def main(argv=None):
    """Command line: ``python -m regimewise.simulate --out DIR --episodes N --seed S --strength G``."""
    parser = argparse.ArgumentParser(
        prog="python -m regimewise.simulate",
        description="Write the invented Harbourline demo cohort (decisions.csv, episodes.csv, truth.json).")
    parser.add_argument("--out", required=True, help="output folder (created if missing)")
    parser.add_argument("--episodes", type=int, default=3000, help="number of episodes (default 3000)")
    parser.add_argument("--seed", type=int, default=20261201, help="root seed (default 20261201)")
    parser.add_argument("--strength", type=float, default=1.0, help="confounding strength (default 1.0)")
    args = parser.parse_args(argv)
    try:
        paths = write_cohort(args.out, args.episodes, args.seed, args.strength)
    except UserInputError as error:
        print(f"error: {error}", file=sys.stderr)
        return 2
    for path in paths.values():
        print(path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
