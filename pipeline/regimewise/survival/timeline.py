"""The follow-up of each episode cut at its decision points: the common frame of every clone.

Time is in days from time zero (day 0). An episode ``i`` has decisions ``t = 0, 1, ...`` on strictly increasing
days ``d_t >= 0`` and ends at ``end_i = min(followup_days_i, horizon)``; its event counts when ``event_i = 1`` and
``followup_days_i <= horizon``. Only decisions made before the end (``d_t < end_i``) are kept: a decision on or
after the event day, the end of follow-up or the horizon cannot change the outcome inside the horizon.

Intervals (counting-process rows, at risk on ``(start, stop]``):

* a *pre-decision* row ``[0, min(d_0, end_i))`` when the first decision falls after day 0 (no strategy has acted
  yet, so every clone carries it with weight 1);
* one row per kept decision ``t``: ``[d_t, d_{t+1})``, the last one ``[d_t, end_i)``.

An event is recorded on the episode's last row. An episode is a *dropout* (lost to follow-up) when it has no event
and ``followup_days < horizon``; episodes reaching the horizon are administratively censored there.

References
----------
Andersen, P. K. & Gill, R. D. (1982). Cox's regression model for counting processes: a large sample study.
Annals of Statistics 10:1100 (the (start, stop] risk-set convention).
Hernán, M. A. & Robins, J. M. (2016). Using big data to emulate a target trial when a randomized trial is not
available. American Journal of Epidemiology 183:758 (time zero, follow-up, horizon).
"""

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import pandas as pd

from regimewise.errors import UserInputError
from regimewise.survival._checks import (
    finite_vector,
    positive_number,
    positive_probability,
    probability_matrix,
    require_columns,
)

__all__ = ["Timeline", "make_timeline"]

DECISION_COLUMNS = ("episode_id", "step", "day", "action")
EPISODE_COLUMNS = ("episode_id", "followup_days", "event")


@dataclass(frozen=True, eq=False)
class Timeline:
    """A validated cohort cut at its decision points (see the module docstring for the conventions).

    Attributes
    ----------
    horizon : float
        End of follow-up in days.
    n_actions : int
        Number of action codes ``K``.
    episode_ids, patient_ids : ndarray, shape (E,)
        Episode identifiers in order of first appearance, and each episode's patient (resampling cluster).
    end : ndarray, shape (E,)
        ``min(followup_days, horizon)``.
    event : ndarray of bool, shape (E,)
        An event on or before the horizon.
    dropout : ndarray of bool, shape (E,)
        Lost to follow-up before the horizon without an event.
    first_day : ndarray, shape (E,)
        Day of each episode's first decision.
    row : ndarray of int, shape (m,)
        Position in the input decisions of each kept decision (decisions before the episode's end).
    episode, step : ndarray of int, shape (m,)
        Episode code (0..E-1) and step of each kept decision.
    start, stop : ndarray, shape (m,)
        Interval of each kept decision, in days.
    action : ndarray of int, shape (m,)
        Action taken.
    proba_taken : ndarray, shape (m,)
        Usual-care probability of the action taken, in (0, 1].
    n_decisions : int
        Number of input decisions (rows of the arrays that strategies and states are aligned with).
    """

    horizon: float
    n_actions: int
    episode_ids: np.ndarray
    patient_ids: np.ndarray
    end: np.ndarray
    event: np.ndarray
    dropout: np.ndarray
    first_day: np.ndarray
    row: np.ndarray
    episode: np.ndarray
    step: np.ndarray
    start: np.ndarray
    stop: np.ndarray
    action: np.ndarray
    proba_taken: np.ndarray
    n_decisions: int

    @property
    def n_episodes(self):
        """Number of episodes ``E`` (the number of clones per strategy)."""
        return int(self.episode_ids.shape[0])

    def pre_rows(self):
        """Pre-decision rows as a DataFrame (episode, start, stop, event); empty when every ``d_0 = 0``."""
        has = self.first_day > 0
        codes = np.flatnonzero(has)
        stop = np.minimum(self.first_day[has], self.end[has])
        event = self.event[has] & (self.end[has] <= self.first_day[has])
        return pd.DataFrame({"episode": codes, "start": 0.0, "stop": stop, "event": event})

    @cached_property
    def block_position(self):
        """Position of each kept decision inside its episode's block of kept decisions (0, 1, ...)."""
        first = np.ones(self.episode.shape[0], dtype=bool)
        first[1:] = self.episode[1:] != self.episode[:-1]
        starts = np.flatnonzero(first)
        return np.arange(self.episode.shape[0]) - starts[np.cumsum(first) - 1]

    @cached_property
    def clone_rows(self):
        """Every row a clone table can hold, in table order, computed once for all strategies.

        A dict of arrays: the pre-decision rows and the kept decisions, of positive length (``stop > start``),
        sorted by episode, then start (a stable sort), with columns ``episode``, ``start``, ``stop``, ``event``
        (an event on the episode's last row), ``step`` (-1 before the first decision) and ``decision`` (position
        in the kept decisions; -1 for a pre-decision row); and ``has_pre``, whether there is any pre-decision
        row. A clone table keeps every pre-decision row and the decisions its clones still follow, so its rows
        are these with the others left out, in the order a stable sort of that subset would give.
        """
        pre = self.pre_rows()
        n_pre = len(pre)
        last = self.stop == self.end[self.episode]
        columns = {
            "episode": np.concatenate([pre["episode"].to_numpy(), self.episode]),
            "start": np.concatenate([pre["start"].to_numpy(), self.start]),
            "stop": np.concatenate([pre["stop"].to_numpy(), self.stop]),
            "event": np.concatenate([pre["event"].to_numpy(), last & self.event[self.episode]]),
            "step": np.concatenate([np.full(n_pre, -1, dtype=np.int64), self.step]),
            "decision": np.concatenate([np.full(n_pre, -1, dtype=np.int64), np.arange(self.episode.shape[0])]),
        }
        order = _merged_order(columns["episode"], columns["start"], n_pre, self.n_episodes)
        order = order[columns["stop"][order] > columns["start"][order]]
        out = {name: values[order] for name, values in columns.items()}
        out["has_pre"] = n_pre > 0
        return out

    @cached_property
    def clone_row_sorts(self):
        """``(np.argsort(stop), np.argsort(start))`` of :attr:`clone_rows`, sorted once: a clone table holding
        every one of those rows has these very arrays as its stop and start, so the same sorts serve it."""
        rows = self.clone_rows
        return np.argsort(rows["stop"]), np.argsort(rows["start"])


