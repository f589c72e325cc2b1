"""A small finite-horizon Markov decision process with exact answers, for the sequential tests.

Everything here is written out in tables and solved by exact backward induction with numpy, independently
of the package: it is the external yardstick for fitted-Q iteration, fitted-Q evaluation and the
importance-sampling estimators (Puterman 1994, Markov Decision Processes, ch. 4, finite-horizon backward
induction; chapter cited from memory).

The process has three states, three actions and three decision steps. After the action at step t the
process moves to one of the three states or ends (outcome index ``END``); an episode also ends after the
last step. Rewards are the table value plus Gaussian noise. Usual care (the behaviour policy) gives every
action a probability of at least 0.15 in every state and step.

The tables were designed by hand so that the optimal action beats the second best by more than 0.9 in every
state and step (checked by ``tests/test_fqi.py``), which lets a large sample recover the optimal policy.
"""

from dataclasses import dataclass

import numpy as np

from regimewise.evaluation.fqe import FittedQEvaluation
from regimewise.evaluation.ope import evaluate_off_policy

N_STATES = 3
N_ACTIONS = 3
HORIZON = 3
END = N_STATES  # outcome index of "the episode ends here"


@dataclass(frozen=True, eq=False)
class SmallMDP:
    """Tables of the process: initial distribution, transitions, mean rewards and usual care."""

    initial: np.ndarray  # (S,)
    transition: np.ndarray  # (H, S, K, S + 1): last outcome = the episode ends
    reward_mean: np.ndarray  # (H, S, K)
    behaviour: np.ndarray  # (H, S, K)
    reward_sd: float = 1.0


def make_mdp():
    """Return the process used by the tests (all numbers invented)."""
    initial = np.array([0.5, 0.3, 0.2])
    # reward_mean[t, s, a]
    reward_mean = np.array(
        [
            [[1.0, 0.0, -0.5], [0.0, 1.5, 0.2], [-1.0, 0.0, 1.0]],
            [[0.5, 1.8, 0.0], [2.0, 0.0, 0.5], [0.0, -0.5, 1.5]],
            [[0.0, 0.5, 2.0], [1.0, 2.5, 0.0], [3.0, 1.0, 0.0]],
        ]
    )
    # transition[t, s, a, s'] over s' in (0, 1, 2, END); the same at every step except that step 2 ends anyway
    one_step = np.array(
        [
            [[0.6, 0.2, 0.1, 0.1], [0.2, 0.5, 0.2, 0.1], [0.1, 0.2, 0.6, 0.1]],
            [[0.3, 0.4, 0.2, 0.1], [0.5, 0.3, 0.1, 0.1], [0.2, 0.2, 0.4, 0.2]],
            [[0.1, 0.3, 0.5, 0.1], [0.4, 0.3, 0.2, 0.1], [0.3, 0.3, 0.3, 0.1]],
        ]
    )
    transition = np.stack([one_step] * HORIZON)
    # usual care: behaviour[t, s, a], full support
    behaviour = np.array(
        [
            [[0.6, 0.25, 0.15], [0.2, 0.6, 0.2], [0.5, 0.3, 0.2]],
            [[0.3, 0.5, 0.2], [0.15, 0.25, 0.6], [0.2, 0.2, 0.6]],
            [[0.6, 0.2, 0.2], [0.3, 0.5, 0.2], [0.15, 0.7, 0.15]],
        ]
    )
    return SmallMDP(initial=initial, transition=transition, reward_mean=reward_mean, behaviour=behaviour)


# --------------------------------------------------------------------------------------------------------
# exact dynamic programming


def _continuation(transition_t, v_next):
    """Expected next-step value Σ_s' P(s'|s,a) V(s'), with V(END) = 0."""
    return transition_t[..., :N_STATES] @ v_next


def backward_induction(transition, reward_mean, gamma=1.0, permitted=None, fallback=None):
    """Exact optimal Q, V and policy by backward induction (Puterman 1994, ch. 4).

    ``permitted`` (H, S, K) restricts the maximisation; a state with no permitted action takes
    ``fallback[t, s]``.
    """
    horizon, n_states, n_actions = reward_mean.shape
    q = np.zeros((horizon, n_states, n_actions))
    v = np.zeros((horizon + 1, n_states))
    policy = np.zeros((horizon, n_states), dtype=int)
    for t in range(horizon - 1, -1, -1):
        q[t] = reward_mean[t] + gamma * _continuation(transition[t], v[t + 1])
        masked = q[t] if permitted is None else np.where(permitted[t], q[t], -np.inf)
        policy[t] = masked.argmax(axis=1)
        if permitted is not None:
            none = ~permitted[t].any(axis=1)
            policy[t][none] = fallback[t][none]
        v[t] = q[t][np.arange(n_states), policy[t]]
    return q, v[:horizon], policy


def evaluate_policy(transition, reward_mean, policy_proba, gamma=1.0):
    """Exact Q and V of a fixed (possibly stochastic) policy ``policy_proba`` (H, S, K)."""
    horizon, n_states, n_actions = reward_mean.shape
    q = np.zeros((horizon, n_states, n_actions))
    v = np.zeros((horizon + 1, n_states))
    for t in range(horizon - 1, -1, -1):
        q[t] = reward_mean[t] + gamma * _continuation(transition[t], v[t + 1])
        v[t] = (policy_proba[t] * q[t]).sum(axis=1)
    return q, v[:horizon]


