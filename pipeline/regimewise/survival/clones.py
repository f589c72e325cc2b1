"""Clone–censor–weight: one strategy's clones as weighted counting-process rows.

Every episode is copied into the strategy at time zero. At each kept decision ``t`` (see
:mod:`regimewise.survival.timeline`) the clone's weight is multiplied by

    r_t = π_s(a_t | s_t) / p̂(a_t | s_t),

the strategy's probability of the action actually taken over usual care's. For a deterministic (one-hot)
strategy ``r_t`` is ``1 / p̂(a_t)`` when the action taken is the prescribed one and 0 otherwise, so the
running product ``W_t = Π_{u<=t} r_u`` is the inverse probability of having followed the strategy up to and
including decision ``t`` and becomes 0 at the first deviation: the clone is *artificially censored* on the day
of that decision (its last row stops there, without an event). Rows with weight 0 are dropped.

Choices, stated once:

* **Grace period** of ``g`` decision points: decisions ``0..g-1`` follow usual care; they never censor and
  contribute the factor 1 (the weight is unchanged). From decision ``g`` on the strategy binds, so a clone whose
  action at decision ``g`` is not the prescribed one (it has not adopted the strategy by the end of the grace
  period) is censored on that day. The strategy estimated is therefore "usual care for the first g decisions,
  then the strategy" (Hernán 2018; Maringe et al. 2020 discuss grace periods in cloning designs).
* **Stochastic strategies** (rows that are not one-hot): no artificial censoring is applied; the clone is weighted
  by the same running ratio (Precup, Sutton & Singh 2000). An action with probability 0 under the strategy still
  gives weight 0 from then on, which is the same as censoring there.
* **Natural course** (usual care, ``strategy_proba=None``): every ratio is 1, nobody is censored artificially;
  with no dropout weights every weight is exactly 1 and the curve is the ordinary Kaplan–Meier of the episodes.
* **Loss to follow-up**: optional inverse-probability-of-censoring weights per kept decision (from
  :class:`regimewise.survival.dropout.DropoutModel`) multiply ``W_t``; pre-decision rows keep weight 1.
* **Truncation** (sensitivity check): weights clipped at the given lower and upper percentiles of the weights of
  all the table's rows (person-time), as in Cole & Hernán (2008).

References
----------
Cain, L. E., Robins, J. M., Lanoy, E., Logan, R., Costagliola, D. & Hernán, M. A. (2010). When to start treatment?
A systematic approach to the comparison of dynamic regimes using observational data. Int J Biostat 6(2):18.
Hernán, M. A. (2018). How to estimate the effect of treatment duration on survival outcomes using observational
data. BMJ 360:k182.
Maringe, C., Benitez Majano, S., Exarchakou, A., et al. (2020). Reflection on modern methods: trial emulation in the
presence of immortal-time bias. Assessing the benefit of major surgery for elderly lung cancer patients using
observational data. Int J Epidemiol 49:1719.
Cole, S. R. & Hernán, M. A. (2008). Constructing inverse probability weights for marginal structural models.
Am J Epidemiol 168:656.
"""

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from regimewise.errors import UserInputError
from regimewise.survival._checks import action_code_vector, finite_vector, nonnegative_int, probability_matrix
from regimewise.survival._results import plain

__all__ = ["CloneTable", "clone_censor_weight"]

NATURAL_COURSE = "natural course"
DETERMINISTIC = "deterministic"
STOCHASTIC = "stochastic"


