"""Clone tables built from the timeline's one ordering equal, bit for bit, those of the pandas formulation.

The reference below is the earlier construction of a clone table, kept here as the definition: a grouped running
product of the follow ratios (pandas ``groupby().cumprod()``), the censored clones counted with ``np.unique``, and
the pre-decision and decision rows concatenated, filtered to positive length and sorted by episode then start with
a stable sort. The faster construction must give the same frame: columns in the same order, the same dtypes and
every value the same float.
"""

import numpy as np
import pandas as pd
import pytest
from surv_helpers import one_hot, random_cohort

from regimewise.errors import UserInputError
from regimewise.survival import clone_censor_weight, make_timeline
from regimewise.survival.clones import _block_cumprod
from regimewise.survival.timeline import _merged_order


def _reference_rows(timeline, ratio, censoring_weights):
    """Rows and censored count of a clone table as the pandas formulation builds them."""
    weight = pd.Series(ratio).groupby(timeline.episode, sort=False).cumprod().to_numpy()
    n_censored = int(np.unique(timeline.episode[weight == 0]).shape[0])
    if censoring_weights is not None:
        weight = weight * censoring_weights
    follow = weight > 0
    code = timeline.episode[follow]
    last = timeline.stop[follow] == timeline.end[code]
    decision_rows = pd.DataFrame(
        {
            "episode": code,
            "step": timeline.step[follow],
            "start": timeline.start[follow],
            "stop": timeline.stop[follow],
            "event": last & timeline.event[code],
            "weight": weight[follow],
        }
    )
    pre = timeline.pre_rows().assign(step=-1, weight=1.0)
    rows = pd.concat([pre, decision_rows], ignore_index=True) if len(pre) else decision_rows
    rows = rows[rows["stop"] > rows["start"]]
    rows = rows.sort_values(["episode", "start"], kind="stable").reset_index(drop=True)
    code = rows["episode"].to_numpy()
    rows.insert(1, "episode_id", timeline.episode_ids[code])
    rows.insert(2, "patient_id", timeline.patient_ids[code])
    rows["event"] = rows["event"].astype(bool)
    rows["step"] = rows["step"].astype(np.int64)
    return rows, n_censored


def _ratio(timeline, strategy):
    """Follow ratio per kept decision without grace (the formula of regimewise.survival.clones)."""
    if strategy is None:
        return np.ones(timeline.row.shape[0])
    return strategy[timeline.row, timeline.action] / timeline.proba_taken


def _assert_same(table, timeline, strategy, censoring_weights=None):
    expected, n_censored = _reference_rows(timeline, _ratio(timeline, strategy), censoring_weights)
    assert list(table.rows.columns) == list(expected.columns)
    assert list(table.rows.dtypes) == list(expected.dtypes)
    pd.testing.assert_frame_equal(table.rows, expected, check_exact=True)
    weights = table.rows["weight"].to_numpy()
    assert np.array_equal(weights.view(np.int64), expected["weight"].to_numpy().view(np.int64))  # every bit
    assert table.n_censored == n_censored


def _strategies(decisions, proba, n_actions, seed):
    """Usual care, each fixed action, a random one-hot, a stochastic one and one that no clone follows."""
    rng = np.random.default_rng(seed)
    n = len(decisions)
    fixed = {f"always {k}": one_hot(np.full(n, k), n_actions) for k in range(n_actions)}
    taken = decisions["action"].to_numpy()
    return {
        "usual care": None,
        **fixed,
        "random": one_hot(rng.integers(0, n_actions, size=n), n_actions),
        "stochastic": rng.dirichlet(np.ones(n_actions), size=n),
        "never followed": one_hot((taken + 1) % n_actions, n_actions),
        "usual care as probabilities": proba,
    }


@pytest.mark.parametrize("seed", [3, 11, 29])
def test_clone_rows_equal_the_pandas_formulation(seed):
    # random_cohort: integer days with ties between episodes, first decisions after day 0 (pre-decision rows),
    # follow-up ending before, on and after decision days, events and censoring, two episodes per patient.
    decisions, episodes, proba, _ = random_cohort(seed, n_episodes=400, n_steps=5)
    timeline = make_timeline(decisions, episodes, proba, horizon=120)
    assert (timeline.first_day > 0).any() and (timeline.first_day == 0).any()
    ipcw = np.random.default_rng(seed).uniform(1.0, 3.0, size=timeline.row.shape[0])
    for name, strategy in _strategies(decisions, proba, 3, seed).items():
        for weights in (None, ipcw):
            table = clone_censor_weight(timeline, strategy, name=name, censoring_weights=weights)
            _assert_same(table, timeline, strategy, weights)


def test_strategy_no_clone_follows_keeps_only_pre_decision_rows():
    decisions, episodes, proba, _ = random_cohort(5, n_episodes=60, n_steps=3)
    timeline = make_timeline(decisions, episodes, proba, horizon=100)
    never = one_hot((decisions["action"].to_numpy() + 1) % 3, 3)
    table = clone_censor_weight(timeline, never, name="never followed")
    _assert_same(table, timeline, never)
    # every clone with a kept decision deviates at its first one; those ending before it are not censored
    assert (table.rows["step"] == -1).all() and table.n_censored == np.unique(timeline.episode).shape[0]


