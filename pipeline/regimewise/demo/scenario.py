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

from dataclasses import dataclass

import numpy as np

from regimewise.errors import UserInputError

ACTIONS = ("hold", "step_down", "step_up", "add_agent")
HOLD, STEP_DOWN, STEP_UP, ADD_AGENT = range(len(ACTIONS))


STATES = ("sbp", "egfr", "potassium", "age", "female", "diabetes", "adherence", "therapy_level")


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


N_STEPS = 8


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