def deterministic_proba(policy, n_actions=N_ACTIONS):
    """One-hot (H, S, K) probabilities of a deterministic policy given as actions (H, S)."""
    return np.eye(n_actions)[policy]


# --------------------------------------------------------------------------------------------------------
# logged data


def _draw(rng, proba):
    """One categorical draw per row of ``proba`` (rows sum to one), vectorised."""
    u = rng.random(proba.shape[0])
    return np.minimum((u[:, None] > proba.cumsum(axis=1)).sum(axis=1), proba.shape[1] - 1)


def sample_episodes(mdp, n_episodes, seed):
    """Logged episodes under usual care, in the package's long format (one row per decision).

    Returns a dict with ``X`` (one-hot state), ``state``, ``step``, ``action``, ``reward``, ``episode`` and
    ``behaviour_proba`` (the true usual-care probabilities), rows sorted by episode then step.
    """
    rng = np.random.default_rng(seed)
    state = np.full((n_episodes, HORIZON), -1)
    action = np.full((n_episodes, HORIZON), -1)
    reward = np.zeros((n_episodes, HORIZON))
    current = _draw(rng, np.broadcast_to(mdp.initial, (n_episodes, N_STATES)))
    alive = np.ones(n_episodes, dtype=bool)
    for t in range(HORIZON):
        idx = np.flatnonzero(alive)
        s = current[idx]
        a = _draw(rng, mdp.behaviour[t, s])
        state[idx, t], action[idx, t] = s, a
        reward[idx, t] = mdp.reward_mean[t, s, a] + mdp.reward_sd * rng.standard_normal(idx.size)
        outcome = _draw(rng, mdp.transition[t, s, a])
        alive[idx[outcome == END]] = False
        current[idx] = np.where(outcome == END, 0, outcome)
    keep = state >= 0  # row-major order keeps episodes contiguous and steps ascending
    s = state[keep]
    t = np.broadcast_to(np.arange(HORIZON), state.shape)[keep]
    return {
        "X": np.eye(N_STATES)[s],
        "state": s,
        "step": t,
        "action": action[keep],
        "reward": reward[keep],
        "episode": np.broadcast_to(np.arange(n_episodes)[:, None], state.shape)[keep],
        "behaviour_proba": mdp.behaviour[t, s],
    }


def split_samples(log, n_per_sample):
    """Cut one big log into consecutive samples of ``n_per_sample`` episodes, episode codes restarting at 0."""
    sample_of_row = log["episode"] // n_per_sample
    bounds = np.searchsorted(sample_of_row, np.arange(sample_of_row.max() + 2))
    for k, (lo, hi) in enumerate(zip(bounds[:-1], bounds[1:])):
        part = {name: values[lo:hi] for name, values in log.items()}
        part["episode"] = part["episode"] - k * n_per_sample
        yield part


def empirical_mdp(log):
    """Initial distribution, transition frequencies and mean rewards counted from a log.

    Returns ``(initial, transition, reward_mean, counts)``; cells never visited have NaN rewards and
    transitions (``counts`` == 0).
    """
    s, t, a = log["state"], log["step"], log["action"]
    counts = np.zeros((HORIZON, N_STATES, N_ACTIONS))
    np.add.at(counts, (t, s, a), 1)
    reward_sum = np.zeros_like(counts)
    np.add.at(reward_sum, (t, s, a), log["reward"])
    following = np.full(s.size, END)
    same = log["episode"][1:] == log["episode"][:-1]
    following[:-1][same] = s[1:][same]
    moves = np.zeros((HORIZON, N_STATES, N_ACTIONS, N_STATES + 1))
    np.add.at(moves, (t, s, a, following), 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        reward_mean = reward_sum / counts
        transition = moves / counts[..., None]
    initial = np.bincount(s[t == 0], minlength=N_STATES) / np.sum(t == 0)
    return initial, transition, reward_mean, counts


def rows_proba(policy_proba, log):
    """Probabilities (n, K) a policy given as (H, S, K) assigns at each logged decision."""
    return policy_proba[log["step"], log["state"]]


def off_policy_estimates(sample, proba):
    """Every off-policy estimate (IS … WDR, with fitted-Q evaluation as DR's outcome model) of the policy ``proba``
    on one logged sample, and the fitted-Q evaluation's value."""
    target = rows_proba(proba, sample)
    X, step, action = sample["X"], sample["step"], sample["action"]
    fqe = FittedQEvaluation(N_ACTIONS, HORIZON).fit(X, step, action, sample["reward"], sample["episode"], target)
    q_taken, v_target = fqe.taken_and_target_values(X, step, action, target)
    out = evaluate_off_policy(
        step,
        action,
        sample["reward"],
        sample["episode"],
        sample["behaviour_proba"],
        target,
        horizon=HORIZON,
        q_taken=q_taken,
        v_target=v_target,
    )
    first = step == 0
    return out, fqe.value_estimate(X[first], target[first])
