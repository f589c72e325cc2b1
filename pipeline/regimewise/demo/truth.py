"""What the simulator knows and an analysis must estimate: the true value of any regime by Monte Carlo with common
random numbers, the fixed 'always' strategies, the best of a documented family of threshold rules, and the
confounding strength Γ the hidden frailty induces (the largest odds ratio it moves an action's odds by).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.demo.scenario import (
    ACTIONS,
    ADD_AGENT,
    HOLD,
    STEP_DOWN,
    STEP_UP,
    ScenarioParams,
)
from regimewise.demo.simulate import SimulatedCohort, check_arguments, potential_event_days, simulate
from regimewise.demo.usual_care import usual_care_probabilities
from regimewise.errors import UserInputError


@dataclass(frozen=True)
class TrueValue:
    """Monte Carlo value of a regime: mean return, its standard error (patients as clusters), episodes."""

    value: float
    se: float
    n: int


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
    check_arguments(n, strength, gamma)
    population, trajectory, _ = simulate(regime, n, seed, strength, params or ScenarioParams())
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
    return float(np.sqrt(n_clusters / (n_clusters - 1) * np.sum(sums**2)) / n)


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
        sbp, k, egfr, level = (
            np.asarray(states[c], dtype=float) for c in ("sbp", "potassium", "egfr", "therapy_level")
        )
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
        for r in grid["raise_above"]
        for a in grid["add_above"]
        for low in grid["lower_below"]
        if r <= a
    ]


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
    return ThresholdSearch(
        best_rule, best.value, best.se, int(n), int(seed), tuple((rule, v.value) for rule, v in values)
    )


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


@dataclass(frozen=True)
class TrueSurvival:
    """Monte Carlo survival of a regime: S(t) at ``times``, restricted mean survival to ``horizon``, their SEs."""

    times: tuple
    survival: tuple
    survival_se: tuple
    rmst: float
    rmst_se: float
    horizon: float
    n: int

    def to_dict(self, digits=6) -> dict:
        return {
            "times": [float(t) for t in self.times],
            "survival": [round(v, digits) for v in self.survival],
            "survival_se": [round(v, digits) for v in self.survival_se],
            "rmst": round(self.rmst, digits),
            "rmst_se": round(self.rmst_se, digits),
            "horizon": float(self.horizon),
            "n": self.n,
        }


def true_survival(regime, times, horizon, n=100_000, seed=0, confounding_strength=1.0, params=None) -> TrueSurvival:
    """True survival curve and restricted mean survival time of ``regime`` by Monte Carlo.

    S(t) is the share of episodes whose potential event day (every decision following ``regime``, nobody lost to
    follow-up; :func:`regimewise.demo.simulate.potential_event_days`) exceeds t; the restricted mean survival time
    to ``horizon`` is the mean of min(T, horizon) (Royston & Parmar 2013). Standard errors treat patients as
    independent units. Common random numbers make differences between regimes paired.

    Examples
    --------
    >>> s = true_survival("usual_care", [365.0], 730.0, n=2000, seed=5)
    >>> 0.0 < s.survival[0] <= 1.0
    True
    """
    return true_outcomes(regime, times, horizon, n, seed, confounding_strength, 1.0, params)[1]


def true_outcomes(regime, times, horizon, n=100_000, seed=0, confounding_strength=1.0, gamma=1.0, params=None):
    """(:class:`TrueValue`, :class:`TrueSurvival`) of ``regime`` from one simulated rollout (same draws as
    :func:`true_value` and :func:`true_survival` with the same seed)."""
    check_arguments(n, confounding_strength, gamma)
    days, patient, rewards = potential_event_days(regime, n, seed, confounding_strength, params or ScenarioParams())
    returns = _discounted(rewards, gamma)
    value = TrueValue(value=float(returns.mean()), se=_clustered_se(returns, patient), n=int(n))
    return value, _survival_summary(days.astype(float), patient, times, horizon)


def _survival_summary(days, patient, times, horizon) -> TrueSurvival:
    alive = [(days > t).astype(float) for t in times]
    restricted = np.minimum(days, horizon)
    return TrueSurvival(
        times=tuple(float(t) for t in times),
        survival=tuple(float(a.mean()) for a in alive),
        survival_se=tuple(_clustered_se(a, patient) for a in alive),
        rmst=float(restricted.mean()),
        rmst_se=_clustered_se(restricted, patient),
        horizon=float(horizon),
        n=int(days.size),
    )