@dataclass(frozen=True, eq=False)
class CloneTable:
    """One strategy's clones as counting-process rows.

    Attributes
    ----------
    name : str
        Strategy label.
    rows : DataFrame
        One row per (clone, interval) with columns ``episode`` (code 0..E-1), ``episode_id``, ``patient_id``,
        ``step`` (-1 for the pre-decision interval), ``start``, ``stop`` (days; at risk on ``(start, stop]``),
        ``event`` (bool, on the clone's last row) and ``weight`` (in force during the interval).
        Sorted by episode, then start.
    n_clones : int
        Number of clones (episodes) at time zero.
    kind : str
        ``"natural course"``, ``"deterministic"`` or ``"stochastic"``.
    grace : int
        Grace period in decision points.
    n_censored : int
        Clones whose weight became 0 (artificially censored at a deviation).
    truncation : tuple of float or None
        Lower and upper weight bounds applied, or None.
    sort_orders : tuple of ndarray or None
        ``(np.argsort(stop), np.argsort(start))`` of the rows when the table holds every row its timeline can
        give (usual care, and strategies that censor no clone): the same arrays for all such tables of a
        timeline, sorted once (:attr:`Timeline.clone_row_sorts`). None otherwise.
    """

    name: str
    rows: pd.DataFrame
    n_clones: int
    kind: str
    grace: int
    n_censored: int
    truncation: tuple | None
    sort_orders: tuple | None = field(default=None, repr=False)

    def to_dict(self):
        """Summary (not the rows) with plain JSON values; keys sorted."""
        w = self.rows["weight"].to_numpy()
        out = {
            "name": self.name,
            "kind": self.kind,
            "grace": self.grace,
            "n_clones": self.n_clones,
            "n_rows": int(w.shape[0]),
            "n_censored": self.n_censored,
            "n_events": int(self.rows["event"].sum()),
            "truncation": None if self.truncation is None else [plain(x) for x in self.truncation],
            "weight_min": plain(w.min()) if w.size else None,
            "weight_max": plain(w.max()) if w.size else None,
            "weight_mean": plain(w.mean()) if w.size else None,
        }
        return dict(sorted(out.items()))


def _follow_ratio(timeline, strategy_proba, grace):
    """Per kept decision: π_s(a_taken) / p̂(a_taken), 1 inside the grace period; and the strategy's kind.

    A strategy given as (n,) action codes is the one-hot strategy of those codes: its probability of the action
    taken is 1.0 or 0.0, the same floats its one-hot matrix holds, so the ratios are the same numbers."""
    if strategy_proba is None:
        return np.ones(timeline.row.shape[0]), NATURAL_COURSE
    if np.ndim(strategy_proba) == 1:
        codes = action_code_vector(strategy_proba, "strategy action codes", timeline.n_decisions, timeline.n_actions)
        followed = np.where(codes[timeline.row] == timeline.action, 1.0, 0.0)
        ratio, kind = followed / timeline.proba_taken, DETERMINISTIC
    else:
        n, k = timeline.n_decisions, timeline.n_actions
        strategy = probability_matrix(strategy_proba, "strategy probabilities", n, k)
        kind = DETERMINISTIC if np.all((strategy == 0) | (strategy == 1)) else STOCHASTIC
        ratio = strategy[timeline.row, timeline.action] / timeline.proba_taken
    ratio[timeline.step < grace] = 1.0
    return ratio, kind


def _censoring_factor(timeline, censoring_weights):
    """Validated inverse-probability-of-censoring weights per kept decision (1 when absent)."""
    if censoring_weights is None:
        return np.ones(timeline.row.shape[0])
    weights = finite_vector(censoring_weights, "censoring weights", timeline.row.shape[0])
    if np.any(weights <= 0):
        raise UserInputError("censoring weights must be > 0: pass DropoutModel.weights(...) for this timeline")
    return weights


def _truncation_bounds(weights, truncate):
    """Lower and upper percentiles of ``weights`` for ``truncate = (low, high)``."""
    try:
        low, high = (float(x) for x in truncate)
    except (TypeError, ValueError):
        raise UserInputError(f"truncate must be two percentiles (low, high), e.g. (1, 99); got {truncate!r}") from None
    if not (math.isfinite(low) and math.isfinite(high) and 0 <= low < high <= 100):
        raise UserInputError(f"truncate percentiles must satisfy 0 <= low < high <= 100; got {truncate!r}")
    if weights.size == 0:
        return None
    return float(np.percentile(weights, low)), float(np.percentile(weights, high))


def _block_cumprod(values, position):
    """Running product of ``values`` within each episode's block (``position``: place in the block, 0, 1, ...).

    The products are formed in the order a grouped running product forms them (1·v_0, then ·v_1, ...), one
    place in the block at a time for all episodes together, so every product is the same float. The blocks
    are contiguous, so the rows at a place are found from the blocks' starts and lengths, not the whole array."""
    out = np.array(values, dtype=float)
    starts = np.flatnonzero(position == 0)
    lengths = np.diff(starts, append=position.shape[0])
    for place in range(1, int(lengths.max(initial=1))):
        starts = starts[lengths > place]  # the blocks that reach this place (fewer at every place)
        lengths = lengths[lengths > place]
        at = starts + place
        out[at] = out[at - 1] * out[at]
    return out


