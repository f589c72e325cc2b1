"""Weighted Kaplan–Meier: identities, Gehan's 6-MP data, and numpy against lifelines."""

import json

import numpy as np
import pytest
from lifelines import KaplanMeierFitter
from lifelines.utils import restricted_mean_survival_time
from surv_helpers import gehan, one_hot, point_treatment, random_cohort

from regimewise.survival import (
    clone_censor_weight,
    contrast,
    kaplan_meier,
    make_timeline,
    product_limit,
    survival_curve,
)
from regimewise.survival.curves import step_value


def _step_integral(times, survival, horizon):
    """∫_0^horizon of the product-limit step function (exact), independent of lifelines."""
    knots = np.concatenate([[0.0], times[times < horizon], [horizon]])
    levels = np.concatenate([[1.0], survival[times < horizon]])
    return float(np.sum(np.diff(knots) * levels))


def test_natural_course_has_weight_one_and_equals_unweighted_kaplan_meier():
    # Source: the identity in the issue and METHODS.md ("with no deviations every weight is 1 and the curve equals
    # ordinary Kaplan–Meier"), checked against lifelines' unweighted KaplanMeierFitter on the episodes.
    decisions, episodes, proba, _ = random_cohort(1)
    horizon = 120.0
    table = clone_censor_weight(make_timeline(decisions, episodes, proba, horizon))
    assert np.all(table.rows["weight"].to_numpy() == 1.0) and table.n_censored == 0
    durations = np.minimum(episodes["followup_days"], horizon)
    observed = (episodes["event"] == 1) & (episodes["followup_days"] <= horizon)
    reference = KaplanMeierFitter().fit(durations, observed)
    grid = np.arange(0.0, horizon + 1)
    curve = survival_curve(table, grid, horizon)
    np.testing.assert_allclose(curve.survival, reference.survival_function_at_times(grid).to_numpy(), atol=1e-12)
    assert curve.rmst == pytest.approx(restricted_mean_survival_time(reference, t=horizon), abs=1e-9)


def test_strategy_equal_to_usual_care_probabilities_gives_the_natural_course():
    # Source: exact algebra, π_s / p̂ = 1 at every decision when the strategy is usual care itself.
    decisions, episodes, proba, _ = random_cohort(2)
    timeline = make_timeline(decisions, episodes, proba, 100.0)
    as_strategy = clone_censor_weight(timeline, proba)
    natural = clone_censor_weight(timeline)
    assert as_strategy.kind == "stochastic" and natural.kind == "natural course"
    assert as_strategy.rows.equals(natural.rows)


WEEKS = [6, 7, 10, 13, 16, 22, 23]
SIX_MP = [0.857, 0.807, 0.753, 0.690, 0.627, 0.538, 0.448]


def _gehan_curve(group):
    data = gehan().query("group == @group").reset_index(drop=True)
    decisions, episodes = point_treatment(data.index, np.zeros(len(data)), data["weeks"], data["relapse"])
    timeline = make_timeline(decisions, episodes, np.ones((len(data), 1)), horizon=float(data["weeks"].max()))
    return clone_censor_weight(timeline, name=f"group {group}"), timeline.horizon


def test_gehan_six_mp_curve_and_medians():
    # Source: Kleinbaum & Klein, Survival Analysis: A Self-Learning Text, ch. 2 (6-MP group, weeks 6..23;
    # medians 23 and 8 weeks) (values from memory, confirmed by computation; also in METHODS.md).
    table, horizon = _gehan_curve(2)
    curve = survival_curve(table, WEEKS, horizon)
    np.testing.assert_allclose(curve.at(WEEKS), SIX_MP, atol=5e-4)
    times, survival = product_limit(table.rows["start"], table.rows["stop"], table.rows["event"], table.rows["weight"])
    np.testing.assert_allclose(step_value(WEEKS, times, survival), SIX_MP, atol=5e-4)
    assert curve.median == 23
    placebo, placebo_horizon = _gehan_curve(1)
    assert survival_curve(placebo, [8], placebo_horizon).median == 8


