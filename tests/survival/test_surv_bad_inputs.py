"""Inputs a user can get wrong are refused with one clear line (regimewise.errors.UserInputError)."""

import numpy as np
import pytest
from surv_helpers import one_hot, random_cohort

from regimewise.errors import UserInputError
from regimewise.survival import (
    DropoutModel,
    clone_censor_weight,
    follow_diagnostics,
    make_timeline,
    survival_curve,
)

# Source: the project's error rule (one line: what, where, how to fix) in the helper rules and issue 14.


@pytest.fixture
def cohort():
    return random_cohort(11, n_episodes=30)


def _refused(call, match):
    with pytest.raises(UserInputError, match=match) as caught:
        call()
    assert "\n" not in str(caught.value)


def _timeline_cases(decisions, episodes, proba):
    proba_zero = proba.copy()
    proba_zero[0] = 0.0
    proba_zero[0, (decisions.at[0, "action"] + 1) % 3] = 1.0
    reversed_steps = decisions.iloc[::-1]
    interleaved = decisions.iloc[[0, 1, 2, 4, 3, *range(5, len(decisions))]]
    gap = decisions.assign(step=decisions["step"].where(decisions.index != 2, 5))
    proba_nan, proba_inf = proba.copy(), proba.copy()
    proba_nan[3, 1], proba_inf[5, 0] = np.nan, np.inf
    two_patients = decisions.assign(patient_id=decisions["patient_id"].where(decisions.index != 5, "someone else"))
    return [
        (lambda: make_timeline(decisions, episodes, proba_nan, 100), "1 missing or infinite value"),
        (lambda: make_timeline(decisions, episodes, proba_inf, 100), "1 missing or infinite value"),
        (lambda: make_timeline(two_patients, episodes, proba, 100), "more than one patient_id"),
        (lambda: make_timeline(decisions, episodes, proba[:-1], 100), r"has shape \(119, 3\) but \(120, K\)"),
        (lambda: make_timeline(decisions.assign(day=decisions["day"] - 5), episodes, proba, 100), "day is negative"),
        (lambda: make_timeline(decisions, episodes, proba * 1.5, 100), r"outside \[0, 1\]"),
        (lambda: make_timeline(decisions, episodes, proba - 0.5, 100), r"outside \[0, 1\]"),
        (lambda: make_timeline(decisions, episodes, proba_zero, 100), "breaks positivity"),
        (lambda: make_timeline(decisions, episodes, proba * 0.9, 100), "sum to 1"),
        (lambda: make_timeline(decisions, episodes.assign(followup_days=-1.0), proba, 100), "must be > 0"),
        (lambda: make_timeline(decisions, episodes, proba, 1e6), "beyond the longest follow-up"),
        (lambda: make_timeline(decisions, episodes, proba, -3), "horizon must be a finite number > 0"),
        (lambda: make_timeline(reversed_steps, episodes, proba, 100), "rows sorted by episode_id then step"),
        (lambda: make_timeline(interleaved, episodes, proba, 100), "not grouped by episode"),
        (lambda: make_timeline(gap, episodes, proba, 100), "steps must run 0, 1, 2"),
        (lambda: make_timeline(decisions, episodes.iloc[1:], proba, 100), "missing from episodes"),
        (lambda: make_timeline(decisions, episodes.assign(event=2), proba, 100), "must be 0 .censored. or 1"),
        (lambda: make_timeline(decisions.drop(columns="day"), episodes, proba, 100), "decisions lacks column"),
        (lambda: make_timeline(decisions.assign(action=7), episodes, proba, 100), "integer codes 0..2"),
        (lambda: make_timeline(decisions.assign(day=0.0), episodes, proba, 100), "increase strictly"),
        (lambda: make_timeline(decisions.assign(action="hold"), episodes, proba, 100), "must be numeric"),
    ]


def test_bad_records_are_refused(cohort):
    decisions, episodes, proba, _ = cohort
    for call, match in _timeline_cases(decisions, episodes, proba):
        _refused(call, match)


def test_bad_strategy_and_settings_are_refused(cohort):
    decisions, episodes, proba, states = cohort
    timeline = make_timeline(decisions, episodes, proba, 100)
    strategy = one_hot(np.zeros(len(decisions), dtype=int), 3)
    table = clone_censor_weight(timeline, strategy)
    cases = [
        (lambda: clone_censor_weight(timeline, strategy[:-1]), "strategy probabilities has shape"),
        (lambda: clone_censor_weight(timeline, strategy[:, :2]), "strategy probabilities has shape"),
        (lambda: clone_censor_weight(timeline, strategy * 0.5), "sum to 1"),
        (lambda: clone_censor_weight(timeline, strategy, grace=-1), "non-negative integer"),
        (lambda: clone_censor_weight(timeline, strategy, grace=1.5), "non-negative integer"),
        (lambda: clone_censor_weight(timeline, strategy, truncate=(99, 1)), "0 <= low < high <= 100"),
        (lambda: clone_censor_weight(timeline, strategy, truncate=5), "two percentiles"),
        (lambda: clone_censor_weight(timeline, strategy, censoring_weights=[1.0, 2.0]), "has 2 rows but"),
        (lambda: survival_curve(table, [50, 150], 100), r"must lie in \[0, 100\]"),
        (lambda: survival_curve(table, [-1], 100), r"must lie in \[0, 100\]"),
        (lambda: follow_diagnostics(table, [10], min_ess=0), "min_ess must be a finite number > 0"),
        (lambda: DropoutModel().fit(timeline, states[:-1]), "dropout states have shape"),
        (lambda: DropoutModel().predict_proba(timeline, states), "not fitted"),
    ]
    for call, match in cases:
        _refused(call, match)
