"""Off-policy values of the learned regime, usual care and the fixed 'always <action>' strategies.

Each regime is evaluated by the estimators the protocol names, all on one set of importance weights per
regime (:func:`regimewise.evaluation.ope.evaluate_off_policy`). The doubly robust estimators use, as outcome model,
fitted-Q evaluation of the same regime (Le, Voloshin & Yue 2019) with the protocol's Q-model, so every regime
gets its own Q-function rather than borrowing the learned regime's; that fitted-Q evaluation is also reported
as an estimator of its own (``fqe``, the direct method). It uses no weights, but it carries the regime's weight
diagnostics: when few episodes follow the regime, its value rests on the Q-model's extrapolation.

An estimate whose Kish effective sample size is below ``max(evaluation.minimum_ess, evaluation.minimum_ess_fraction
× episodes)`` (defaults 30 and 5%) is flagged ``low_ess`` (common practice, no single source).
"""

from __future__ import annotations

import functools
import itertools
import threading
import weakref
from collections.abc import Iterator
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from regimewise.core.arrays import check_finite, check_layout, check_proba
from regimewise.core.concurrency import run_concurrently
from regimewise.core.features import QFeatures, StateArrays, StateScaler, action_codes, episode_codes
from regimewise.core.terms import SEPARATE, ActionSlopes
from regimewise.errors import UserInputError
from regimewise.estimators import ESTIMATORS
from regimewise.evaluation.fqe import FittedQEvaluation
from regimewise.evaluation.ope import estimates_from_weights, importance_weights
from regimewise.evaluation.outcome_models import needs_outcome_model, outcome_models
from regimewise.evaluation.strategies import SHORT_ROW, changed_by_row, protocol_strategies, strategy_proba
from regimewise.evaluation.verdicts import outcome_model_share, unsupported_by_row, verdict, worst
from regimewise.protocol.model import Protocol
from regimewise.protocol.sections import EvaluationSpec
from regimewise.regime.qmodels import target_rows

WEIGHT_HISTOGRAM_EDGES = tuple(x / 2 for x in range(-6, 9))  # log10 of the cumulative weight, 10^-3 .. 10^4


# Memory for the cubes of the scaled states kept across the outcome models' passes (:class:`FeatureRows`): at
# 8 bytes per value, the 6 numeric states of a cubic basis fit 11M decisions (the whole of 1M episodes x 12 but 7%).
KEPT_POWER_BYTES = 512 * 2**20


class FeatureRows:
    """The Q-features of the decisions read a block of rows at a time: ``X[rows]`` transforms those rows of the
    frame only, so the whole (n, p) matrix, the evaluation's largest array, need not be held while the outcome
    models are fitted a step at a time (:func:`regimewise.regime.qmodels.evaluate_policies`). The features of a
    row depend on that row alone, so the blocks hold exactly the numbers of the whole matrix. ``np.asarray`` of it
    is the whole matrix, for code that needs it.

    The outcome models read every row's features once per pass and group of regimes, so the states are taken out of
    the frame once (:class:`regimewise.core.features.StateArrays`) and each block is gathered from them with numpy
    indexing rather than from a frame built per block, and the cubes of the first rows' states, the costliest
    columns, are computed once and kept within :data:`KEPT_POWER_BYTES`
    (:class:`regimewise.core.features.KeptPowers`). Features with ``q_model.terms`` (a term may read any column)
    are computed from the frame's rows instead, every column the scaler reads included (its missing indicators).
    """

    def __init__(self, features: QFeatures, frame: pd.DataFrame, protocol: Protocol, keep_powers: bool = True):
        self.features = features
        self.frame = frame
        self.states = StateArrays(features.scaler, frame) if features.terms is None else None
        # without ``keep_powers`` (rows read in one pass only: kept cubes would never be read) none are kept
        keep = keep_powers and self.states is not None
        self.kept = features.kept_powers(len(frame), KEPT_POWER_BYTES) if keep else None
        # the terms read the states' columns and the scaler its indicators: a block gathers those, not the ids
        wanted = [s.name for s in protocol.states] + list(features.scaler.indicators)
        self.columns = [c for c in wanted if c in frame.columns]
        self.shape = (len(frame), len(features.names))

    def __len__(self) -> int:
        return self.shape[0]

    def __getitem__(self, rows) -> np.ndarray:
        if self.states is not None:
            return self.features.transform_arrays(self.states, rows, self.kept)
        # column by column, the rows first: selecting the columns of the whole frame first would copy them whole
        return self.features.transform(pd.DataFrame({c: self.frame[c].iloc[rows] for c in self.columns}))

    def __array__(self, dtype=None, copy=None) -> np.ndarray:
        return np.asarray(self.features.transform(self.frame), dtype=dtype)