def _merged_order(episode, start, n_pre, n_episodes):
    """Order of the pre-decision rows (the first ``n_pre``, one per episode at most) and the decisions (the rest,
    by episode) by episode, then start: the order a stable sort gives (``np.lexsort``).

    Each episode's pre-decision row goes just before its decisions, found by counting (no sort); the result is
    kept when the keys it gives increase strictly, as they do for a timeline (a pre-decision row starts at 0,
    before the first decision day, and decision days increase), since a stable sort can give no other order of
    distinct keys. Otherwise the stable sort decides."""
    pre, decisions = episode[:n_pre], episode[n_pre:]
    per_episode = np.bincount(decisions, minlength=n_episodes)
    decisions_before = np.concatenate([[0], np.cumsum(per_episode)])[pre]
    pre_through = np.cumsum(np.bincount(pre, minlength=n_episodes))[decisions] if n_pre else 0
    order = np.zeros(episode.shape[0], dtype=np.int64)  # strictly increasing keys below make it a permutation
    order[np.arange(n_pre) + decisions_before] = np.arange(n_pre)
    order[np.arange(decisions.shape[0]) + pre_through] = np.arange(n_pre, episode.shape[0])
    e, t = episode[order], start[order]
    if np.all((e[1:] > e[:-1]) | ((e[1:] == e[:-1]) & (t[1:] > t[:-1]))):
        return order
    return np.lexsort((start, episode))


def _episode_codes(episode_ids, step):
    """Codes 0..E-1 of contiguous episode blocks; refuses rows not sorted by episode then step."""
    ids = pd.Series(episode_ids).astype(str).to_numpy()
    new_block = np.ones(ids.shape[0], dtype=bool)
    new_block[1:] = ids[1:] != ids[:-1]
    code = np.cumsum(new_block) - 1
    firsts = ids[new_block]
    if np.unique(firsts).shape[0] != firsts.shape[0]:
        raise UserInputError("decisions are not grouped by episode: sort them by episode_id, then step")
    expected = np.arange(ids.shape[0]) - np.flatnonzero(new_block)[code]
    if not np.array_equal(step, expected):
        first = int(np.flatnonzero(step != expected)[0])
        raise UserInputError(
            f"decisions row {first} (episode {ids[first]}) has step {step[first]} where {expected[first]} is "
            "expected: steps must run 0, 1, 2, ... within each episode, rows sorted by episode_id then step"
        )
    return code, firsts


def _decision_arrays(decisions, n_actions):
    """Validated step, day and action arrays of the decisions table."""
    require_columns(decisions, DECISION_COLUMNS, "decisions")
    if len(decisions) == 0:
        raise UserInputError("decisions is empty: the survival stage needs at least one decision")
    step = finite_vector(decisions["step"], "decisions step")
    day = finite_vector(decisions["day"], "decisions day")
    action = finite_vector(decisions["action"], "decisions action")
    if np.any(day < 0):
        raise UserInputError(f"decisions day is negative in {int(np.sum(day < 0))} row(s): days count from time zero")
    if np.any(action != np.round(action)) or np.any(action < 0) or np.any(action >= n_actions):
        raise UserInputError(f"decisions action must be integer codes 0..{n_actions - 1}: encode the actions first")
    return step.astype(np.int64), day, action.astype(np.int64)


