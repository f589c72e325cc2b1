"""Off-policy estimators of a regime's value from decisions logged under usual care.

Every estimator here uses the same importance weights, computed once by :func:`importance_weights`:
ρ_{i,t} = Π_{u<=t} π_e(a_{i,u}|s_{i,u}) / π_b(a_{i,u}|s_{i,u}), the running product over episode i of the
evaluated regime's probability of the action taken over usual care's.

Episodes shorter than the horizon H are padded to H steps as if absorbed: after its last decision an
episode earns zero reward, keeps its last weight, and has Q̂ = V̂ = 0. Keeping the weight means that the
self-normalised estimators divide, at every step, by the weights of all episodes, including those already
ended; with the evaluated regime equal to usual care every weight is 1 and each weighted estimator equals
the mean observed return.

The data layout is that of :mod:`regimewise.regime.fqi` (long format, rows sorted by episode then step).

References
----------
Precup, D., Sutton, R. S. & Singh, S. (2000). Eligibility traces for off-policy policy evaluation. ICML.
Jiang, N. & Li, L. (2016). Doubly robust off-policy value evaluation for reinforcement learning. ICML.
Thomas, P. S. & Brunskill, E. (2016). Data-efficient off-policy policy evaluation for reinforcement
learning. ICML.
Kish, L. (1965). Survey Sampling. Wiley (effective sample size).
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import asdict, dataclass

import numpy as np

from regimewise.core.arrays import (
    action_name,
    check_codes,
    check_finite,
    check_layout,
    check_proba,
    finite_or_none,
)
from regimewise.core.weighting import kish_ess
from regimewise.errors import StatisticalWarning, UserInputError
from regimewise.estimators import ESTIMATORS

_FOLLOW_TOLERANCE = 1e-12


# Estimators computed from importance weights (and, for the doubly robust ones, a Q-model's predictions), by
# registry name (:data:`regimewise.estimators.ESTIMATORS`), filled by :func:`computes` in definition order.
COMPUTE: dict = {}


def computes(name: str):
    """Register the decorated function as the computation of estimator ``name`` (which must be in the registry).

    A ``weights``-family function takes ``(weights, gamma)``; a ``both``-family one ``(weights, q_taken, v_target,
    gamma)``; each returns an :class:`OffPolicyEstimate` labelled with the registry's ``label``.
    """
    if name not in ESTIMATORS or ESTIMATORS[name].family == "model":
        raise KeyError(f"{name!r} is not a weights or doubly robust estimator of regimewise.estimators.ESTIMATORS")

    def register(function):
        COMPUTE[name] = function
        return function

    return register


@dataclass(frozen=True)
class OffPolicyEstimate:
    """One estimator's value of a regime with the diagnostics of its importance weights.

    Attributes
    ----------
    estimator : str
        Short name: IS, WIS, PDIS, PDWIS, DR or WDR.
    value : float
        Estimated expected (discounted) return; NaN when no episode has a positive weight.
    ess : float
        Kish effective sample size (Σρ)² / Σρ² of the full-trajectory weights.
    ess_fraction : float
        ``ess`` divided by the number of episodes.
    max_weight_share : float
        Largest single episode's share of the summed full-trajectory weights (NaN if they sum to 0).
    n_following : int
        Episodes whose every observed action has probability 1 under the evaluated regime.
    n_episodes : int
    per_step_ess : tuple of float
        Kish effective sample size of the cumulative weights at each step 0..H-1.
    se : float
        Standard error over episodes where a closed form exists (IS, PDIS and DR: standard deviation of the
        per-episode terms over √n; WIS: the ratio-estimator linearisation); NaN otherwise (use the bootstrap).
    """

    estimator: str
    value: float
    ess: float
    ess_fraction: float
    max_weight_share: float
    n_following: int
    n_episodes: int
    per_step_ess: tuple
    se: float = float("nan")

    def to_dict(self):
        """Plain Python values ready for JSON; NaN becomes None."""
        out = asdict(self)
        out["per_step_ess"] = [finite_or_none(x) for x in self.per_step_ess]
        return {key: finite_or_none(value) if isinstance(value, float) else value for key, value in out.items()}


@dataclass(frozen=True, eq=False)
class ImportanceWeights:
    """Cumulative importance weights and rewards on an (episodes × horizon) grid, absorbing-padded.

    Attributes
    ----------
    cumulative : ndarray, shape (E, H)
        ρ_{i,t}; after an episode's last decision its last weight is carried.
    reward : ndarray, shape (E, H)
        Observed rewards, zero after an episode's last decision.
    row_episode, row_step : ndarray of int, shape (n,)
        Grid position of each row of the decision table.
    n_following : int
        Episodes whose every observed action has probability 1 under the evaluated regime.
    """

    cumulative: np.ndarray
    reward: np.ndarray
    row_episode: np.ndarray
    row_step: np.ndarray
    n_following: int

    @functools.cached_property
    def diagnostics(self) -> tuple[float, float, tuple]:
        """(Kish ESS of the final weights, largest final weight's share of their sum, Kish ESS at each step),
        computed once and shared by every estimator on these weights."""
        final = self.cumulative[:, -1]
        total = final.sum()
        return (
            _kish(final),
            float(final.max() / total) if total > 0 else float("nan"),
            tuple(_kish(column) for column in self.cumulative.T),
        )

    def to_grid(self, values):
        """Place per-decision ``values`` (n,) on the (E, H) grid, zero where an episode has ended."""
        if self.row_step.shape[0] == self.cumulative.size:  # every episode lasts H steps: row i is cell i
            return np.array(values, dtype=float).reshape(self.cumulative.shape)
        grid = np.zeros(self.cumulative.shape)
        grid[self.row_episode, self.row_step] = values
        return grid


def importance_weights(
    step, action, reward, episode, behaviour_proba, target_proba, *, horizon, action_labels=None, layout_checked=False
):
    """Compute the importance weights every estimator of this module shares.

    Parameters
    ----------
    step, action, reward, episode : ndarray, shape (n,)
        Decision table, rows sorted by episode then step.
    behaviour_proba : ndarray, shape (n, K)
        Usual care's (estimated) probability of every action at each decision.
    target_proba : ndarray, shape (n, K) or (n,)
        The evaluated regime's probability of every action at each decision (one-hot if deterministic), or a
        deterministic regime's action codes (n,): the weights of its one-hot probabilities, without building them.
    horizon : int
        Number of decision steps H.
    action_labels : sequence of str, optional
        The protocol's label of each action code, used to name actions in errors.
    layout_checked : bool, default False
        step, action and episode are what :func:`regimewise.core.arrays.check_layout` returned for them, and
        behaviour_proba what :func:`regimewise.core.arrays.check_proba` returned for it on these decisions (as a
        caller that weights many regimes on one table checks it once): used as they are, not checked and copied
        again for every regime.

    Returns
    -------
    ImportanceWeights

    Examples
    --------
    >>> w = importance_weights([0, 1], [0, 1], [1.0, 2.0], [0, 0], np.full((2, 2), 0.5),
    ...                        np.array([[1.0, 0.0], [0.0, 1.0]]), horizon=3)
    >>> w.cumulative.tolist()
    [[2.0, 4.0, 4.0]]
    """
    behaviour_proba = np.asarray(behaviour_proba, dtype=float)
    if behaviour_proba.ndim != 2:
        raise UserInputError(f"behaviour_proba must be (n, K), got shape {behaviour_proba.shape}.")
    n_actions = behaviour_proba.shape[1]
    if not layout_checked:
        step, action, episode = check_layout(step, action, episode, horizon, n_actions)
    n = step.shape[0]
    reward = check_finite(reward, "reward", 1)
    if reward.shape[0] != n:
        raise UserInputError(f"reward has {reward.shape[0]} values for {n} decisions; pass one per decision.")
    if not layout_checked:
        behaviour_proba = check_proba(behaviour_proba, n, n_actions, "behaviour_proba")
    codes = np.ndim(target_proba) == 1
    if codes:  # one-hot probabilities are a distribution: the codes need only be actions
        target_proba = check_codes(target_proba, "target_proba", n_actions)
        if target_proba.shape[0] != n:
            raise UserInputError(f"target_proba has {target_proba.shape[0]} action codes for {n} decisions.")
    elif not (layout_checked and target_proba is behaviour_proba):  # usual care's own, checked: not again
        target_proba = check_proba(target_proba, n, n_actions, "target_proba")
    shape = (episode[-1] + 1, horizon)
    ratio = np.ones(shape)
    followed = np.ones(shape, dtype=bool)
    unseen = 0
    # usual care's zero probabilities looked for once: without any, no decision counts towards the warning below
    some_zero = bool(behaviour_proba.min() <= 0)
    # the grids' cells in row-major order: a decision's cell is episode * horizon + step; when every episode lasts
    # the horizon, the rows fill the grid in that order and a block's cells are its rows
    full = n == ratio.size
    ratio_cells, followed_cells = ratio.reshape(-1), followed.reshape(-1)
    for start in range(0, n, WEIGHT_ROWS):  # a block of rows at a time: no n-sized temporaries per regime
        rows = slice(start, min(start + WEIGHT_ROWS, n))  # views of the block, not copies
        taken, behaviour, target = action[rows], behaviour_proba[rows], target_proba[rows]
        at = np.arange(taken.shape[0])
        taken_b = behaviour[at, taken]
        # a one-hot row's probability of the action taken is exactly 1.0 or 0.0
        taken_e = (target == taken).astype(float) if codes else target[at, taken]
        _check_positivity(taken_b, taken, action_labels, first_row=start)
        if some_zero:
            never = behaviour <= 0
            unseen += int(np.sum(never[at, target] if codes else (never & (target > 0)).any(axis=1)))
        cells = rows if full else episode[rows] * horizon + step[rows]
        ratio_cells[cells] = taken_e / taken_b
        followed_cells[cells] = taken_e >= 1 - _FOLLOW_TOLERANCE
    if unseen:
        warnings.warn(
            f"at {unseen} decisions the evaluated regime gives probability to an action usual care never takes; "
            "importance sampling cannot see those actions and its estimate is biased.",
            StatisticalWarning,
            stacklevel=2,
        )
    if full:
        grid_reward = np.array(reward, dtype=float).reshape(shape)
    else:
        grid_reward = np.zeros(shape)
        grid_reward[episode, step] = reward
    return ImportanceWeights(
        cumulative=np.cumprod(ratio, axis=1, out=ratio),
        reward=grid_reward,
        row_episode=episode,
        row_step=step,
        n_following=int(followed.all(axis=1).sum()),
    )


WEIGHT_ROWS = 65_536  # decisions whose taken probabilities are read at a time


def _check_positivity(taken_b, action, action_labels, first_row=0):
    """Refuse a taken action usual care could not take (of these rows, the table's from ``first_row``)."""
    bad = np.flatnonzero(taken_b <= 0)
    if bad.size:
        raise UserInputError(
            f"row {first_row + bad[0]}: usual care's probability of the taken "
            f"{action_name(action[bad[0]], action_labels)} is 0, so its importance weight is undefined; fix the "
            "usual-care model (e.g. bound probabilities away from 0)."
        )


def _kish(w):
    """Kish ESS (:func:`regimewise.core.weighting.kish_ess`) of a column of the (E, H) grid, 0 when every weight is
    0; the column is read once into contiguous memory for both."""
    w = np.ascontiguousarray(w)
    return kish_ess(w) if w.sum() > 0 else 0.0


def _estimate(name, value, weights, se=float("nan")):
    ess, max_weight_share, per_step_ess = weights.diagnostics
    n_episodes = weights.cumulative.shape[0]
    return OffPolicyEstimate(
        estimator=name,
        value=float(value),
        ess=ess,
        ess_fraction=ess / n_episodes,
        max_weight_share=max_weight_share,
        n_following=weights.n_following,
        n_episodes=int(n_episodes),
        per_step_ess=per_step_ess,
        se=float(se),
    )


def _mean_se(terms):
    """Standard error of the mean of independent per-episode terms: sample sd (ddof 1) over √n."""
    return float(np.std(terms, ddof=1) / np.sqrt(terms.size)) if terms.size > 1 else float("nan")


def _discounts(horizon, gamma):
    if not 0.0 <= gamma <= 1.0:
        raise UserInputError(f"gamma must lie in [0, 1], got {gamma!r}.")
    return gamma ** np.arange(horizon)


def _self_normalised(numerator, denominator):
    """numerator / denominator, NaN with a warning where no episode has a positive weight."""
    if np.any(denominator <= 0):
        warnings.warn(
            "no episode has a positive importance weight: the evaluated regime never agrees with usual care "
            "along a whole episode, so self-normalised estimators are undefined (NaN).",
            StatisticalWarning,
            stacklevel=3,
        )
        return np.full(np.shape(numerator), np.nan)
    return numerator / denominator


@computes("is")
def trajectory_is(weights, gamma=1.0):
    """Trajectory-wise importance sampling: mean over episodes of ρ_{i,H-1} · G_i (Precup et al. 2000)."""
    returns = weights.reward @ _discounts(weights.reward.shape[1], gamma)
    terms = weights.cumulative[:, -1] * returns
    return _estimate("IS", terms.mean(), weights, _mean_se(terms))


@computes("wis")
def weighted_trajectory_is(weights, gamma=1.0):
    """Weighted (self-normalised) trajectory importance sampling: Σ_i ρ_{i,H-1} G_i / Σ_i ρ_{i,H-1}.

    A convex combination of the observed returns, so it always lies within their range
    (Precup, Sutton & Singh 2000).
    """
    returns = weights.reward @ _discounts(weights.reward.shape[1], gamma)
    final = weights.cumulative[:, -1]
    value = _self_normalised(final @ returns, final.sum())
    # ratio-estimator linearisation: Var ≈ Σ_i ρ_i² (G_i − V)² / (Σ_i ρ_i)² (Cochran 1977, Sampling Techniques, §6)
    se = np.sqrt(np.sum((final * (returns - value)) ** 2)) / final.sum() if final.sum() > 0 else np.nan
    return _estimate("WIS", value, weights, se)


@computes("pdis")
def per_decision_is(weights, gamma=1.0):
    """Per-decision importance sampling: (1/n) Σ_i Σ_t γ^t ρ_{i,t} r_{i,t} (Precup, Sutton & Singh 2000)."""
    terms = (weights.cumulative * weights.reward) @ _discounts(weights.reward.shape[1], gamma)
    return _estimate("PDIS", terms.mean(), weights, _mean_se(terms))


@computes("pdwis")
def per_decision_wis(weights, gamma=1.0):
    """Per-decision weighted importance sampling: Σ_t γ^t Σ_i ρ_{i,t} r_{i,t} / Σ_i ρ_{i,t}.

    Each step's term is a weighted mean of that step's rewards, so the estimate lies between
    Σ_t γ^t min_i r_{i,t} and Σ_t γ^t max_i r_{i,t}; unlike trajectory WIS it can leave the range of
    the observed returns (Precup, Sutton & Singh 2000; Thomas & Brunskill 2016).
    """
    numerator = np.sum(weights.cumulative * weights.reward, axis=0)
    per_step = _self_normalised(numerator, weights.cumulative.sum(axis=0))
    return _estimate("PDWIS", per_step @ _discounts(per_step.size, gamma), weights)


def _doubly_robust_value(normalised, weights, q_taken, v_target, gamma):
    """Per-episode terms Σ_t γ^t [w_{i,t} r_{i,t} − (w_{i,t} Q̂_t(s, a) − w_{i,t−1} V̂_t(s))], w_{i,−1} = 1/n.

    Their sum over episodes is the estimate.
    """
    q, v = _checked_models(weights, q_taken, v_target)
    previous = np.hstack([np.full((normalised.shape[0], 1), 1.0 / normalised.shape[0]), normalised[:, :-1]])
    # normalised · r − (normalised · Q̂ − previous · V̂), each product formed in place in its own grid: the same
    # operations on the same numbers (a product does not depend on the order of its factors), fewer (E, H) grids
    model = weights.to_grid(q)
    model *= normalised
    carried = weights.to_grid(v)
    carried *= previous
    model -= carried
    del carried, previous
    terms = normalised * weights.reward
    terms -= model
    return terms @ _discounts(terms.shape[1], gamma)


def _checked_models(weights, q_taken, v_target):
    """Q̂ taken and V̂ as finite float vectors of one value per decision, or the error saying what is wrong."""
    n_rows = weights.row_step.shape[0]
    q, v = check_finite(q_taken, "q_taken", 1), check_finite(v_target, "v_target", 1)
    if not q.shape[0] == v.shape[0] == n_rows:
        raise UserInputError(f"q_taken and v_target need one value per decision ({n_rows}); pass them from fqi.")
    return q, v


@computes("dr")
def doubly_robust(weights, q_taken, v_target, gamma=1.0):
    """Doubly robust estimator for sequential decisions (Jiang & Li 2016), per-decision form.

    V = Σ_t γ^t Σ_i [w_{i,t} r_{i,t} − (w_{i,t} Q̂_t(s_{i,t}, a_{i,t}) − w_{i,t−1} V̂_t(s_{i,t}))] with
    w_{i,t} = ρ_{i,t}/n and w_{i,−1} = 1/n (the form given by Thomas & Brunskill 2016). With Q̂ ≡ 0 it is
    per-decision importance sampling.

    Parameters
    ----------
    weights : ImportanceWeights
    q_taken : ndarray, shape (n,)
        Q̂_t(s, a) of the action taken at each decision (e.g. from fitted-Q evaluation).
    v_target : ndarray, shape (n,)
        V̂_t(s) = Σ_a π_e(a|s) Q̂_t(s, a) at each decision.
    gamma : float, default 1.0
    """
    n = weights.cumulative.shape[0]
    per_episode = _doubly_robust_value(weights.cumulative / n, weights, q_taken, v_target, gamma)
    return _estimate("DR", per_episode.sum(), weights, _mean_se(n * per_episode))


@computes("wdr")
def weighted_doubly_robust(weights, q_taken, v_target, gamma=1.0):
    """Weighted doubly robust estimator (Thomas & Brunskill 2016, ICML, definition of WDR).

    V = Σ_t γ^t Σ_i [w_{i,t} r_{i,t} − (w_{i,t} Q̂_t(s_{i,t}, a_{i,t}) − w_{i,t−1} V̂_t(s_{i,t}))] with
    w_{i,t} = ρ_{i,t} / Σ_j ρ_{j,t} and w_{i,−1} = 1/n. With Q̂ ≡ 0 it is per-decision weighted importance
    sampling.

    Parameters
    ----------
    weights : ImportanceWeights
    q_taken, v_target : ndarray, shape (n,)
        As in :func:`doubly_robust`.
    gamma : float, default 1.0
    """
    normalised = _self_normalised(weights.cumulative, weights.cumulative.sum(axis=0))
    return _estimate("WDR", _doubly_robust_value(normalised, weights, q_taken, v_target, gamma).sum(), weights)


def evaluate_off_policy(
    step,
    action,
    reward,
    episode,
    behaviour_proba,
    target_proba,
    *,
    horizon,
    gamma=1.0,
    q_taken=None,
    v_target=None,
    action_labels=None,
):
    """Every estimator of this module on one decision table, sharing one weight computation.

    ``action_labels`` (one per action code) name the actions in errors.

    Returns
    -------
    dict of str to OffPolicyEstimate
        Keys IS, WIS, PDIS, PDWIS, and DR and WDR when ``q_taken`` and ``v_target`` are given.

    Examples
    --------
    >>> proba = np.full((2, 2), 0.5)
    >>> out = evaluate_off_policy([0, 0], [0, 1], [1.0, 3.0], [0, 1], proba, proba, horizon=1)
    >>> out["WIS"].value, out["WIS"].ess
    (2.0, 2.0)
    """
    weights = importance_weights(
        step, action, reward, episode, behaviour_proba, target_proba, horizon=horizon, action_labels=action_labels
    )
    return estimates_from_weights(weights, gamma, q_taken, v_target)


def estimates_from_weights(weights, gamma=1.0, q_taken=None, v_target=None, names=None):
    """Every estimator of this module on importance weights computed once (:func:`importance_weights`), so that
    the evaluated regime's (n, K) probabilities need not be held while the estimators run.

    ``names`` (registry names, optional): only those estimators are computed, the others' work is not done. The
    Q-model's values are still checked as a doubly robust estimator would check them, so the same inputs stop
    with the same error.

    Returns
    -------
    dict of str to OffPolicyEstimate
        As :func:`evaluate_off_policy` (with ``names``, theirs only).
    """
    results = []
    models = q_taken is not None and v_target is not None
    for name, estimate in COMPUTE.items():
        if names is not None and name not in names:
            continue
        if ESTIMATORS[name].family == "weights":
            results.append(estimate(weights, gamma))
        elif models:
            results.append(estimate(weights, q_taken, v_target, gamma))
    if models and names is not None and not any(ESTIMATORS[n].family == "both" for n in COMPUTE if n in names):
        _checked_models(weights, q_taken, v_target)
    return {result.estimator: result for result in results}