@dataclass(frozen=True)
class LoggedDecisions:
    """The decision table as the arrays the estimators take (rows sorted by episode and step). ``X`` is the (n, p)
    Q-features, or a :class:`FeatureRows` that computes the rows asked for."""

    X: np.ndarray | FeatureRows
    step: np.ndarray
    action: np.ndarray
    reward: np.ndarray
    episode: np.ndarray
    patient: np.ndarray
    behaviour_proba: np.ndarray
    slopes: ActionSlopes = SEPARATE  # how the outcome models' coefficients vary with the action
    # step, action and episode come from check_layout, behaviour_proba from check_proba (every weighting skips them)
    layout_checked: bool = False

    @classmethod
    def from_frame(
        cls,
        frame: pd.DataFrame,
        behaviour_proba: np.ndarray,
        protocol: Protocol,
        *,
        feature_rows: bool = False,
        keep_powers: bool = True,
    ) -> LoggedDecisions:
        """The arrays of ``frame``; with ``feature_rows`` X is a :class:`FeatureRows` of ``frame`` (``keep_powers``:
        its argument)."""
        features = QFeatures.from_protocol(StateScaler.fit(frame, protocol), protocol, frame)
        # the layout every importance weighting needs, checked once here (the error it raises is the one the first
        # weighting would raise)
        step, action, episode = check_layout(
            frame["step"].to_numpy(dtype=np.int64),
            action_codes(frame, protocol.action_labels),
            episode_codes(frame),
            protocol.horizon,
            len(protocol.actions),
        )
        # the rewards and usual care's probabilities too, checked in the order of every weighting (the same errors)
        reward = check_finite(frame["reward"].to_numpy(dtype=float), "reward", 1)
        proba = np.asarray(behaviour_proba, dtype=float)
        if proba.ndim == 2:  # else every weighting stops at its shape before the checks it skips
            proba = check_proba(proba, len(frame), proba.shape[1], "behaviour_proba")
        return cls(
            X=FeatureRows(features, frame, protocol, keep_powers) if feature_rows else features.transform(frame),
            step=step,
            action=action,
            reward=reward,
            episode=episode,
            patient=pd.factorize(frame["patient_id"], sort=False)[0],
            behaviour_proba=proba,
            slopes=features.action_slopes(protocol),
            layout_checked=True,
        )

    def weighting_table(self) -> tuple:
        """step, action, reward, episode and usual care's probabilities: the table every weighting starts from."""
        return self.step, self.action, self.reward, self.episode, self.behaviour_proba

    @property
    def n_episodes(self) -> int:
        return int(self.episode.max()) + 1


# memory for the outcome models' results of one pass's regimes: at 1M episodes x 12 (192 MB per regime) every part
# of the workflow's evaluation (the learned regime and its 9 strategies, the 6 fixed regimes, the side-by-side
# ones) is one pass, which reads the features and forms each step's Gram matrices once instead of 2-3 times
PASS_BYTES = 2 * 2**30
MIN_REGIMES_PER_PASS = 4  # however many decisions: the number of passes must not grow with n