@pytest.mark.filterwarnings("ignore:It looks like your weights are not integers")
def test_numpy_product_limit_equals_lifelines_with_entry_and_weights():
    # Source: lifelines KaplanMeierFitter (entry=, weights=) as the reference library; continuous random times,
    # so no entry time equals an event time and both risk-set conventions agree.
    rng = np.random.default_rng(np.random.SeedSequence(3))
    n = 400
    entry = rng.uniform(0, 5, n) * (rng.uniform(size=n) < 0.5)
    stop = entry + rng.exponential(3.0, n)
    event = rng.uniform(size=n) < 0.6
    weight = rng.gamma(2.0, 1.5, n)
    times, survival = product_limit(entry, stop, event, weight)
    fitted = KaplanMeierFitter().fit(stop, event, entry=entry, weights=weight)
    np.testing.assert_allclose(survival, fitted.survival_function_at_times(times).to_numpy(), rtol=0, atol=1e-10)


def test_risk_set_is_start_exclusive_at_decision_days():
    # Source: the counting-process risk set (start, stop] (Andersen & Gill 1982), by hand: a clone whose rows are
    # [0, 5) and [5, 10) and another with an event at day 5 give Ŝ(5) = 1 - 1/2, not 1 - 1/3.
    times, survival = product_limit([0, 5, 0], [5, 10, 5], [False, False, True], [1.0, 1.0, 1.0])
    assert times.tolist() == [5.0] and survival.tolist() == [0.5]
    fitted = KaplanMeierFitter().fit([5, 10, 5], [0, 0, 1], entry=[0, 5, 0])
    assert fitted.survival_function_at_times([5.0]).iloc[0] == pytest.approx(0.5, abs=1e-15)


def test_lifelines_fit_of_clone_rows_equals_numpy_when_breaks_fall_on_event_days():
    # Source: our numpy product-limit (independent of lifelines) on clone rows with integer days, where decision
    # days coincide with other clones' event days; non-integer weights.
    decisions, episodes, proba, _ = random_cohort(4)
    timeline = make_timeline(decisions, episodes, proba, 120.0)
    always_0 = one_hot(np.zeros(len(decisions), dtype=int), 3)
    for table in (clone_censor_weight(timeline), clone_censor_weight(timeline, always_0)):
        rows = table.rows
        breaks = set(rows.loc[rows["start"] > 0, "start"]) & set(rows.loc[rows["event"], "stop"])
        assert breaks, "the check needs decision days that are also event days"
        times, survival = product_limit(rows["start"], rows["stop"], rows["event"], rows["weight"])
        fitted = kaplan_meier(table).survival_function_at_times(times).to_numpy()
        np.testing.assert_allclose(fitted, survival, rtol=0, atol=1e-10)


def test_rmst_from_lifelines_equals_exact_step_integral():
    # Source: exact integral of the numpy step function against lifelines.utils.restricted_mean_survival_time.
    decisions, episodes, proba, _ = random_cohort(5)
    timeline = make_timeline(decisions, episodes, proba, 110.0)
    table = clone_censor_weight(timeline, one_hot(np.ones(len(decisions), dtype=int), 3), grace=1)
    curve = survival_curve(table, [55.0], 110.0)
    times, survival = product_limit(table.rows["start"], table.rows["stop"], table.rows["event"], table.rows["weight"])
    assert curve.rmst == pytest.approx(_step_integral(times, survival, 110.0), abs=1e-9)


def test_contrast_and_json():
    # Source: definitions (Hernán & Robins, What If, ch. 17): risk difference and ratio of 1 - S at each time.
    decisions, episodes, proba, _ = random_cohort(6)
    timeline = make_timeline(decisions, episodes, proba, 100.0)
    usual = survival_curve(clone_censor_weight(timeline), [50, 100], 100.0)
    always_2 = survival_curve(
        clone_censor_weight(timeline, one_hot(np.full(len(decisions), 2), 3), name="a2"), [50, 100], 100.0
    )
    result = contrast(always_2, usual, [50, 100])
    np.testing.assert_allclose(result.risk_difference, always_2.risk[[0, 1]] - usual.risk[[0, 1]], atol=1e-15)
    np.testing.assert_allclose(result.risk_ratio, always_2.risk[[0, 1]] / usual.risk[[0, 1]], rtol=1e-14)
    assert result.rmst_difference == pytest.approx(always_2.rmst - usual.rmst)
    for item in (result, usual):
        text = json.dumps(item.to_dict(), allow_nan=False)
        assert list(json.loads(text)) == sorted(json.loads(text))