def _assemble(timeline, weight):
    """Pre-decision rows (weight 1) and the kept decisions with a positive weight, sorted by episode then start,
    with identifiers; zero-length rows dropped (see :attr:`Timeline.clone_rows`). Returns the rows and whether
    they are every row of :attr:`Timeline.clone_rows`.

    The columns are those of the pre-decision rows followed by ``step`` and ``weight`` when there are
    pre-decision rows, the decisions' order otherwise: the order a concatenation of the two would give."""
    every = timeline.clone_rows
    decision = every["decision"]
    pre = decision < 0
    row_weight = np.where(pre, 1.0, weight[np.where(pre, 0, decision)]) if decision.size else np.zeros(0)
    keep = pre | (row_weight > 0)
    code = every["episode"][keep]
    columns = {name: every[name][keep] for name in ("start", "stop", "event", "step")}
    columns["weight"] = row_weight[keep]
    order = ["start", "stop", "event", "step"] if every["has_pre"] else ["step", "start", "stop", "event"]
    rows = pd.DataFrame(  # the arrays are fresh: copy=False keeps one block per column instead of stacking copies
        {
            "episode": code,
            "episode_id": timeline.episode_ids[code],
            "patient_id": timeline.patient_ids[code],
            **{name: columns[name] for name in [*order, "weight"]},
        },
        copy=False,
    )
    return rows, bool(keep.all())


def clone_censor_weight(
    timeline, strategy_proba=None, *, name="usual care", grace=0, censoring_weights=None, truncate=None
):
    """Clone every episode into one strategy, censor each clone at its first deviation, and weight it.

    Parameters
    ----------
    timeline : Timeline
        From :func:`regimewise.survival.make_timeline`.
    strategy_proba : array_like, shape (n, K) or (n,), optional
        The strategy's probability of each action at each input decision (one-hot for a deterministic strategy),
        or for a deterministic strategy its (n,) integer action codes (the same as their one-hot matrix, without
        building it). None means the natural course (usual care): weight 1, no artificial censoring.
    name : str
        Label carried into the results.
    grace : int
        Grace period in decision points (see the module docstring).
    censoring_weights : array_like, shape (m,), optional
        Inverse-probability-of-censoring weight in force at each kept decision (``timeline.row`` order), e.g.
        ``DropoutModel().fit(timeline, states).weights(timeline, states)``.
    truncate : tuple of float, optional
        ``(low, high)`` percentiles at which to clip the weights (sensitivity check).

    Returns
    -------
    CloneTable

    References
    ----------
    Cain et al. (2010), Int J Biostat 6(2):18; Hernán (2018), BMJ 360:k182; Maringe et al. (2020),
    Int J Epidemiol 49:1719; Cole & Hernán (2008), Am J Epidemiol 168:656.

    Examples
    --------
    >>> import pandas as pd
    >>> d = pd.DataFrame({"episode_id": ["a", "a", "b"], "step": [0, 1, 0], "day": [0, 30, 0], "action": [1, 0, 1]})
    >>> e = pd.DataFrame({"episode_id": ["a", "b"], "followup_days": [90, 20], "event": [0, 1]})
    >>> from regimewise.survival import make_timeline
    >>> tl = make_timeline(d, e, [[0.5, 0.5], [0.75, 0.25], [0.5, 0.5]], horizon=60)
    >>> always_1 = [[0.0, 1.0]] * 3
    >>> clone_censor_weight(tl, always_1, name="always 1").rows[["episode_id", "stop", "weight"]].values.tolist()
    [['a', 30.0, 2.0], ['b', 20.0, 2.0]]
    """
    grace = nonnegative_int(grace, "grace")
    ratio, kind = _follow_ratio(timeline, strategy_proba, grace)
    weight = _block_cumprod(ratio, timeline.block_position)
    censored = timeline.episode[weight == 0]  # episode codes are sorted: count where the code changes
    n_censored = int(censored.shape[0] and 1 + np.count_nonzero(censored[1:] != censored[:-1]))
    weight = weight * _censoring_factor(timeline, censoring_weights)
    rows, every_row = _assemble(timeline, weight)
    bounds = None
    if truncate is not None:
        bounds = _truncation_bounds(rows["weight"].to_numpy(), truncate)
        if bounds is not None:
            rows["weight"] = rows["weight"].clip(*bounds)
    return CloneTable(
        name=str(name),
        rows=rows,
        n_clones=timeline.n_episodes,
        kind=kind,
        grace=grace,
        n_censored=n_censored,
        truncation=bounds,
        sort_orders=timeline.clone_row_sorts if every_row else None,
    )
