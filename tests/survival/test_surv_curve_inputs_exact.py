"""The curve code's leaner input handling gives the same numbers, bit for bit, as the plain formulation.

* :func:`product_limit` reads its distinct event times off the stop-sorted rows; the reference is
  ``np.unique(stop[event & (weight > 0)])`` and the rest of the estimator as written before.
* Clone tables holding every row of their timeline share one pair of sorts (``CloneTable.sort_orders``); the
  diagnostics from them equal those of the table sorting its own rows.
* :func:`kaplan_meier` passes lifelines the four columns of the rows with a positive weight without copying the
  clone table; the reference fits lifelines' ``KaplanMeierFitter`` on the filtered frame, as before.

Data: lifelines' shipped Gehan 6-MP remission data (``lifelines/datasets/gehan.dat``, Gehan 1965) with entry
times and weights added, and random clone tables with ties on decision days, zero weights and censoring.
"""

import dataclasses
import json
import warnings

import numpy as np
import pandas as pd
import pytest
from lifelines import KaplanMeierFitter
from surv_helpers import gehan, one_hot, random_cohort

from regimewise.errors import UserInputError
from regimewise.survival import clone_censor_weight, follow_diagnostics, kaplan_meier, make_timeline, product_limit
from regimewise.survival.clones import CloneTable


def _reference_product_limit(start, stop, event, weight):
    """The estimator with the distinct event times from ``np.unique`` (the earlier formulation)."""
    start, stop, weight = (np.asarray(x, dtype=float) for x in (start, stop, weight))
    event = np.asarray(event, dtype=bool) & (weight > 0)
    times = np.unique(stop[event])
    died = np.bincount(np.searchsorted(times, stop[event]), weights=weight[event], minlength=times.shape[0])
    order_stop, order_start = np.argsort(stop), np.argsort(start)
    tail_stop = np.append(np.cumsum(weight[order_stop][::-1])[::-1], 0.0)
    tail_start = np.append(np.cumsum(weight[order_start][::-1])[::-1], 0.0)
    at_risk = (
        tail_stop[np.searchsorted(stop[order_stop], times, side="left")]
        - tail_start[np.searchsorted(start[order_start], times, side="left")]
    )
    return times, np.cumprod(1.0 - died / at_risk)


def _bits(values):
    return np.asarray(values, dtype=float).view(np.int64)


def _gehan_rows(seed):
    """Gehan's remission weeks as rows with random entry before the stop, random weights and some zero weights."""
    data = gehan()
    rng = np.random.default_rng(seed)
    stop = data["weeks"].to_numpy(dtype=float)
    start = np.floor(stop * rng.uniform(0.0, 0.9, size=stop.size))
    weight = rng.uniform(0.2, 4.0, size=stop.size)
    weight[rng.random(stop.size) < 0.15] = 0.0
    return start, stop, data["relapse"].to_numpy(dtype=bool), weight


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_product_limit_equals_the_unique_formulation_on_gehan(seed):
    start, stop, event, weight = _gehan_rows(seed)
    times, survival = product_limit(start, stop, event, weight)
    expected_times, expected = _reference_product_limit(start, stop, event, weight)
    assert np.array_equal(_bits(times), _bits(expected_times))
    assert np.array_equal(_bits(survival), _bits(expected))


def test_product_limit_without_events_has_no_times():
    times, survival = product_limit([0.0, 1.0], [2.0, 3.0], [False, True], [1.0, 0.0])
    assert times.shape == (0,) and survival.shape == (0,) and times.dtype == np.float64


