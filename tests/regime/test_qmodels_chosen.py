"""A regime given by its action codes, valued without its one-hot probabilities (``chosen_value``, and
``evaluate_policies`` with code targets), against the computation it replaces, bit for bit.

These are equivalence checks with no outside reference: the replaced computation is written out below as the
reference, on small invented data with the awkward values (-0.0, infinities, NaN at actions not chosen)."""

from __future__ import annotations

import numpy as np
import pytest

from regimewise.errors import UserInputError
from regimewise.regime.qmodels import chosen_value, evaluate_policies


def replaced_average(q, codes, action_labels=None):
    """The replaced computation: one-hot probabilities of the codes, then Σ_a π(a|s) Q(s, a) as policy_average
    took it."""
    proba = np.zeros((codes.shape[0], q.shape[1]))
    proba[np.arange(codes.shape[0]), codes] = 1.0
    undefined = (proba > 0) & np.isnan(q)
    if undefined.any():
        row, a = np.argwhere(undefined)[0]
        label = f"action {str(action_labels[int(a)])!r}" if action_labels is not None else f"action code {int(a)}"
        raise UserInputError(
            f"the evaluated regime gives {label} probability {proba[row, a]:.3g} at a "
            "decision where that action never occurs in the data at that step, so its value cannot be fitted; "
            "restrict the regime to actions seen at every step."
        )
    return np.where(proba > 0, proba * np.nan_to_num(q), 0.0).sum(axis=1)


def awkward_q(m, k, seed=0):
    rng = np.random.default_rng(seed)
    q = rng.normal(size=(m, k)) * 10.0 ** rng.integers(-300, 300, size=(m, k))
    q[rng.random((m, k)) < 0.1] = -0.0
    q[rng.random((m, k)) < 0.05] = 0.0
    q[rng.random((m, k)) < 0.03] = np.inf
    q[rng.random((m, k)) < 0.03] = -np.inf
    return q


@pytest.mark.parametrize("k", [1, 2, 4])
@pytest.mark.parametrize("dtype", [np.uint8, np.int64])
def test_chosen_value_is_the_one_hot_average_bit_for_bit(k, dtype):
    q = awkward_q(5000, k, seed=k)
    codes = np.random.default_rng(7).integers(0, k, 5000).astype(dtype)
    got, want = chosen_value(q, codes), replaced_average(q, codes)
    assert got.dtype == want.dtype and got.shape == want.shape
    assert got.tobytes() == want.tobytes()  # -0.0 against +0.0 too
    chosen = q[np.arange(5000), codes]
    assert ((chosen == 0) & np.signbit(chosen)).any() and np.isinf(chosen).any()  # -0.0 and infinities chosen


def test_chosen_value_ignores_nan_of_actions_not_chosen():
    q = awkward_q(300, 3, seed=2)
    codes = np.random.default_rng(3).integers(0, 3, 300)
    other = (codes + 1) % 3
    q[np.arange(300), other] = np.nan
    assert chosen_value(q, codes).tobytes() == replaced_average(q, codes).tobytes()


@pytest.mark.parametrize("labels", [None, ("hold", "up", "down")])
def test_chosen_value_fails_as_the_one_hot_average_does(labels):
    q = awkward_q(50, 3, seed=4)
    codes = np.random.default_rng(5).integers(0, 3, 50)
    q[17, codes[17]] = np.nan
    q[30, codes[30]] = np.nan
    with pytest.raises(UserInputError) as want:
        replaced_average(q, codes, labels)
    with pytest.raises(UserInputError) as got:
        chosen_value(q, codes, labels)
    assert str(got.value) == str(want.value)


def decision_table(n_episodes, horizon, k, seed=0):
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, horizon + 1, n_episodes)
    episode = np.repeat(np.arange(n_episodes), lengths)
    step = np.concatenate([np.arange(n) for n in lengths])
    n = step.size
    X = rng.normal(size=(n, 3))
    action = rng.integers(0, k, n)
    reward = rng.normal(size=n)
    return X, step, action, reward, episode


@pytest.mark.parametrize("part", [False, True])
def test_evaluate_policies_with_codes_equals_their_one_hot_probabilities(part):
    k, horizon = 3, 4
    X, step, action, reward, episode = decision_table(400, horizon, k)
    rng = np.random.default_rng(9)
    codes = [rng.integers(0, k, X.shape[0]).astype(np.uint8) for _ in range(3)]
    one_hot = [np.eye(k)[c] for c in codes]
    kwargs = dict(horizon=horizon, n_actions=k, gamma=0.9, alpha=0.5)
    rows = np.flatnonzero(episode % 3 != 0) if part else None
    sub = slice(None) if rows is None else rows
    sub_episode = episode if rows is None else np.unique(episode[rows], return_inverse=True)[1]
    table = (X, step[sub], action[sub], reward[sub], sub_episode)
    got = evaluate_policies(*table, codes, x_rows=rows, **kwargs)
    want = evaluate_policies(*table, one_hot, x_rows=rows, **kwargs)
    for (q_got, v_got), (q_want, v_want) in zip(got, want):
        assert q_got.tobytes() == q_want.tobytes() and v_got.tobytes() == v_want.tobytes()


def test_evaluate_policies_with_codes_fails_where_the_one_hot_probabilities_fail():
    k, horizon = 3, 2
    X, step, action, reward, episode = decision_table(200, horizon, k, seed=1)
    action[step == 1] = np.where(action[step == 1] == 2, 0, action[step == 1])  # action 2 never seen at step 1
    codes = np.full(X.shape[0], 2, dtype=np.uint8)
    kwargs = dict(horizon=horizon, n_actions=k, gamma=1.0, alpha=0.0, action_labels=("a", "b", "c"))
    (got,) = evaluate_policies(X, step, action, reward, episode, [codes], **kwargs)
    (want,) = evaluate_policies(X, step, action, reward, episode, [np.eye(k)[codes]], **kwargs)
    assert isinstance(got, UserInputError) and str(got) == str(want)