def test_all_decisions_on_day_zero_gives_the_decision_column_order():
    # No pre-decision row at all: the columns come in the decisions' order (step before start).
    decisions, episodes, proba, _ = random_cohort(7, n_episodes=50, n_steps=3)
    decisions["day"] = 30.0 * decisions["step"]
    timeline = make_timeline(decisions, episodes, proba, horizon=100)
    for strategy in (None, one_hot(np.zeros(len(decisions), dtype=int), 3)):
        table = clone_censor_weight(timeline, strategy)
        _assert_same(table, timeline, strategy)
        assert list(table.rows.columns)[3] == "step"


def test_block_running_product_is_the_grouped_one():
    rng = np.random.default_rng(1)
    lengths = rng.integers(1, 9, size=300)
    episode = np.repeat(np.arange(lengths.size), lengths)
    position = np.concatenate([np.arange(k) for k in lengths])
    values = rng.uniform(0.1, 7.0, size=episode.size) / rng.uniform(0.05, 1.0, size=episode.size)
    values[rng.random(episode.size) < 0.1] = 0.0
    expected = pd.Series(values).groupby(episode, sort=False).cumprod().to_numpy()
    assert np.array_equal(_block_cumprod(values, position).view(np.int64), expected.view(np.int64))


def test_patients_are_each_episodes_first_patient_id():
    decisions, episodes, proba, _ = random_cohort(13, n_episodes=80, n_steps=3)
    timeline = make_timeline(decisions, episodes, proba, horizon=100)
    expected = decisions.groupby("episode_id", sort=False)["patient_id"].first()
    assert timeline.patient_ids.tolist() == expected.loc[timeline.episode_ids].tolist()
    assert timeline.patient_ids.dtype == object


@pytest.mark.parametrize("grace", [0, 2])
def test_action_codes_give_the_table_of_their_one_hot_matrix(grace):
    decisions, episodes, proba, _ = random_cohort(17, n_episodes=200, n_steps=4)
    timeline = make_timeline(decisions, episodes, proba, horizon=110)
    rng = np.random.default_rng(17)
    ipcw = rng.uniform(1.0, 2.0, size=timeline.row.shape[0])
    taken = decisions["action"].to_numpy()
    for codes in (rng.integers(0, 3, size=len(decisions)).astype(np.uint8), (taken + 1) % 3, np.full(len(taken), 1)):
        by_codes = clone_censor_weight(timeline, codes, grace=grace, censoring_weights=ipcw, truncate=(1, 99))
        by_matrix = clone_censor_weight(
            timeline, one_hot(codes, 3), grace=grace, censoring_weights=ipcw, truncate=(1, 99)
        )
        pd.testing.assert_frame_equal(by_codes.rows, by_matrix.rows, check_exact=True)
        assert by_codes.to_dict() == by_matrix.to_dict() and by_codes.kind == "deterministic"


@pytest.mark.parametrize(
    "codes, match",
    [
        (np.full(5, 1), r"has shape \(5,\) but"),
        (np.full(180, 3), "codes 0..2"),
        (np.full(180, -1), "codes 0..2"),
        (np.full(180, 1.0), "must be integer action codes"),
    ],
)
def test_bad_action_codes_are_refused(codes, match):
    decisions, episodes, proba, _ = random_cohort(19, n_episodes=60, n_steps=3)
    timeline = make_timeline(decisions, episodes, proba, horizon=100)
    with pytest.raises(UserInputError, match=match):
        clone_censor_weight(timeline, codes)


def test_merged_order_is_the_stable_sort():
    decisions, episodes, proba, _ = random_cohort(23, n_episodes=150, n_steps=4)
    timeline = make_timeline(decisions, episodes, proba, horizon=120)
    pre = timeline.pre_rows()
    episode = np.concatenate([pre["episode"].to_numpy(), timeline.episode])
    start = np.concatenate([pre["start"].to_numpy(), timeline.start])
    order = _merged_order(episode, start, len(pre), timeline.n_episodes)
    assert np.array_equal(order, np.lexsort((start, episode)))
    # keys a timeline cannot have (an episode's second decision before its first): counting would misplace
    # it, so the stable sort decides
    second = len(pre) + np.flatnonzero(timeline.block_position == 1)[0]
    start[second] = start[second - 1] - 0.5
    order = _merged_order(episode, start, len(pre), timeline.n_episodes)
    assert np.array_equal(order, np.lexsort((start, episode)))
    assert order[np.flatnonzero(order == second)[0] + 1] == second - 1


@pytest.mark.parametrize("longest", [1, 2, 9])
def test_block_running_product_has_the_bits_of_the_place_by_place_scan(longest):
    # Equivalence check with no outside reference: the earlier code, which found the rows at each place by
    # scanning every position, written out; the new code must give the same bits.
    rng = np.random.default_rng(longest)
    lengths = rng.integers(1, longest + 1, size=200)
    position = np.concatenate([np.arange(k) for k in lengths])
    values = rng.uniform(0.1, 7.0, size=position.size) / rng.uniform(0.05, 1.0, size=position.size)
    values[rng.random(position.size) < 0.1] = 0.0
    expected = values.copy()
    for place in range(1, int(position.max(initial=0)) + 1):
        at = np.flatnonzero(position == place)
        expected[at] = expected[at - 1] * expected[at]
    assert _block_cumprod(values, position).tobytes() == expected.tobytes()
    assert _block_cumprod(np.zeros(0), np.zeros(0, dtype=np.int64)).size == 0
