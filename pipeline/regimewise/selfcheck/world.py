"""The look-alike world: a generative model of the user's own cohort, for a plasmode simulation.

A plasmode simulation keeps the real covariate structure and simulates from models fitted to the real data, so that
the truth is known (Franklin, Schneeweiss, Polinski & Rassen 2014, Comput Stat Data Anal 72:219). Here:

* **baseline**: each simulated episode starts from the first decision of a real episode, drawn with replacement
  (its states and its day);
* **transitions**, one set of models per decision point t: every numeric state at t + 1 by least squares on the
  states at t, the action (indicators) and the action's interactions with the numeric states, plus a residual of
  the same fit; a binary or categorical state by a multinomial logistic regression on the same covariates (a state
  that never changes within an episode in the records is carried forward unchanged);
* **rewards**: at each decision point by least squares on the same covariates, plus a residual;
* **residuals are drawn jointly**: one real decision of the same step is drawn per simulated decision, and its
  residuals of every numeric state and of the reward are used together (with its gap in days to the next
  decision), which keeps the dependence between the noises of the states and the reward;
* **follow-up**: whether an episode has a decision at t + 1, by logistic regression on the same covariates (a
  constant where every or no episode continues);
* **usual care**: the protocol's usual-care model fitted on the records (:func:`fit_usual_care`);
* **events and loss to follow-up**, only with a ``survival`` section and the records' episodes table: per decision
  point, an event in the interval after the decision, and at an episode's last decision, loss to follow-up before
  the horizon (:mod:`regimewise.selfcheck.followup`); the simulated cohort then comes with an episodes table.

Numeric states are kept within their plausible range; integer states are rounded. Each episode is its own
patient, and the states are complete (no missing values). The world is only as good as these models; the
self-check reports how well it reproduces the records (:func:`reproduction`).

**A hidden confounder of strength Γ** (optional, :meth:`LookAlikeWorld.with_confounder`; Γ = 1, the default, is
none and leaves every draw and output as without it). At each decision point the protocol's
``sensitivity.confounded_decisions`` names (:func:`regimewise.sensitivity.analysis.confounded_mask`, so the
sensitivity bounds' assumption holds in the world), a hidden U_t ~ Bernoulli(½) is drawn, independent across
decisions and of the states, from its own stream of common random numbers (every policy sees the same U). It acts
on two things:

* usual care's choice (:func:`hidden_choice`): U_t = 1 moves probability mass δ from the lower half of the
  protocol's action order to the upper half, U_t = 0 the same mass the other way, each half's actions scaled in
  proportion (with an odd number of actions the middle one keeps its probability). Averaged over U_t the
  probabilities are the world's fitted usual-care probabilities e(a|x) exactly, so the records' usual-care model
  stays right for the marginal, as the marginal sensitivity model assumes (Tan 2006, JASA 101:1619). δ is the
  largest mass for which the odds of every P(a|x,U) against the odds of e(a|x) stay within [1/Γ, Γ]. Scaling a
  probability e by c changes its odds by c(1 − e)/(1 − ce), which moves away from 1 as e grows, so the binding
  action is each half's most likely one, and solving c(1 − e)/(1 − ce) = Γ (or 1/Γ) gives δ in closed form per
  decision, vectorised; the binding action's odds ratio is exactly Γ or 1/Γ. A decision whose upper or lower half
  has no probability cannot be tilted this way (δ = 0). The tilt is one particular confounder within the model,
  not the worst case the bounds allow for;
* the reward at that decision: + κ·(2U_t − 1)·σ_t, with σ_t the sample SD (divisor n − 1) of the step's reward
  residuals that the world draws from and κ = :data:`CONFOUNDER_REWARD_SHIFT` = 0.5 (a hidden factor worth half a
  residual SD either way: large enough that naive estimates are visibly biased on cohorts of a few thousand
  episodes, small beside the reward's own noise). U_t does not change the states, so it confounds the decision it
  belongs to through that decision's reward only.

Under a policy that ignores U the reward term averages zero, so such a policy's value is what it is without the
confounder; usual care's actions depend on U, which is what biases an analysis that cannot see U. Research use only.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from sklearn.linear_model import LogisticRegression
from threadpoolctl import threadpool_limits

from regimewise.core.features import StateScaler, action_codes, level_values
from regimewise.errors import UserInputError
from regimewise.protocol import Protocol
from regimewise.selfcheck.followup import FollowUpModel
from regimewise.sensitivity.analysis import confounded_mask
from regimewise.usual_care.fitting import UsualCareModel, fit_usual_care

# Fewest decisions per fitted coefficient of a per-step model (common practice for linear models, no source).
ROWS_PER_COEFFICIENT = 2
# Penalty of the logistic models (scikit-learn's C on standardised covariates): mild, so that a state or a
# follow-up that the covariates separate gets probabilities near 0 and 1 instead of a failed fit.
LOGISTIC_C = 1.0
# κ: the hidden confounder's shift of the reward at a confounded decision, in residual SDs of that step's reward
# (our choice, no source; see the module's description).
CONFOUNDER_REWARD_SHIFT = 0.5


def _solve(design, target):
    """Least-squares coefficients (minimum-norm where the design is rank-deficient, e.g. an action never taken)."""
    return np.linalg.lstsq(design, target, rcond=None)[0]


@dataclass(frozen=True)
class _ClassModel:
    """A binary or categorical state (or the follow-up) at the next decision: classes and a fitted logistic model,
    or one class with probability 1 (``model`` None)."""

    classes: np.ndarray
    model: LogisticRegression | None

    @classmethod
    def fit(cls, design, values):
        classes, codes = np.unique(values, return_inverse=True)
        if classes.size == 1:
            return cls(classes, None)
        model = LogisticRegression(C=LOGISTIC_C, max_iter=2000).fit(design[:, 1:], codes)
        return cls(classes, model)

    def draw(self, design, uniforms):
        if self.model is None:
            return np.repeat(self.classes, len(design))
        return self.classes[_draw_codes(self.model.predict_proba(design[:, 1:]), uniforms)]


@dataclass(frozen=True)
class _Step:
    """The models of one decision point: next states, reward, follow-up, and the residual donors."""

    numeric: dict  # state -> coefficients
    classes: dict  # state -> _ClassModel
    reward: np.ndarray
    follow_up: _ClassModel | None  # None at the last decision point
    residuals: np.ndarray  # (donors, numeric states) of the decisions with a next decision
    reward_residuals: np.ndarray  # (donors,) aligned with ``residuals``; all decisions when none continues
    gaps: np.ndarray  # (donors,) days to the next decision


@dataclass(frozen=True)
class LookAlikeWorld:
    """A fitted generative model of a cohort (see the module's description); :meth:`simulate` draws cohorts and
    :meth:`returns` gives every simulated episode's return under a policy, with common random numbers."""

    protocol: Protocol
    scaler: StateScaler
    usual_care: UsualCareModel
    baseline: pd.DataFrame
    steps: tuple[_Step, ...]
    numeric_states: tuple[str, ...]
    class_states: tuple[str, ...]
    carried_states: tuple[str, ...]
    n_episodes: int
    confounder_gamma: float = 1.0
    follow_up: FollowUpModel | None = None  # events and loss to follow-up (survival section and episodes only)

    # ------------------------------------------------------------------------------------------------- fitting
    @classmethod
    def fit(cls, decisions: pd.DataFrame, protocol: Protocol, episodes: pd.DataFrame | None = None) -> LookAlikeWorld:
        """Fit the world on clean decisions (:func:`regimewise.data.records.clean_decisions`); with a ``survival``
        section and the records' clean episodes table, also how follow-up ends.

        Raises :class:`UserInputError` in one line when a decision point has too few decisions for its models.
        """
        frame = decisions.reset_index(drop=True)
        episode = frame["episode_id"].to_numpy()
        step = frame["step"].to_numpy()
        following = np.r_[episode[1:] == episode[:-1], False] & np.r_[step[1:] == step[:-1] + 1, False]
        starts = np.r_[True, episode[1:] != episode[:-1]]
        if np.any(step[starts] != 0):
            raise UserInputError("the self-check needs every episode to start at decision point 0; some start later")
        scaler = StateScaler.fit(frame, protocol)
        kinds = {s.name: s.kind for s in protocol.states}
        carried = tuple(
            s.name
            for s in protocol.states
            if s.kind in ("binary", "categorical") and _never_changes(frame, s.name, following)
        )
        numeric = tuple(s.name for s in protocol.states if kinds[s.name] in ("continuous", "integer"))
        discrete = [s.name for s in protocol.states if s.kind in ("binary", "categorical")]
        classes = tuple(name for name in discrete if name not in carried)
        baseline = frame.loc[starts].reset_index(drop=True)
        world = cls(protocol, scaler, None, baseline, (), numeric, classes, carried, int(starts.sum()))
        codes = action_codes(frame, protocol.action_labels)
        steps = []
        for t in range(int(step.max()) + 1):
            rows = np.flatnonzero(step == t)
            steps.append(world._fit_step(frame, codes, rows, following[rows], t))
        if protocol.survival is not None and episodes is not None:
            world = replace(
                world,
                follow_up=FollowUpModel.fit(
                    frame, episodes, world.design(frame, codes), protocol.survival.horizon_days, len(steps)
                ),
            )
        # usual care last: a cohort too small for the per-step models is refused by the check above, in our words
        return replace(world, steps=tuple(steps), usual_care=fit_usual_care(frame, protocol))

    def _fit_step(self, frame, codes, rows, continues, t):
        design = self.design(frame.iloc[rows], codes[rows])
        need = ROWS_PER_COEFFICIENT * design.shape[1]
        if rows.size < need:
            raise UserInputError(
                f"the self-check needs at least {need} decisions at decision point {t} to fit its models "
                f"({design.shape[1]} coefficients each); the records have {rows.size}: use fewer states or a "
                "shorter horizon, or do without the self-check"
            )
        reward = frame["reward"].to_numpy()[rows]
        reward_coef = _solve(design, reward)
        reward_residuals = reward - design @ reward_coef
        if not continues.any():
            return _Step({}, {}, reward_coef, None, np.zeros((rows.size, 0)), reward_residuals, np.zeros(rows.size))
        nxt = rows[continues] + 1
        moving = design[continues]
        if continues.sum() < need:
            raise UserInputError(
                f"the self-check needs at least {need} episodes that go on from decision point {t} to {t + 1} to "
                f"fit its transition models; the records have {int(continues.sum())}: use a shorter horizon"
            )
        numeric, residuals = {}, []
        for name in self.numeric_states:
            target = frame[name].to_numpy(dtype=float)[nxt]
            numeric[name] = _solve(moving, target)
            residuals.append(target - moving @ numeric[name])
        class_models = {
            name: _ClassModel.fit(moving, _state_text(frame, name, self.protocol)[nxt]) for name in self.class_states
        }
        follow_up = _ClassModel.fit(design, continues.astype(int))
        days = frame["day"].to_numpy(dtype=float)
        return _Step(
            numeric,
            class_models,
            reward_coef,
            follow_up,
            np.column_stack(residuals) if residuals else np.zeros((nxt.size, 0)),
            reward_residuals[continues],
            days[nxt] - days[rows[continues]],
        )

    def with_confounder(self, gamma: float) -> LookAlikeWorld:
        """This world with a hidden confounder of strength Γ = ``gamma`` ≥ 1 at the protocol's confounded decisions
        (see the module's description; Γ = 1: none)."""
        return replace(self, confounder_gamma=_check_gamma(gamma))

    # ------------------------------------------------------------------------------------------------- design
    def design(self, frame: pd.DataFrame, codes: np.ndarray) -> np.ndarray:
        """Covariates of every model: 1, the scaled states (categorical as dummies), the action's indicators
        (the protocol's first action the reference) and their products with the numeric states."""
        width = len(self.scaler.names) - len(self.scaler.indicators)
        states = (self.scaler.state_matrix(frame) - np.asarray(self.scaler.means[:width])) / np.asarray(
            self.scaler.scales[:width]
        )
        numeric = [j for j, name in enumerate(self.scaler.names[:width]) if name in self.numeric_states]
        n_actions = len(self.protocol.actions)
        indicators = (np.asarray(codes)[:, None] == np.arange(1, n_actions)).astype(float)
        products = (indicators[:, :, None] * states[:, None, numeric]).reshape(len(frame), -1)
        return np.column_stack([np.ones(len(frame)), states, indicators, products])

    # ------------------------------------------------------------------------------------------------- rollouts
    def _draws(self, n, seed):
        """Every random number an episode may use, drawn up front in fixed shapes (common random numbers: the
        same seed gives the same draws whatever the policy)."""
        horizon = len(self.steps)
        streams = np.random.SeedSequence(seed).spawn(11)  # a child's numbers do not depend on how many are spawned
        rng = [np.random.default_rng(s) for s in streams]
        draws = {
            "baseline": rng[0].integers(0, self.n_episodes, n),
            "donor": rng[1].random((n, horizon)),
            "classes": rng[2].random((n, horizon, max(len(self.class_states), 1))),
            "usual_care": rng[3].random((n, horizon)),
            "follow_up": rng[4].random((n, horizon)),
            "coins": rng[5].random((n, horizon)),
        }
        if self.confounder_gamma > 1.0:  # the hidden U_t ~ Bernoulli(½); not drawn without a confounder
            draws["hidden"] = rng[6].random((n, horizon)) < 0.5
        if self.follow_up is not None:  # children 7 to 10: the others' draws are unchanged
            draws.update(
                event=rng[7].random((n, horizon)),
                event_day=rng[8].random((n, horizon)),
                loss=rng[9].random(n),
                loss_day=rng[10].random(n),
            )
        return draws

    def confounded_steps(self) -> np.ndarray:
        """Per decision point: whether the hidden confounder acts there (Γ > 1 and a decision the protocol's
        ``sensitivity.confounded_decisions`` names)."""
        steps = np.arange(len(self.steps))
        return confounded_mask(steps, self.protocol.sensitivity) & (self.confounder_gamma > 1.0)

    def _rollout(self, n, seed, policy, record=False, follow=None):
        """Simulate ``n`` episodes under ``policy``; returns the decisions (one frame per decision point, with
        ``record``, else empty), usual care's probabilities of the simulated decisions, each episode's discounted
        return, and with ``follow`` ("observed": with loss to follow-up, "no loss": without) the episodes' end of
        follow-up (:class:`regimewise.selfcheck.followup.FollowUp`, else None)."""
        draws = self._draws(n, seed)
        tracker = None if follow is None else self.follow_up.tracker(n, draws, loss=follow == "observed")
        p = self.protocol
        start = self.baseline.iloc[draws["baseline"]].reset_index(drop=True)
        state = start[[s.name for s in p.states]].copy()
        day = start["day"].to_numpy(dtype=float)
        active = np.ones(n, dtype=bool)
        returns = np.zeros(n)
        frames, probabilities = [], []
        # a regime that does not act on usual care's natural action needs no usual-care probabilities
        needs_usual_care = record or isinstance(policy, str) or hasattr(policy, "modify")
        confounded = self.confounded_steps()
        for t, models in enumerate(self.steps):
            index = np.flatnonzero(active)
            current = state.iloc[index].reset_index(drop=True)
            current["step"] = t
            hidden = draws["hidden"][index, t] if confounded[t] else None
            proba = self.usual_care.predict_proba(current) if needs_usual_care else None
            if needs_usual_care and hidden is not None:  # usual care's choice given the state and U
                proba = hidden_choice(proba, hidden, self.confounder_gamma)
            natural = _draw_codes(proba, draws["usual_care"][index, t]) if needs_usual_care else None
            codes = _policy_codes(policy, current, natural, proba, draws["coins"][index, t])
            design = self.design(current, codes)
            donor = self._donor(models, draws["donor"][index, t])
            reward = design @ models.reward + models.reward_residuals[donor]
            if hidden is not None:
                shift = CONFOUNDER_REWARD_SHIFT * np.std(models.reward_residuals, ddof=1)
                reward = reward + shift * (2.0 * hidden - 1.0)
            returns[index] += p.discount**t * reward
            if record:
                frames.append(self._decisions(current, index, day[index], codes, reward, t))
                probabilities.append(proba)
            if models.follow_up is None:
                if tracker is not None:
                    tracker.step(t, index, design, day[index], np.full(index.size, np.inf))
                break
            goes_on = models.follow_up.draw(design, draws["follow_up"][index, t]).astype(bool)
            nxt = self._next_states(models, current, design, donor, draws["classes"][index, t])
            for j, name in enumerate(nxt.columns):
                state.iloc[index, j] = nxt[name].to_numpy()
            if tracker is not None:
                tracker.step(t, index, design, day[index], np.where(goes_on, day[index] + models.gaps[donor], np.inf))
            day[index] = day[index] + models.gaps[donor]
            active[index[~goes_on]] = False
            if not active.any():
                break
        return frames, probabilities, returns, tracker

    def _donor(self, models, uniforms):
        return np.minimum((uniforms * len(models.reward_residuals)).astype(np.int64), len(models.reward_residuals) - 1)

    def _next_states(self, models, current, design, donor, uniforms):
        p = self.protocol
        nxt = current[[s.name for s in p.states]].copy()
        for j, name in enumerate(self.numeric_states):
            spec = next(s for s in p.states if s.name == name)
            values = design @ models.numeric[name] + models.residuals[donor, j]
            if spec.kind == "integer":
                values = np.round(values)
            nxt[name] = np.clip(values, *spec.plausible_range)
        for j, name in enumerate(self.class_states):
            drawn = models.classes[name].draw(design, uniforms[:, j])
            spec = next(s for s in p.states if s.name == name)
            nxt[name] = drawn.astype(float) if spec.kind == "binary" else drawn
        return nxt

    def _decisions(self, current, index, day, codes, reward, t):
        labels = np.asarray(self.protocol.action_labels, dtype=object)
        frame = pd.DataFrame(
            {
                "episode_id": _episode_ids(index),
                "step": np.full(index.size, t, dtype=np.int64),
                "day": np.round(day).astype(np.int64),
            }
        )
        frame.insert(1, "patient_id", frame["episode_id"])
        for s in self.protocol.states:
            frame[s.name] = current[s.name].to_numpy()
        frame["action"] = labels[codes]
        frame["reward"] = reward
        return frame

    def simulate(self, n: int, seed: int) -> tuple[pd.DataFrame, np.ndarray]:
        """A cohort of ``n`` episodes under usual care: clean decisions (episode and step order) and usual care's
        probabilities of every simulated decision (the truth of the world's usual care: with a hidden confounder,
        the probabilities given the state and U, from which the actions were drawn)."""
        decisions, _, proba = self.simulate_records(n, seed)
        return decisions, proba

    def simulate_records(self, n: int, seed: int) -> tuple[pd.DataFrame, pd.DataFrame | None, np.ndarray]:
        """As :meth:`simulate`, with the cohort's episodes table between (``episode_id``, ``patient_id``,
        ``n_decisions``, ``followup_days``, ``event``, in episode order; loss to follow-up on), or None when the
        world has no follow-up model. The decisions are those :meth:`simulate` gives for the same seed."""
        _check_count(n)
        frames, probabilities, _, tracker = self._rollout(
            n, seed, "usual_care", record=True, follow=None if self.follow_up is None else "observed"
        )
        decisions = pd.concat(frames, ignore_index=True)
        proba = np.concatenate(probabilities)
        order = np.lexsort((decisions["step"].to_numpy(), decisions["episode_id"].to_numpy()))
        decisions = decisions.iloc[order].reset_index(drop=True)
        if tracker is None:
            return decisions, None, proba[order]
        episodes = tracker.episodes(_episode_ids(np.arange(n)))
        episodes.insert(2, "n_decisions", decisions.groupby("episode_id", sort=True).size().to_numpy())
        return decisions, episodes, proba[order]

    def returns(self, policy, n: int, seed: int) -> np.ndarray:
        """Every episode's discounted return under ``policy``: ``"usual_care"``, a regime (a callable of a state
        frame giving action codes, such as a learned regime), or a strategy acting on usual care's natural action
        (an object with ``modify(frame, natural, proba, coins)``, as in :mod:`regimewise.demo.strategies`; with a
        hidden confounder ``proba`` are usual care's probabilities given the state and U, from which ``natural``
        was drawn). The same ``seed`` gives every policy the same draws (common random numbers)."""
        _check_count(n)
        return self._rollout(n, seed, policy)[2]

    def returns_and_event_days(self, policy, n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
        """As :meth:`returns`, with each episode's event day had nobody been lost to follow-up (infinite without an
        event by the horizon): the same draws for every policy, so a policy acting as usual care does gives the same
        event days. Needs a world with a follow-up model."""
        _check_count(n)
        if self.follow_up is None:
            raise UserInputError("survival truths need a world fitted with a survival section and an episodes table")
        _, _, returns, tracker = self._rollout(n, seed, policy, follow="no loss")
        return returns, tracker.event_day


def fitted_world(
    records: pd.DataFrame,
    protocol: Protocol,
    *,
    episodes: pd.DataFrame | None = None,
    confounder_gamma: float = 1.0,
) -> LookAlikeWorld:
    """The look-alike world fitted on clean records (and their episodes table, for the survival part), one BLAS
    thread, fitting warnings silenced (the analysis of the records themselves reports them), with a hidden
    confounder of strength ``confounder_gamma`` (1: none)."""
    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return LookAlikeWorld.fit(records, protocol, episodes).with_confounder(confounder_gamma)


def hidden_choice(proba: np.ndarray, hidden: np.ndarray, gamma: float) -> np.ndarray:
    """Usual care's probabilities given the state and the hidden U: rows of :func:`tilted_probabilities` at
    U = 1 where ``hidden``, at U = 0 elsewhere."""
    high, low = tilted_probabilities(proba, gamma)
    return np.where(np.asarray(hidden, dtype=bool)[:, None], high, low)


def tilted_probabilities(proba, gamma: float) -> tuple[np.ndarray, np.ndarray]:
    """Usual care's probabilities given a hidden U = 1 and U = 0, tilted from ``proba`` (n, K), the
    probabilities e(a|x) averaged over U, within the marginal sensitivity model of strength Γ (Tan 2006).

    U = 1 scales the upper half of the action order (codes ≥ ⌈K/2⌉) by 1 + δ/s and the lower half (codes < ⌊K/2⌋)
    by 1 − δ/l, U = 0 the other way (s, l: each half's probability), so the two average to ``proba`` and each row
    still sums to 1. Scaling e by c gives the odds ratio c(1 − e)/(1 − ce); it is Γ at c = Γ/(1 − e + Γe) and 1/Γ
    at c = 1/(Γ(1 − e) + e), and moves away from 1 as e grows, so δ is the largest mass with both halves' most likely
    actions within [1/Γ, Γ] in both directions: one of them reaches Γ or 1/Γ exactly (unless a half is empty, when
    δ = 0).
    """
    e = np.asarray(proba, dtype=float)
    gamma = _check_gamma(gamma)
    k = e.shape[1]
    code = np.arange(k)
    upper, lower = code >= (k + 1) // 2, code < k // 2
    halves = []
    for part in (upper, lower):
        mass, top = e[:, part].sum(axis=1), e[:, part].max(axis=1)
        raise_to = gamma / (1.0 - top + gamma * top) - 1.0  # c − 1 at odds ratio Γ, c ≥ 1
        lower_to = 1.0 - 1.0 / (gamma * (1.0 - top) + top)  # 1 − c at odds ratio 1/Γ, c ≤ 1
        halves.append((mass, mass * np.minimum(raise_to, lower_to)))
    (upper_mass, upper_room), (lower_mass, lower_room) = halves
    delta = np.minimum(upper_room, lower_room)
    with np.errstate(invalid="ignore", divide="ignore"):
        up = np.where(upper_mass > 0, delta / upper_mass, 0.0)[:, None]
        down = np.where(lower_mass > 0, delta / lower_mass, 0.0)[:, None]
    step = np.where(upper, up, 0.0) - np.where(lower, down, 0.0)
    return e * (1.0 + step), e * (1.0 - step)


# ----------------------------------------------------------------------------------------------------- helpers
def _check_gamma(gamma):
    number = not isinstance(gamma, bool) and isinstance(gamma, (int, float, np.integer, np.floating))
    if not number or not np.isfinite(gamma) or gamma < 1.0:
        raise UserInputError(f"hidden confounder's strength Γ: got {gamma!r}; give a finite number of at least 1")
    return float(gamma)


def _episode_ids(index) -> np.ndarray:
    """The identifiers of simulated episodes ``index`` (0-based): S0000001, S0000002, ... in the decisions and the
    episodes table alike."""
    return np.array([f"S{i + 1:07d}" for i in index], dtype=object)


def _check_count(n):
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise UserInputError(f"number of episodes: got {n!r}; give a positive integer")


def _state_text(frame, name, protocol):
    spec = next(s for s in protocol.states if s.name == name)
    if spec.kind == "categorical":
        return level_values(frame, name, spec.coded_levels)
    return frame[name].to_numpy(dtype=float)


def _never_changes(frame, name, following):
    values = frame[name].to_numpy()
    return bool(np.all(values[1:][following[:-1]] == values[:-1][following[:-1]]))


def _draw_codes(proba, uniforms):
    cumulative = np.cumsum(proba, axis=1)
    return np.minimum((uniforms[:, None] > cumulative).sum(axis=1), proba.shape[1] - 1)


def _policy_codes(policy, frame, natural, proba, coins):
    if isinstance(policy, str) and policy == "usual_care":
        return natural
    if hasattr(policy, "modify"):
        return np.asarray(policy.modify(frame, natural, proba, coins), dtype=np.int64)
    if callable(policy):
        return np.asarray(policy(frame), dtype=np.int64)
    raise UserInputError(f"policy: got {policy!r}; give 'usual_care', a regime or a strategy")