def regimes_per_pass(n_decisions: int) -> int:
    """How many regimes one evaluation pass takes. Each regime of a pass holds, from its outcome models until it
    is scored, two float64 values per decision (Q̂ of the action taken and V̂ of the regime); its targets are
    action codes or built for the rows asked for, and the features are read a step at a time
    (:func:`regimewise.regime.qmodels.evaluate_policies`), so nothing else a pass holds grows with its regimes. A
    pass may give those results :data:`PASS_BYTES`, and takes at least :data:`MIN_REGIMES_PER_PASS` regimes.

    The lower bound keeps the number of passes from growing with n: every pass repeats work in proportion to n
    (reading the features, the sorting by step, the least-squares Gram matrices), so passes that shrank as n grew
    would make the stage's time grow as n². Every regime of a small study shares one pass."""
    per_regime = 2 * 8 * max(1, n_decisions)
    return max(MIN_REGIMES_PER_PASS, PASS_BYTES // per_regime)


def _passes(regimes, logged: LoggedDecisions) -> Iterator[list]:
    """The items of ``regimes`` in lists of :func:`regimes_per_pass` for these decisions, each taken from the
    iterable only when the previous list is done with."""
    size = regimes_per_pass(len(logged.step))
    pending = iter(regimes)
    while chunk := list(itertools.islice(pending, size)):
        yield chunk
        del chunk  # released before the next list is built, once the caller has let go of it too


FIXED_PART, LEARNED_PART = "fixed", "learned"  # the two parts of the regimes (regime_targets' ``part``)


def fixed_regime_names(protocol: Protocol) -> list[str]:
    """Names of the regimes that do not depend on the learned regime, in :func:`regime_targets`' order: usual care,
    the fixed strategies (``evaluation.fixed_strategies``), the protocol's comparators."""
    fixed = [f"always_{a}" for a in protocol.action_labels] if protocol.evaluation.fixed_strategies else []
    return ["usual_care", *fixed, *(c.name for c in protocol.comparators)]


def one_hot(codes: np.ndarray, n_actions: int) -> np.ndarray:
    out = np.zeros((len(codes), n_actions))
    out[np.arange(len(codes)), codes] = 1.0
    return out


def regime_targets(
    frame: pd.DataFrame,
    behaviour_proba: np.ndarray,
    recommended: np.ndarray | None,
    protocol: Protocol,
    learned_q: np.ndarray | None = None,
    *,
    by_rows: bool = False,
    part: str | None = None,
) -> Iterator[dict]:
    """Every regime to evaluate, learned first: name, label, target probabilities, and for the strategies of the
    protocol's ``strategies`` section their family, parameter and clinical words (also the survival
    stage's strategies, so both stages name and define the regimes alike). The protocol's comparators follow the
    fixed strategies, each with its clinical words (``comparator``), acting on the states of ``frame`` (the clean
    decisions, rows aligned with ``behaviour_proba``).

    ``learned_q`` (n, K) holds the learned regime's cross-fitted Q-values, needed by the override strategies.
    With ``analysis.learn_regime: false`` there is no learned regime (``recommended`` is None): usual care comes
    first, then the named strategies.

    Each entry is built only when asked for, so a caller that finishes with one regime before taking the next
    holds one (n, K) target at a time, not all of them. With ``by_rows`` no target but usual care's is (n, K): a
    regime that takes one action with probability 1 (the learned regime, the fixed strategies, the comparators)
    has as target its (n,) action codes, and a strategy a function that builds its probabilities for the rows
    asked for (:func:`regimewise.regime.qmodels.target_rows` reads all three; a strategy's probabilities of a row
    depend on that row alone, so they are the same numbers).

    ``part`` keeps one part of the list, in the same order: ``"fixed"`` the regimes that do not depend on the
    learned regime (usual care, the fixed strategies, the comparators: :func:`fixed_regime_names`), ``"learned"``
    the learned regime and the strategies of the ``strategies`` section; None every regime. The entries of the
    other part are never built.
    """
    if part not in (None, FIXED_PART, LEARNED_PART):
        raise ValueError(f"part must be None, {FIXED_PART!r} or {LEARNED_PART!r}, not {part!r}")
    fixed, learned = part != LEARNED_PART, part != FIXED_PART
    labels = protocol.action_labels
    k = len(labels)

    def deterministic(codes):  # by rows: the codes in the smallest integer type that holds them
        return np.asarray(codes).astype(np.min_scalar_type(max(k - 1, 0)), copy=False) if by_rows else one_hot(codes, k)

    if recommended is not None and learned:
        yield {"name": "learned", "label": "Learned regime", "target": deterministic(recommended)}
    if fixed:
        yield {"name": "usual_care", "label": "Usual care", "target": behaviour_proba}
        if protocol.evaluation.fixed_strategies:
            for j, a in enumerate(labels):
                yield {
                    "name": f"always_{a}",
                    "label": f"Always {a.replace('_', ' ')}",
                    "target": deterministic(np.full(len(frame), j)),
                }
        columns = _comparator_columns(frame, protocol)
        for c in protocol.comparators:
            codes = c.action_codes(columns, len(frame), labels)
            yield {"name": c.name, "label": c.label, "target": deterministic(codes), "comparator": c}
    if not learned:
        return
    inputs = StrategyInputs(recommended, behaviour_proba, learned_q) if by_rows else None  # shared by the strategies
    for s in protocol_strategies(protocol.strategies):  # built inline: no local name keeps the last one alive
        yield {
            "name": s.name,
            "label": s.label,
            "target": _strategy_by_rows(s, inputs)
            if by_rows
            else strategy_proba(s, recommended, behaviour_proba, learned_q),
            "strategy": s,
        }


class StrategyInputs:
    """What the strategies are built from (the learned regime's recommendations, usual care's probabilities and the
    cross-fitted Q-values), read at the rows asked for and shared by every strategy of a list.

    The outcome models ask each strategy of a pass in turn for the same rows (a step's decisions, spread over the
    whole table: :func:`regimewise.regime.qmodels.evaluate_policies`), and gathering those rows took longer than
    building the probabilities from them. So the rows last asked for are remembered with what was gathered there,
    and given again while the same rows object (not merely equal positions) is asked for. What was gathered is let
    go as soon as that rows object is (the outcome models let go of a step's rows at the end of the step), so it
    does not stay in the allocator's way of later arrays; a slice is not remembered (it gives views). Each thread
    remembers its own (the folds' passes may run in threads). What is given is never written by the strategies,
    and the rows are gathered by the same indexing as before, so every strategy sees the same numbers in the same
    layout.
    """

    def __init__(self, recommended: np.ndarray, behaviour_proba: np.ndarray, learned_q: np.ndarray | None):
        self.recommended = recommended
        self.behaviour_proba = behaviour_proba
        self.learned_q = learned_q
        self._last = threading.local()

    def at(self, rows, with_q: bool = True) -> tuple:
        """(recommended, usual care's probabilities, Q-values or None) at ``rows`` (positions, a mask or a slice).
        Without ``with_q`` the Q-values are None unless they were gathered for these rows already: only the override
        strategies read them, and a pass without one need not gather them."""
        local = self._last
        last = getattr(local, "entry", None)
        if last is not None and last[0]() is rows:
            gathered = last[1]
            if with_q and gathered[2] is None and self.learned_q is not None:
                gathered = (*gathered[:2], self.learned_q[rows])
                local.entry = (last[0], gathered)
            return gathered
        local.entry = None  # what was gathered for other rows is let go first
        q = None if self.learned_q is None or not with_q else self.learned_q[rows]
        gathered = (self.recommended[rows], self.behaviour_proba[rows], q)
        if isinstance(rows, np.ndarray):
            local.entry = (weakref.ref(rows, functools.partial(_forget, local)), gathered)
        return gathered


def _forget(local: threading.local, ref: weakref.ref) -> None:
    """Let go of what :meth:`StrategyInputs.at` remembers for rows that are gone (``ref``: their reference)."""
    entry = getattr(local, "entry", None)
    if entry is not None and entry[0] is ref:
        local.entry = None


def _strategy_by_rows(s, inputs: StrategyInputs):
    """Strategy ``s`` as a function of rows that returns its (m, K) probabilities there, built from ``inputs`` at
    those rows. It is built on no rows first, so that a strategy that cannot be built (override_gain without
    Q-values) stops here, as it would whole."""

    def rows_proba(rows):
        return strategy_proba(s, *inputs.at(rows, with_q=s.family == "override_gain"))

    rows_proba(slice(0, 0))
    return rows_proba


def _comparator_columns(frame: pd.DataFrame, protocol: Protocol) -> dict:
    """The states the comparators' conditions read: a categorical state's levels stay text."""
    return {
        s.name: frame[s.name].to_numpy(dtype=object if s.kind == "categorical" else float)
        for s in protocol.states
        if protocol.comparators
    }


def named_strategy_codes(frame: pd.DataFrame, protocol: Protocol, name: str) -> np.ndarray:
    """Action codes, per row of ``frame``, of a strategy the protocol names (``always_<action>`` or a comparator)."""
    labels = protocol.action_labels
    if name.startswith("always_") and name.removeprefix("always_") in labels:
        return np.full(len(frame), labels.index(name.removeprefix("always_")), dtype=np.int64)
    comparator = next(c for c in protocol.comparators if c.name == name)
    return np.asarray(comparator.action_codes(_comparator_columns(frame, protocol), len(frame), labels))


def named_strategy_label(protocol: Protocol, name: str) -> str:
    """The label of a strategy the protocol names: the comparator's label, or 'Always <action>'."""
    comparator = next((c for c in protocol.comparators if c.name == name), None)
    return comparator.label if comparator is not None else f"Always {name.removeprefix('always_').replace('_', ' ')}"


def named_strategy_words(protocol: Protocol, name: str) -> str:
    """A named strategy in a sentence: "the named strategy '<label>'"."""
    return f"the named strategy '{named_strategy_label(protocol, name)}'"


def evaluate_regime(logged: LoggedDecisions, target, protocol: Protocol, deterministic: bool, *args, **kwargs) -> dict:
    """The protocol's estimators for one regime, as JSON-ready dicts with a low-ESS flag and a verdict: the
    estimates of :func:`regime_estimates`, which takes the same arguments."""
    return regime_estimates(logged, target, protocol, deterministic, *args, **kwargs)[0]


def regime_estimates(
    logged: LoggedDecisions,
    target: np.ndarray,
    protocol: Protocol,
    deterministic: bool,
    strict: bool = True,
    folds: np.ndarray | None = None,
    fitted=None,
    records_regime: bool = False,
    changed: bool = False,
) -> tuple[dict, float | None]:
    """The protocol's estimators for one regime, as JSON-ready dicts with a low-ESS flag and a verdict, and with
    ``changed`` the regime's share of decisions changed from usual care (:func:`row_mean` of
    :func:`regimewise.evaluation.strategies.changed_by_row`; else None).

    ``n_following`` (episodes whose every action the regime takes with probability 1) is reported for
    deterministic regimes only; it is null for a stochastic regime such as usual care. With ``strict=False``
    a fitted-Q evaluation that cannot be fitted (an action the regime may take never occurs at some step)
    leaves the model-based estimators (dr, wdr, fqe) null instead of raising. ``folds`` fits the fitted-Q
    evaluation within each fold (a cross-fitted regime,
    :func:`regimewise.regime.learning.cross_fitted_recommendations`). ``fitted`` passes the outcome model's
    (Q̂ taken, V̂, fqe value) or the error that stopped it (:func:`regimewise.evaluation.outcome_models.outcome_models`).
    ``records_regime``: the regime is usual care, the one the records follow
    (:func:`regimewise.evaluation.verdicts.verdict`). ``target``: the regime's (n, K) probabilities, its (n,)
    action codes, or a function of the rows (:func:`regimewise.regime.qmodels.target_rows`); its (n, K)
    probabilities are built once, for the importance weights and the shares (unsupported, changed), read a block of
    rows at a time as :func:`row_mean` would build them (the same numbers), and are not held while the estimators
    run. Action codes are read as they are (:func:`weighted_target`). Only the protocol's estimators are computed
    (:func:`regimewise.evaluation.ope.estimates_from_weights`).
    """
    q_taken, v_target, fqe_value = None, None, float("nan")
    if fitted is None and needs_outcome_model(protocol):  # the Q-models are fitted only when an estimator uses them
        try:
            fitted = _fitted_q_evaluation(logged, whole_target(target, logged.behaviour_proba), protocol, folds)
        except UserInputError as err:
            fitted = err
    if isinstance(fitted, UserInputError):
        if strict:
            raise fitted
    elif fitted is not None:
        q_taken, v_target, fqe_value = fitted
    # the regime's (n, K) probabilities, for its shares and then its weights (the shares first: their column of
    # terms is not held beside the weights); a regime given by its action codes is weighted and shared from them
    proba = weighted_target(target, logged.behaviour_proba)
    threshold = protocol.constraints.support_threshold
    share = row_mean(proba, logged.behaviour_proba, lambda t, b: unsupported_by_row(t, b, threshold))
    share_changed = row_mean(proba, logged.behaviour_proba, changed_by_row) if changed else None
    weights = importance_weights(
        *logged.weighting_table(),
        proba,
        horizon=protocol.horizon,
        action_labels=protocol.action_labels,
        layout_checked=logged.layout_checked,
    )
    del proba
    # the protocol's estimators, and PDWIS, whose weight diagnostics the model-only estimate carries
    wanted = {*protocol.evaluation.estimators, "pdwis"}
    results = estimates_from_weights(weights, protocol.discount, q_taken, v_target, names=wanted)
    del weights
    for e in ESTIMATORS.values():  # a model-based estimate carries the regime's weight diagnostics
        if e.needs_q_model:
            results.setdefault(
                e.label, replace(results["PDWIS"], estimator=e.label, value=float("nan"), se=float("nan"))
            )
    results[ESTIMATORS["fqe"].label] = replace(
        results["PDWIS"], estimator=ESTIMATORS["fqe"].label, value=fqe_value, se=float("nan")
    )
    floor = minimum_reliable_ess(logged.n_episodes, protocol.evaluation)
    out = {}
    for name in protocol.evaluation.estimators:
        estimate = results[ESTIMATORS[name].label].to_dict() | {"estimator": name}  # one spelling: the protocol's
        estimate["low_ess"] = bool(estimate["ess"] is None or estimate["ess"] < floor)
        if not deterministic:
            estimate["n_following"] = None
        judged = verdict(name, estimate["ess"], floor, share, protocol.evaluation.unidentified_share, records_regime)
        model_only = ESTIMATORS[name].family == "model" and not records_regime
        estimate.update(
            verdict=judged["verdict"],
            verdict_reason=judged["reason"],
            unsupported_share=share,
            outcome_model_share=outcome_model_share(estimate["ess"], floor, model_only)
            if ESTIMATORS[name].needs_q_model
            else None,
        )
        out[name] = estimate
    return out, share_changed


def evaluate_target(
    logged: LoggedDecisions, t: dict, protocol: Protocol, strict: bool, learned_folds=None, fitted=None
) -> dict:
    """One entry of values.json's ``regimes``: name, label, estimates with verdicts, and for a strategy of the
    protocol's ``strategies`` section its family, parameter, words and share of decisions changed.

    The learned regime and the strategies built from its cross-fitted recommendations get their outcome models
    fitted within the cross-fitting folds (``learned_folds``); usual care and the fixed strategies do not depend
    on the records' regime and are fitted on all records.
    """
    name, strategy = t["name"], t.get("strategy")
    folds = learned_folds if name == "learned" or strategy is not None else None
    deterministic = name != "usual_care" and strategy is None
    target = t["target"]  # as regime_targets gives it: (n, K), action codes or a function of the rows
    changed = strategy is not None or "comparator" in t
    estimates, share_changed = regime_estimates(
        logged, target, protocol, deterministic, strict, folds, fitted, name == "usual_care", changed
    )
    out = {"name": name, "label": t["label"], "estimates": estimates}
    if strategy is not None:
        out.update(strategy.to_dict(), share_changed=share_changed)
    if "comparator" in t:
        c = t["comparator"]
        out.update(comparator=True, words=c.words(protocol.states), source=c.source)
        out.update(share_changed=share_changed)
    return out


SHARE_ROWS = 65_536  # rows of a regime's probabilities built at a time


def whole_target(target, behaviour_proba: np.ndarray) -> np.ndarray:
    """A regime's (n, K) probabilities from a target as :func:`regimewise.regime.qmodels.target_rows` reads it,
    filled a block of :data:`SHARE_ROWS` rows at a time, so that building them takes little more memory than
    they hold (a strategy built whole makes several (n, K) temporaries). (n, K) probabilities are returned as
    given.

    With fewer than :data:`regimewise.evaluation.strategies.SHORT_ROW` actions they are laid out column by
    column: numpy sums such rows in the same order in either layout (:func:`regimewise.evaluation.strategies.row_sums`),
    so every row sum of them is the same number, and the row sums of their check
    (:func:`regimewise.core.arrays.check_proba`) and shares run down whole columns instead of row by row. They
    enter no matrix product."""
    if isinstance(target, np.ndarray) and target.ndim == 2:
        return target
    n, k = behaviour_proba.shape
    out = np.empty((n, k), order="F" if k < SHORT_ROW else "C")
    for start in range(0, n, SHARE_ROWS):
        rows = slice(start, start + SHARE_ROWS)
        out[rows] = target_rows(target, rows, k)
    return out


def weighted_target(target, behaviour_proba: np.ndarray) -> np.ndarray:
    """What a regime's importance weights and shares are computed from: its (n,) action codes when ``target`` is
    given by them (every code an action of usual care's columns), else its (n, K) probabilities
    (:func:`whole_target`). The weights and the shares of the codes are those of their one-hot probabilities
    (:func:`regimewise.evaluation.ope.importance_weights`, :func:`row_mean`), which are then never built."""
    k = behaviour_proba.shape[1]
    if isinstance(target, np.ndarray) and target.ndim == 1 and target.dtype.kind in "iu":
        if target.size and 0 <= target.min() and target.max() < k:
            return target
    return whole_target(target, behaviour_proba)


def row_mean(target, behaviour_proba: np.ndarray, term) -> float:
    """Mean over decisions of ``term(target rows, usual care's rows)``, a value per row that depends on that row
    alone (:func:`regimewise.evaluation.verdicts.unsupported_by_row`,
    :func:`regimewise.evaluation.strategies.changed_by_row`). The regime's probabilities are built a block of
    :data:`SHARE_ROWS` rows at a time (:func:`regimewise.regime.qmodels.target_rows`) rather than whole; the mean
    is taken over the whole column of terms, so it is the number the whole (n, K) matrix gives. A regime given by
    its (n,) action codes (:func:`weighted_target`) passes its codes to ``term``, which reads them as its one-hot
    probabilities."""
    n, k = behaviour_proba.shape
    codes = isinstance(target, np.ndarray) and target.ndim == 1
    terms = np.empty(n)
    for start in range(0, n, SHARE_ROWS):
        rows = slice(start, start + SHARE_ROWS)
        terms[rows] = term(target[rows] if codes else target_rows(target, rows, k), behaviour_proba[rows])
    return float(np.mean(terms))


def usual_care_contrasts(regimes: list[dict], estimators) -> list[dict]:
    """Learned regime and every strategy minus usual care, by each estimator, with the weaker regime's verdict.

    Without a learned regime (``analysis.learn_regime: false``), every named strategy minus usual care."""
    usual = next(r["estimates"] for r in regimes if r["name"] == "usual_care")
    learned = any(r["name"] == "learned" for r in regimes)
    out = []
    for r in regimes:
        if r["name"] == "usual_care" or (learned and r["name"] != "learned" and "family" not in r):
            continue
        for name in estimators:
            mine, theirs = r["estimates"][name], usual[name]
            missing = mine["value"] is None or theirs["value"] is None
            out.append(
                {
                    "regime": r["name"],
                    "versus": "usual_care",
                    "estimator": name,
                    "difference": None if missing else mine["value"] - theirs["value"],
                    "low_ess": mine["low_ess"],
                    "verdict": worst(mine["verdict"], theirs["verdict"]),
                }
            )
    return out


def _fitted_q_evaluation(logged: LoggedDecisions, target: np.ndarray, protocol: Protocol, folds=None):
    """Q̂ of the action taken, V̂ under the regime at each decision, and the fqe value (Le, Voloshin & Yue 2019).

    With ``folds`` (a fold per row, patients kept whole) the Q-models are fitted within each fold on that fold's
    records only, so a cross-fitted regime is never scored by a model that saw the records it was learned from.
    """
    if folds is not None:
        q_taken, v_target = np.empty(len(logged.step)), np.empty(len(logged.step))
        for fold in np.unique(folds):
            rows = folds == fold
            part = LoggedDecisions(
                X=logged.X[rows],
                step=logged.step[rows],
                action=logged.action[rows],
                reward=logged.reward[rows],
                episode=np.unique(logged.episode[rows], return_inverse=True)[1],
                patient=logged.patient[rows],
                behaviour_proba=logged.behaviour_proba[rows],
                slopes=logged.slopes,
            )
            try:
                q_taken[rows], v_target[rows], _ = _fitted_q_evaluation(part, target[rows], protocol)
            except UserInputError as err:
                raise UserInputError(
                    f"cross-fitted evaluation, fold {int(fold) + 1} of {len(np.unique(folds))}: {err} With few "
                    "records per fold, lower evaluation.cross_fit_folds (1 turns cross-fitting off, at the price of "
                    "optimism) or leave fqe, dr and wdr out of evaluation.estimators."
                ) from err
        return q_taken, v_target, float(np.mean(v_target[logged.step == 0]))
    fqe = FittedQEvaluation(
        n_actions=len(protocol.actions),
        horizon=protocol.horizon,
        gamma=protocol.discount,
        alpha=protocol.evaluation.fqe_ridge_alpha,
        action_labels=protocol.action_labels,
        slopes=logged.slopes,
    ).fit(logged.X, logged.step, logged.action, logged.reward, logged.episode, target)
    q_taken, v_target = fqe.taken_and_target_values(logged.X, logged.step, logged.action, target)
    first = logged.step == 0
    return q_taken, v_target, fqe.value_estimate(logged.X[first], target[first])


def headline_estimator(protocol: Protocol) -> str:
    """The estimator of the headline contrast: wdr if the protocol runs it, else its first estimator."""
    return "wdr" if "wdr" in protocol.evaluation.estimators else protocol.evaluation.estimators[0]


def minimum_reliable_ess(n_episodes: int, spec: EvaluationSpec | None = None) -> float:
    """max(minimum_ess, minimum_ess_fraction × episodes): the smallest ESS shown as reliable (defaults 30, 5%)."""
    spec = spec or EvaluationSpec()
    return float(max(spec.minimum_ess, spec.minimum_ess_fraction * n_episodes))


def weight_histograms(logged: LoggedDecisions, target: np.ndarray, protocol: Protocol) -> dict:
    """Per decision point, how many episodes carry a zero cumulative weight and a histogram of log10 of the rest.

    Weights below or above the fixed edges are counted in the first or last bin.
    """
    weights = importance_weights(
        *logged.weighting_table(),
        target,
        horizon=protocol.horizon,
        action_labels=protocol.action_labels,
        layout_checked=logged.layout_checked,
    )
    edges = np.asarray(WEIGHT_HISTOGRAM_EDGES)
    by_step = []
    for t, column in enumerate(weights.cumulative.T):
        positive = np.log10(column[column > 0])
        counts, _ = np.histogram(np.clip(positive, edges[0], edges[-1]), bins=edges)
        by_step.append({"step": t, "zero": int(np.sum(column <= 0)), "counts": counts.tolist()})
    return {"log10_edges": list(WEIGHT_HISTOGRAM_EDGES), "by_step": by_step}


def point_values(values: dict) -> dict:
    """{regime: {estimator: value or None}} from the output of :func:`evaluate_all`."""
    return {r["name"]: {est: e["value"] for est, e in r["estimates"].items()} for r in values["regimes"]}


def observed_returns(logged: LoggedDecisions, gamma: float) -> np.ndarray:
    """Discounted return Σ_t γ^t r_t of each episode."""
    return np.bincount(logged.episode, weights=logged.reward * gamma**logged.step, minlength=logged.n_episodes)


def clustered_mean(values: np.ndarray, cluster: np.ndarray) -> tuple[float, float]:
    """Mean and its standard error with episodes clustered by patient (sandwich form, no small-sample factor)."""
    mean = float(values.mean())
    totals = np.bincount(cluster, weights=values - mean)
    return mean, float(np.sqrt(np.sum(totals**2)) / len(values))


def evaluate_all(
    frame: pd.DataFrame,
    behaviour_proba: np.ndarray,
    recommended: np.ndarray | None,
    protocol: Protocol,
    side_by_side: dict[str, np.ndarray] | None = None,
    *,
    strict: bool = True,
    learned_folds: np.ndarray | None = None,
    learned_q: np.ndarray | None = None,
    threads: int = 1,
    fixed: list[dict] | None = None,
) -> dict:
    """Values of every regime, usual care's observed mean return and the learned-minus-usual-care contrasts
    (``recommended`` None: no regime was learned, and the contrasts are the named strategies minus usual care).

    ``fixed``: the entries of the regimes that do not depend on the learned regime, as
    :func:`evaluate_fixed_regimes` computed them on these decisions (the workflow computes them in a job of their
    own, before the regime is learned). They are taken as they are, in their place of the list, and only the
    learned regime and the strategies are evaluated here: the same values, as no regime's numbers depend on the
    others evaluated with it.

    With ``strict=False`` (bootstrap replicates) a regime whose fitted-Q evaluation cannot be fitted on these
    records (an action it may take never occurs at some step) gets null dr, wdr and fqe values instead of
    stopping the analysis.

    ``side_by_side`` ({variant name: action codes}) adds the safeguard comparison regimes of the regime stage
    under the key ``side_by_side`` (kept apart from ``regimes``, which the bootstrap and contrasts use).

    ``learned_folds`` (:func:`regimewise.regime.learning.crossfit_folds`) marks ``recommended`` as cross-fitted:
    the outcome models of the learned regime and of the strategies built from it are then fitted within each fold.
    ``learned_q`` (n, K): the cross-fitted Q-values the override strategies need.

    ``threads``: the folds' outcome models, and the estimates of the regimes of a pass, are computed ``threads`` at
    a time (:func:`regimewise.core.concurrency.run_concurrently`; the same numbers with any number).
    """
    # the outcome models read the features a step's rows at a time: X is never held whole
    logged = LoggedDecisions.from_frame(frame, behaviour_proba, protocol, feature_rows=True)
    part = None if fixed is None else LEARNED_PART
    targets = regime_targets(frame, logged.behaviour_proba, recommended, protocol, learned_q, by_rows=True, part=part)
    regimes, histograms = _evaluate_targets(logged, targets, protocol, strict, learned_folds, threads)
    if fixed is not None:
        regimes = with_fixed_regimes(regimes, fixed, protocol, recommended is not None)
    return values_document(
        protocol,
        observed_part(logged, protocol),
        regimes,
        histograms if recommended is not None else None,
        None if side_by_side is None else _side_by_side(logged, side_by_side, protocol, threads),
    )


def with_fixed_regimes(regimes: list[dict], fixed: list[dict], protocol: Protocol, learned: bool) -> list[dict]:
    """values.json's regimes: ``regimes`` (the learned part: the learned regime when ``learned``, then the
    strategies) with ``fixed`` (:func:`evaluate_fixed_regimes`' entries) in their place of :func:`regime_targets`'
    order: the learned regime, the fixed part, the strategies."""
    names = [r["name"] for r in fixed]
    if names != fixed_regime_names(protocol):
        raise UserInputError(
            f"the fixed strategies' values hold {names}, not this protocol's {fixed_regime_names(protocol)}; "
            "rerun the workflow"
        )
    head = 1 if learned else 0
    return [*regimes[:head], *fixed, *regimes[head:]]


def observed_part(logged: LoggedDecisions, protocol: Protocol) -> dict:
    """values.json's head: the discount, the episodes, the minimum reliable ESS and usual care's observed mean
    return with its patient-clustered standard error."""
    returns = observed_returns(logged, protocol.discount)
    episode_patient = np.zeros(logged.n_episodes, dtype=np.int64)
    episode_patient[logged.episode] = logged.patient
    mean, se = clustered_mean(returns, episode_patient)
    return {
        "discount": protocol.discount,
        "episodes": logged.n_episodes,
        "minimum_reliable_ess": minimum_reliable_ess(logged.n_episodes, protocol.evaluation),
        "usual_care_observed": {"mean_return": mean, "se": se, "n_episodes": logged.n_episodes},
    }


def values_document(
    protocol: Protocol, observed: dict, regimes: list[dict], histograms: dict | None, side_by_side: list | None
) -> dict:
    """values.json from its parts: :func:`observed_part`, every regime's entry (in :func:`regime_targets`' order),
    the learned regime's weight histograms (None without a learned regime) and the side-by-side regimes' entries
    (None without them); the contrasts with usual care are computed here."""
    return {
        **observed,
        "regimes": regimes,
        "contrasts": usual_care_contrasts(regimes, protocol.evaluation.estimators),
        **({} if histograms is None else {"learned_weight_histograms": histograms}),
        **({} if side_by_side is None else {"side_by_side": side_by_side}),
    }


def evaluate_learned_regimes(
    frame: pd.DataFrame,
    behaviour_proba: np.ndarray,
    recommended: np.ndarray | None,
    protocol: Protocol,
    *,
    learned_folds: np.ndarray | None = None,
    learned_q: np.ndarray | None = None,
    threads: int = 1,
) -> dict:
    """The part of values.json that depends on the learned regime and not on the side-by-side ones: its head
    (``observed``, :func:`observed_part`), the entries of the learned regime and the strategies built from it
    (``regimes``; without a learned regime, the named strategies) and the learned regime's weight histograms
    (``histograms``, None without it). :func:`values_document` joins it with the other parts, as
    :func:`evaluate_all` does with ``fixed`` given; the arguments are :func:`evaluate_all`'s."""
    count = (recommended is not None) + len(protocol_strategies(protocol.strategies))
    logged = LoggedDecisions.from_frame(
        frame, behaviour_proba, protocol, feature_rows=True, keep_powers=_several_passes(count, len(frame))
    )
    targets = regime_targets(
        frame, logged.behaviour_proba, recommended, protocol, learned_q, by_rows=True, part=LEARNED_PART
    )
    regimes, histograms = _evaluate_targets(logged, targets, protocol, True, learned_folds, threads)
    return {
        "observed": observed_part(logged, protocol),
        "regimes": regimes,
        "histograms": histograms if recommended is not None else None,
    }


def evaluate_side_by_side(
    frame: pd.DataFrame,
    behaviour_proba: np.ndarray,
    side_by_side: dict[str, np.ndarray],
    protocol: Protocol,
    *,
    threads: int = 1,
) -> list[dict]:
    """values.json's ``side_by_side`` entries (:func:`evaluate_all`'s ``side_by_side``), on their own. When one pass
    takes every regime, the features are read once: no cube of theirs is kept for a later pass."""
    keep = _several_passes(len(side_by_side), len(frame))
    logged = LoggedDecisions.from_frame(frame, behaviour_proba, protocol, feature_rows=True, keep_powers=keep)
    return _side_by_side(logged, side_by_side, protocol, threads)


def _several_passes(n_regimes: int, n_decisions: int) -> bool:
    """Whether ``n_regimes`` take more than one pass: only then are the features' cubes worth keeping
    (:class:`FeatureRows`); within one pass each row's features are read once (the folds' rows are disjoint)."""
    return n_regimes > regimes_per_pass(n_decisions)


def _evaluate_targets(logged, targets, protocol, strict, learned_folds, threads) -> tuple[list[dict], dict | None]:
    """The entries of :func:`evaluate_target` for every regime of ``targets`` (an iterable of
    :func:`regime_targets`), and the learned regime's weight histograms when it is among them (else None)."""
    regimes, histograms = [], None
    # regimes in passes of a bounded size: each pass's targets and outcome models are freed before the next
    # (a regime's numbers do not depend on which regimes share its pass)
    for chunk in _passes(targets, logged):
        models = outcome_models(logged, chunk, protocol, learned_folds, threads)
        regimes += run_concurrently(
            [
                functools.partial(evaluate_target, logged, t, protocol, strict, learned_folds, m)
                for t, m in zip(chunk, models)
            ],
            threads,
        )
        if chunk[0]["name"] == "learned":
            learned = weighted_target(chunk[0]["target"], logged.behaviour_proba)
            histograms = weight_histograms(logged, learned, protocol)
        del chunk, models
    return regimes, histograms


def evaluate_fixed_regimes(
    frame: pd.DataFrame, behaviour_proba: np.ndarray, protocol: Protocol, *, threads: int = 1
) -> list[dict]:
    """values.json's entries of the regimes that do not depend on the learned regime (usual care, the fixed
    strategies, the protocol's comparators: :func:`fixed_regime_names`), each fitted on all records.

    They need the records and usual care's probabilities only, so the workflow computes them in a job of their own
    while the regime is learned, and :func:`evaluate_all` takes them (``fixed``)."""
    keep = _several_passes(len(fixed_regime_names(protocol)), len(frame))
    logged = LoggedDecisions.from_frame(frame, behaviour_proba, protocol, feature_rows=True, keep_powers=keep)
    targets = regime_targets(frame, logged.behaviour_proba, None, protocol, by_rows=True, part=FIXED_PART)
    return _evaluate_targets(logged, targets, protocol, True, None, threads)[0]


def _side_by_side(
    logged: LoggedDecisions, side_by_side: dict[str, np.ndarray], protocol: Protocol, threads: int = 1
) -> list[dict]:
    """Every estimator for each safeguard comparison regime, their outcome models fitted on all records in passes
    as in :func:`evaluate_all`."""
    out = []
    for chunk in _passes(side_by_side.items(), logged):
        targets = [{"name": name, "target": codes} for name, codes in chunk]  # one-hot only while scored
        models = outcome_models(logged, targets, protocol)
        estimates = run_concurrently(
            [
                functools.partial(evaluate_regime, logged, t["target"], protocol, True, fitted=m)
                for t, m in zip(targets, models)
            ],
            threads,
        )
        out += [{"name": t["name"], "estimates": e} for t, e in zip(targets, estimates)]
    return out
