"""How follow-up ends in the look-alike world, with a ``survival`` section: events, loss to follow-up, the horizon.

Fitted from the records' decisions and episodes tables with the timeline's conventions
(:mod:`regimewise.survival.timeline`): a decision on day ``d_t`` is at risk when ``d_t < min(followup_days,
horizon)``; its interval runs to ``min(d_{t+1}, horizon)`` (the horizon after an episode's last decision); an event
counts when ``event = 1`` and ``followup_days <= horizon``; an episode without an event whose follow-up stops before
the horizon is lost to follow-up. The pipeline's validation lets a censored episode end no earlier than its last
decision, so a loss falls after an episode's last decision, while decisions may go on after an event (the demo's
records have them).

* **events**: at each decision point t, whether the event falls in the interval after decision t, by logistic
  regression on the world's design (state, action, their products) over the at-risk decisions, leaving out the
  decisions whose episode is lost in that interval (their event time, had they stayed, is unknown); the event's
  day is placed at the relative position within its interval of an event of a real decision at t, drawn at random
  (uniform in the interval when the records have no event at t), rounded up to a whole day within the interval;
* **loss to follow-up**: at an episode's last decision, lost before the horizon or not, by one logistic
  regression on the same design over the records' last at-risk decisions; the day of loss at the relative position
  between the decision and the horizon of a real loss, drawn at random.

In a simulated episode the event and the loss are drawn independently given the decision's state and action
(latent times; the episode shows whichever comes first), which is the independent-censoring-given-covariates
assumption the dropout weights rely on. Truths switch loss off: survival had nobody been lost, the estimand of
clone–censor–weight with the dropout weights. Events before an episode's first decision are not modelled.
Research use only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from sklearn.linear_model import LogisticRegression

from regimewise.errors import UserInputError

# The world's logistic penalty (scikit-learn's C on standardised covariates), as for its other models.
LOGISTIC_C = 1.0


@dataclass(frozen=True)
class _Binary:
    """P(outcome = 1) by logistic regression on a design without its intercept column, or a constant share when
    the records show one outcome only (or none)."""

    share: float
    model: LogisticRegression | None

    @classmethod
    def fit(cls, design, outcome):
        outcome = np.asarray(outcome, dtype=int)
        if outcome.size == 0 or outcome.min() == outcome.max():
            return cls(float(outcome.mean()) if outcome.size else 0.0, None)
        return cls(float(outcome.mean()), LogisticRegression(C=LOGISTIC_C, max_iter=2000).fit(design[:, 1:], outcome))

    def draw(self, design, uniforms):
        if self.model is None:
            return uniforms < self.share
        return uniforms < self.model.predict_proba(design[:, 1:])[:, 1]


def _pick(positions, uniforms):
    """A real relative position per uniform (a donor drawn at random), or the uniform itself without donors."""
    if positions.size == 0:
        return uniforms
    return positions[np.minimum((uniforms * positions.size).astype(np.int64), positions.size - 1)]


def records_intervals(decisions: pd.DataFrame, episodes: pd.DataFrame, horizon: float) -> pd.DataFrame:
    """Per decision of clean decisions (episode and step order): its day, the end of its interval, whether it is at
    risk, whether the event or the loss falls in its interval, whether it is the episode's last decision, and the
    episode's follow-up."""
    missing = [c for c in ("followup_days", "event") if c not in episodes.columns]
    if missing:
        raise UserInputError(
            f"the self-check's survival part needs {missing[0]!r} in the episodes table; map it in data.columns "
            "or remove the survival section"
        )
    table = episodes.set_index(episodes["episode_id"].astype(str))
    ids = decisions["episode_id"].astype(str)
    follow = table["followup_days"].reindex(ids).to_numpy(dtype=float)
    event = table["event"].reindex(ids).to_numpy(dtype=float) == 1
    if np.isnan(follow).any():
        raise UserInputError("the self-check's survival part needs an episodes row for every episode with decisions")
    episode = decisions["episode_id"].to_numpy()
    day = decisions["day"].to_numpy(dtype=float)
    last = np.r_[episode[1:] != episode[:-1], True]
    following = np.r_[day[1:], np.inf]
    following[last] = np.inf
    end = np.minimum(follow, horizon)
    stop = np.minimum(following, horizon)
    at_risk = day < end
    lost = at_risk & ~event & (follow < horizon) & (follow <= stop)
    return pd.DataFrame(
        {
            "day": day,
            "stop": stop,
            "at_risk": at_risk,
            "event": at_risk & event & (follow <= stop),
            "lost": lost,
            "last": last,
            "followup": follow,
        }
    )