def _episode_outcomes(episodes, firsts, horizon):
    """Follow-up and event per decision episode, in the decisions' episode order."""
    require_columns(episodes, EPISODE_COLUMNS, "episodes")
    table = episodes.assign(episode_id=episodes["episode_id"].astype(str))
    if table["episode_id"].duplicated().any():
        raise UserInputError("episodes has duplicated episode_id values: keep one row per episode")
    table = table.set_index("episode_id")
    absent = pd.Index(firsts).difference(table.index)
    if len(absent):
        raise UserInputError(f"{len(absent)} decision episode(s) are missing from episodes, e.g. {absent[0]}")
    table = table.loc[firsts]
    followup = finite_vector(table["followup_days"], "episodes followup_days")
    event = finite_vector(table["event"], "episodes event")
    if np.any(followup <= 0):
        raise UserInputError(f"episodes followup_days must be > 0; {int(np.sum(followup <= 0))} are not")
    if not np.all(np.isin(event, (0, 1))):
        raise UserInputError("episodes event must be 0 (censored) or 1 (event)")
    if horizon > followup.max():
        raise UserInputError(
            f"horizon {horizon:g} days is beyond the longest follow-up ({followup.max():g} days): lower it"
        )
    return followup, event.astype(bool)


def _patients(decisions, code, episode_ids):
    """Patient of each episode (the episode itself when there is no patient_id column)."""
    if "patient_id" not in decisions.columns:
        return np.asarray(episode_ids, dtype=object)
    patient = decisions["patient_id"].astype(str).to_numpy()
    same_episode = code[1:] == code[:-1]  # an episode's rows are contiguous: compare each row with the one before
    if np.any(patient[1:][same_episode] != patient[:-1][same_episode]):
        raise UserInputError("an episode has more than one patient_id: each episode belongs to one patient")
    first = np.flatnonzero(np.append(True, ~same_episode))
    return patient[first].astype(object)


def make_timeline(decisions, episodes, usual_proba, horizon):
    """Validate the records and cut each episode's follow-up at its decision points.

    Parameters
    ----------
    decisions : DataFrame
        One row per decision, sorted by ``episode_id`` then ``step``, with columns ``episode_id``, ``step``
        (0, 1, ...), ``day`` (days since time zero), ``action`` (integer code 0..K-1) and optionally
        ``patient_id``.
    episodes : DataFrame
        One row per episode with ``episode_id``, ``followup_days`` (time zero to event or censoring) and
        ``event`` (0/1). Episodes without decisions are ignored.
    usual_proba : array_like, shape (n, K)
        Usual-care probability of each action at each decision (rows aligned with ``decisions``).
    horizon : float
        End of follow-up in days; must not exceed the longest follow-up.

    Returns
    -------
    Timeline

    References
    ----------
    Hernán & Robins (2016), Am J Epidemiol 183:758.

    Examples
    --------
    >>> import pandas as pd
    >>> d = pd.DataFrame({"episode_id": ["a", "a", "b"], "step": [0, 1, 0], "day": [0, 30, 0], "action": [1, 0, 1]})
    >>> e = pd.DataFrame({"episode_id": ["a", "b"], "followup_days": [90, 20], "event": [0, 1]})
    >>> tl = make_timeline(d, e, [[0.5, 0.5], [0.5, 0.5], [0.5, 0.5]], horizon=60)
    >>> tl.start.tolist(), tl.stop.tolist()
    ([0.0, 30.0, 0.0], [30.0, 60.0, 20.0])
    """
    horizon = positive_number(horizon, "horizon")
    proba = probability_matrix(usual_proba, "usual-care probabilities", len(decisions))
    n_actions = int(proba.shape[1])
    step, day, action = _decision_arrays(decisions, n_actions)
    code, firsts = _episode_codes(decisions["episode_id"].to_numpy(), step)
    if np.any(np.diff(day)[code[1:] == code[:-1]] <= 0):
        raise UserInputError("decisions day must increase strictly within each episode: check duplicated visits")
    followup, event = _episode_outcomes(episodes, firsts, horizon)
    end = np.minimum(followup, horizon)
    keep = day < end[code]
    rows = np.flatnonzero(keep)
    kept_code, kept_day = code[keep], day[keep]
    stop = np.append(kept_day[1:], np.nan)
    last = np.append(kept_code[1:] != kept_code[:-1], True)
    stop[last] = end[kept_code[last]]
    taken = positive_probability(proba[rows, action[rows]], "usual-care probability of the action taken")
    return Timeline(
        horizon=horizon,
        n_actions=n_actions,
        episode_ids=firsts.astype(object),
        patient_ids=_patients(decisions, code, firsts),
        end=end,
        event=event & (followup <= horizon),
        dropout=~event & (followup < horizon),
        first_day=day[step == 0],
        row=rows,
        episode=kept_code,
        step=step[keep],
        start=kept_day,
        stop=stop,
        action=action[rows],
        proba_taken=taken,
        n_decisions=len(decisions),
    )