def _reference_kaplan_meier(table):
    rows = table.rows[table.rows["weight"] > 0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return KaplanMeierFitter().fit(
            durations=rows["stop"].to_numpy(dtype=float),
            event_observed=rows["event"].to_numpy(dtype=bool),
            entry=rows["start"].to_numpy(dtype=float),
            weights=rows["weight"].to_numpy(dtype=float),
            label=table.name,
        )


def _same_fit(fitted, expected):
    assert fitted._label == expected._label
    for name in ("survival_function_", "event_table"):
        pd.testing.assert_frame_equal(getattr(fitted, name), getattr(expected, name), check_exact=True)
    assert np.array_equal(_bits(fitted.survival_function_), _bits(expected.survival_function_))
    assert fitted.median_survival_time_ == expected.median_survival_time_ or (
        np.isnan(fitted.median_survival_time_) and np.isnan(expected.median_survival_time_)
    )


def test_kaplan_meier_on_gehan_rows_with_zero_weights_equals_the_filtered_frame():
    start, stop, event, weight = _gehan_rows(4)
    assert (weight == 0).any()
    rows = pd.DataFrame({"episode": np.arange(stop.size), "start": start, "stop": stop, "event": event})
    rows["weight"] = weight
    table = CloneTable("gehan", rows, stop.size, "stochastic", 0, 0, None)
    _same_fit(kaplan_meier(table), _reference_kaplan_meier(table))


@pytest.mark.parametrize("seed", [2, 9])
def test_kaplan_meier_of_clone_tables_equals_the_filtered_frame(seed):
    decisions, episodes, proba, _ = random_cohort(seed, n_episodes=300, n_steps=4)
    timeline = make_timeline(decisions, episodes, proba, horizon=120)
    strategies = {"usual care": None, "always 2": one_hot(np.full(len(decisions), 2), 3), "stochastic": proba[::-1]}
    for name, strategy in strategies.items():
        table = clone_censor_weight(timeline, strategy, name=name, truncate=(5, 95))
        _same_fit(kaplan_meier(table), _reference_kaplan_meier(table))


def test_kaplan_meier_of_a_table_no_clone_follows_is_none():
    rows = pd.DataFrame({"start": [0.0], "stop": [4.0], "event": [True], "weight": [0.0]})
    assert kaplan_meier(CloneTable("nobody", rows, 1, "deterministic", 0, 1, None)) is None


def _diagnostics_bits(table, grid):
    out = follow_diagnostics(table, grid, 5.0).to_dict()
    return json.dumps(out, sort_keys=True, allow_nan=True)


def test_tables_with_every_row_share_sorts_that_give_the_same_diagnostics():
    decisions, episodes, proba, _ = random_cohort(31, n_episodes=300, n_steps=4)
    timeline = make_timeline(decisions, episodes, proba, horizon=120)
    ipcw = np.random.default_rng(31).uniform(1.0, 2.5, size=timeline.row.shape[0])
    usual = clone_censor_weight(timeline, None, censoring_weights=ipcw)
    stochastic = clone_censor_weight(timeline, proba[::-1], censoring_weights=ipcw, truncate=(2, 98))
    censoring = clone_censor_weight(timeline, one_hot(np.zeros(len(decisions), dtype=int), 3))
    assert usual.sort_orders is not None and stochastic.sort_orders is usual.sort_orders
    assert censoring.sort_orders is None and censoring.n_censored > 0
    grid = np.arange(0.0, 121.0, 10.0)
    for table in (usual, stochastic):
        unsorted = dataclasses.replace(table, sort_orders=None)
        assert _diagnostics_bits(table, grid) == _diagnostics_bits(unsorted, grid)
        rows = table.rows
        shared = product_limit(rows["start"], rows["stop"], rows["event"], rows["weight"], table.sort_orders)
        own = product_limit(rows["start"], rows["stop"], rows["event"], rows["weight"])
        assert all(np.array_equal(_bits(a), _bits(b)) for a, b in zip(shared, own, strict=True))


def test_product_limit_refuses_orders_of_other_rows():
    orders = (np.arange(2), np.arange(2))
    with pytest.raises(UserInputError, match="argsorts of these stop and start"):
        product_limit([0.0, 0.0, 1.0], [1.0, 2.0, 3.0], [True, False, True], [1.0, 1.0, 1.0], orders)