@dataclass(frozen=True)
class FollowUpModel:
    """The fitted end of follow-up (see the module's description); :meth:`tracker` follows simulated episodes."""

    horizon: float
    events: tuple[_Binary, ...]  # per decision point
    event_positions: tuple[np.ndarray, ...]  # per decision point: relative positions in (0, 1] of real events
    loss: _Binary
    loss_positions: np.ndarray  # relative positions in (0, 1) of real losses between last decision and horizon

    @classmethod
    def fit(cls, decisions: pd.DataFrame, episodes: pd.DataFrame, design: np.ndarray, horizon: float, steps: int):
        """Fit on clean decisions, their episodes table and the world's design of every decision."""
        rows = records_intervals(decisions, episodes, horizon)
        step = decisions["step"].to_numpy()
        day, stop, follow, at_risk, event, lost, last = (
            rows[c].to_numpy() for c in ("day", "stop", "followup", "at_risk", "event", "lost", "last")
        )
        events, positions = [], []
        for t in range(steps):
            fitted = at_risk & (step == t) & ~lost
            events.append(_Binary.fit(design[fitted], event[fitted]))
            hit = fitted & event
            positions.append((follow[hit] - day[hit]) / (stop[hit] - day[hit]))
        exposed = at_risk & (last | lost)
        loss = _Binary.fit(design[exposed], lost[exposed])
        loss_positions = (follow[lost] - day[lost]) / (horizon - day[lost])
        return cls(float(horizon), tuple(events), tuple(positions), loss, loss_positions)

    def tracker(self, n: int, draws: dict, loss: bool) -> FollowUp:
        """A follower of ``n`` simulated episodes using the draws' follow-up streams; ``loss`` False switches loss
        to follow-up off (the truths)."""
        return FollowUp(self, n, draws, loss)


class FollowUp:
    """The end of follow-up of simulated episodes, decision by decision (see :class:`FollowUpModel`)."""

    def __init__(self, model: FollowUpModel, n: int, draws: dict, loss: bool):
        self.model, self.draws, self.loss = model, draws, loss
        self.event_day = np.full(n, np.inf)
        self.loss_day = np.full(n, np.inf)
        self.last_day = np.zeros(n)

    def step(self, t: int, index: np.ndarray, design: np.ndarray, today: np.ndarray, following: np.ndarray) -> None:
        """Decision t of the episodes ``index`` on days ``today``; ``following`` is each one's next decision day
        (infinite after its last decision)."""
        m, h = self.model, self.model.horizon
        today, following = np.round(today), np.round(following)
        self.last_day[index] = today
        risk = np.isinf(self.event_day[index]) & (today < h)
        if not risk.any():
            return
        rows, d, x = index[risk], today[risk], design[risk]
        stop = np.minimum(following[risk], h)
        where = _pick(m.event_positions[t], self.draws["event_day"][rows, t])
        day = np.minimum(d + np.maximum(1.0, np.ceil(where * (stop - d))), np.floor(stop))
        # an interval without a whole day before a horizon that is not a whole day holds no event
        hit = m.events[t].draw(x, self.draws["event"][rows, t]) & (day > d)
        self.event_day[rows[hit]] = day[hit]
        if not self.loss:
            return
        last = np.isinf(following[risk])
        lost = last & m.loss.draw(x, self.draws["loss"][rows])
        where = _pick(m.loss_positions, self.draws["loss_day"][rows])
        day = d + np.maximum(1.0, np.floor(where * (h - d)))
        lost &= day < h
        self.loss_day[rows[lost]] = day[lost]

    def episodes(self, ids: np.ndarray) -> pd.DataFrame:
        """The episodes table of the followed episodes: the event if it comes before any loss, else the loss, else
        follow-up to the horizon (or to the last decision, if later: censored follow-up covers every decision)."""
        event = np.isfinite(self.event_day) & (self.event_day <= self.loss_day)
        censored = np.where(np.isinf(self.loss_day), np.maximum(self.model.horizon, self.last_day), self.loss_day)
        followup = np.where(event, self.event_day, censored)
        return pd.DataFrame(
            {
                "episode_id": ids,
                "patient_id": ids,
                "followup_days": np.ceil(followup).astype(np.int64),
                "event": event.astype(np.int64),
            }
        )
