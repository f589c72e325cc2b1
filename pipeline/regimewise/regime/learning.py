"""Learning a support-constrained regime from validated decisions.

:func:`fit_usual_care` fits the usual-care (behaviour) model of the protocol; :func:`learn_regime` fits it
and then the fitted-Q iteration (Murphy 2005; Ernst, Geurts & Wehenkel 2005) with the support constraint
(Fujimoto, Meger & Precup 2019). The resulting :class:`LearnedRegime` maps any table of states (with a
``step`` column) to recommended action codes, so the same object is applied to the records, to new
patients in the simulator, and in tests.

Research use only: a learned regime is a hypothesis for study, not a treatment recommendation.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import Future
from dataclasses import dataclass

import numpy as np
import pandas as pd

from regimewise.core.arrays import has_distinct
from regimewise.core.features import (
    QFeatures,
    StateArrays,
    action_codes,
    episode_codes,
    patient_clusters,
)
from regimewise.core.folds import patient_folds
from regimewise.core.seeds import stream_ints
from regimewise.errors import UserInputError
from regimewise.protocol.model import Protocol
from regimewise.regime.clinical_rules import ClinicalRuleSet
from regimewise.regime.fqi import FittedQIteration, QLearningSettings
from regimewise.usual_care.fitting import UsualCareModel, fit_usual_care

# Side-by-side regimes, each adding one safeguard to the previous one.
SAFEGUARDS = ("unconstrained", "support", "rules", "pessimistic")


@dataclass(frozen=True)
class LearnedRegime:
    """A deterministic regime: the permitted action with the largest fitted Q-value."""

    usual_care: UsualCareModel
    q_features: QFeatures
    fqi: FittedQIteration
    action_labels: tuple[str, ...]
    rules: ClinicalRuleSet | None = None

    def q_values(self, frame: pd.DataFrame) -> np.ndarray:
        return self.fqi.q_values(self.q_features.transform(frame), frame["step"].to_numpy(dtype=np.int64))

    def recommend(self, frame: pd.DataFrame, behaviour_proba: np.ndarray | None = None) -> np.ndarray:
        """Recommended action codes; usual-care probabilities are estimated unless given."""
        if behaviour_proba is None:
            behaviour_proba = self.usual_care.predict_proba(frame)
        steps = frame["step"].to_numpy(dtype=np.int64)
        permitted = None if self.rules is None else self.rules.permitted(frame)
        return self.fqi.recommend(self.q_features.transform(frame), steps, behaviour_proba, permitted)

    def __call__(self, frame: pd.DataFrame) -> np.ndarray:
        return self.recommend(frame)


def fit_q_learning(
    decisions: pd.DataFrame,
    behaviour_proba: np.ndarray,
    protocol: Protocol,
    features: QFeatures,
    *,
    safeguards: str = "pessimistic",
    oof_error: bool = False,
    X: np.ndarray | None = None,
    arrays: dict | None = None,
    keep_q: bool = False,
) -> FittedQIteration:
    """Fitted-Q iteration on the decisions with the protocol's Q-model, learning mode and safeguards.

    ``safeguards`` is one of :data:`SAFEGUARDS`: each level adds one safeguard to the previous one
    (``"pessimistic"``, the default, applies every safeguard the protocol sets). ``X`` is
    ``features.transform(decisions)`` and ``arrays`` is :func:`decision_arrays` of the decisions when the caller
    has them already (computed here if None). ``keep_q``: keep the Q-values at the decisions
    (``FittedQIteration.record_q_``).
    """
    level = SAFEGUARDS.index(safeguards)
    c, q = protocol.constraints, protocol.q_model
    rules = ClinicalRuleSet.from_protocol(protocol) if level >= 2 else None
    arrays = decision_arrays(decisions, protocol) if arrays is None else arrays
    settings = QLearningSettings(
        gamma=protocol.discount,
        support_threshold=c.support_threshold if level >= 1 else 0.0,
        alpha=q.ridge_alpha,
        q_model=q.kind,
        mode=q.learning_mode,
        alpha_grid=tuple(q.ridge_grid),
        cv_folds=q.cv_folds,
        tolerance=q.tolerance,
        max_iterations=q.max_iterations,
        boosting_params=boosting_params(protocol),
        pessimism=c.pessimism if level >= 3 and c.pessimism > 0 else None,
        ensemble_size=c.ensemble_size,
        oof_error=oof_error,
        slopes=features.action_slopes(protocol),
    )
    return FittedQIteration(
        len(protocol.actions),
        protocol.horizon,
        settings,
        random_state=stream_ints(protocol.seed, "regime")[0],
        action_labels=protocol.action_labels,
    ).fit(
        features.transform(decisions) if X is None else X,
        arrays["step"],
        arrays["action"],
        arrays["reward"],
        arrays["episode"],
        behaviour_proba,
        rule_permitted=None if rules is None else rules.permitted(decisions),
        groups=arrays["groups"],
        keep_q=keep_q,
    )


def q_design_of_rows(features: QFeatures, frame: pd.DataFrame) -> Callable[[np.ndarray | slice], np.ndarray]:
    """A function of rows (integer positions or a slice) giving ``features.transform(frame.iloc[rows])``: the same
    bits in the same memory layout. Without ``q_model.terms`` the states are taken out of the frame once
    (:class:`regimewise.core.features.StateArrays`) and each block of rows is gathered from them, instead of a
    frame of every column (the ids' strings too) built per block."""
    if features.terms is not None:
        return lambda rows: features.transform(frame.iloc[rows])
    states = StateArrays(features.scaler, frame)
    return lambda rows: features.transform_arrays(states, rows)


def decision_arrays(decisions: pd.DataFrame, protocol: Protocol) -> dict:
    """The arrays of the decisions :func:`fit_q_learning` fits on besides the Q-features and the clinical rules:
    ``step``, ``action`` codes, ``reward`` (to maximise), ``episode`` codes and patient ``groups`` (None without
    ``patient_id``). The fits only read them, so the side-by-side regimes share one set (:func:`variant_tasks`)."""
    return {
        "step": decisions["step"].to_numpy(dtype=np.int64),
        "action": action_codes(decisions, protocol.action_labels),
        "reward": protocol.reward.sign * decisions["reward"].to_numpy(dtype=float),  # lower is better: maximise −reward
        "episode": episode_codes(decisions),
        "groups": pd.factorize(patient_clusters(decisions), sort=False)[0] if "patient_id" in decisions else None,
    }


def boosting_params(protocol: Protocol) -> dict:
    """Keyword arguments of the gradient boosting Q-model from the protocol."""
    q = protocol.q_model
    return {
        "max_iter": q.boosting_max_iter,
        "max_leaf_nodes": q.boosting_max_leaf_nodes,
        "learning_rate": q.boosting_learning_rate,
        "min_samples_leaf": q.boosting_min_samples_leaf,
    }


def variant_tasks(
    decisions: pd.DataFrame, behaviour_proba: np.ndarray, protocol: Protocol, features: QFeatures, X=None
) -> dict[str, Callable[[], FittedQIteration]]:
    """The side-by-side regimes: unconstrained, support-, rule-constrained and (if k > 0) pessimistic, one fit
    callable each, for :func:`regimewise.core.concurrency.run_concurrently`.

    Each is learned on its own (the safeguards also shape the values carried backwards); the last one is the
    protocol's learned regime. Only the last computes the out-of-fold error of its Q-models and keeps its
    Q-values at the decisions (``record_q_``). ``X`` is
    ``features.transform(decisions)``, built here once for all of them when not given; the fits only read it, and
    likewise the decisions' codes (:func:`decision_arrays`, which took each fit about a second of the pandas work
    at a million episodes). Each callable lets go of ``X`` and of the codes when it has run, so once every one has
    run the caller's ``del X`` frees it (the regime stage's summaries need memory of their own); a callable run a
    second time builds them again.
    """
    names = list(SAFEGUARDS if protocol.constraints.pessimism > 0 else SAFEGUARDS[:-1])
    X = features.transform(decisions) if X is None else X
    arrays = decision_arrays(decisions, protocol)

    def task(name, held):
        def fit():
            X, arrays = held.pop() if held else (None, None)  # each callable's own list: no other thread touches it
            return fit_q_learning(
                decisions,
                behaviour_proba,
                protocol,
                features,
                safeguards=name,
                oof_error=name == names[-1],
                X=X,
                arrays=arrays,
                keep_q=name == names[-1],
            )

        return fit

    return {name: task(name, [(X, arrays)]) for name in names}


def learn_regime(decisions: pd.DataFrame, protocol: Protocol, usual_care=None) -> LearnedRegime:
    """Fit usual care (unless ``usual_care``, the :class:`~regimewise.usual_care.fitting.UsualCareModel` of these
    decisions, is given), then the constrained regime, on validated decisions sorted by episode and step."""
    usual_care = fit_usual_care(decisions, protocol) if usual_care is None else usual_care
    proba = usual_care.record_proba
    features = QFeatures.from_protocol(usual_care.scaler, protocol, decisions)
    fqi = fit_q_learning(decisions, proba, protocol, features)
    return LearnedRegime(usual_care, features, fqi, protocol.action_labels, ClinicalRuleSet.from_protocol(protocol))


def crossfit_folds(decisions: pd.DataFrame, protocol: Protocol) -> np.ndarray | None:
    """Fold of every row for the cross-fitted evaluation (patients kept whole), or None with one fold.

    Seeded by stream ``cross_fit`` of :mod:`regimewise.core.seeds`, so the evaluate stage and every bootstrap
    replicate find the folds again from the records and the protocol alone.
    """
    k = protocol.evaluation.cross_fit_folds
    if k == 1:
        return None
    patients = patient_clusters(decisions)
    if not has_distinct(patients, 2 * k, pd.unique):
        raise UserInputError(
            f"evaluation.cross_fit_folds is {k} but the records hold {pd.unique(patients).size} patients; "
            f"lower it (at least 2 patients per fold are needed)"
        )
    seed = stream_ints(protocol.seed, "cross_fit")[0]
    return patient_folds(patients, k, seed)


def cross_fitted_recommendations(
    decisions: pd.DataFrame, behaviour_proba: np.ndarray, protocol: Protocol
) -> np.ndarray:
    """Action codes of the learned regime as evaluated: each patient's records scored by a regime learned without them.

    Patients are dealt into ``evaluation.cross_fit_folds`` folds (:func:`regimewise.core.folds.patient_folds`,
    seeded by stream ``cross_fit`` of :mod:`regimewise.core.seeds`); the rows of fold k get the recommendations
    of :func:`learn_regime` fitted on the other folds, with that regime's own usual-care model for the support
    constraint, as for a new patient. Evaluating a regime on the records it was learned from is optimistic: it
    was chosen because it looks good on them. The cross-fitted estimate targets the mean true value of the fold
    regimes, a data-adaptive parameter (Hubbard, Kherad-Pajouh & van der Laan 2016, Int J Biostat 12(1):3-19;
    cross-validated value of a learned rule: van der Laan & Luedtke 2015, J Causal Inference 3(1):61-95); each
    fold regime learns from (K-1)/K of the patients, so the estimate leans conservative for the regime learned
    from all of them. With one fold, the full-data regime's in-sample recommendations are returned. The
    evaluation must fit its own outcome models within each fold too (``evaluate.evaluate_all(learned_folds=...)``):
    a model fitted across folds has seen the records that chose the other folds' regimes.
    (Both references recalled from memory; neither is in the project's METHODS.md.)
    """
    return cross_fitted_regime(decisions, behaviour_proba, protocol)[0]


def cross_fitted_regime(
    decisions: pd.DataFrame, behaviour_proba: np.ndarray, protocol: Protocol, start=None
) -> tuple[np.ndarray, np.ndarray]:
    """The cross-fitted recommendations of :func:`cross_fitted_recommendations` and, from the same fold regimes,
    the Q-values (n, K) of every action: each patient's Q-values from the Q-models learned without that patient.

    The strategies that switch only when the learned regime's estimated gain is large enough
    (:mod:`regimewise.evaluation.strategies`) read their gains from these Q-values, so a patient's gain is never
    estimated by a model that learned from that patient. The fold regimes are learned one after the other
    (the regime stage runs the same :func:`cross_fit_tasks` on its threads). ``start``: as for
    :func:`cross_fit_tasks`.
    """
    folds = crossfit_folds(decisions, protocol)
    if folds is None:
        learned = learn_regime(decisions, protocol)
        return learned.recommend(decisions, behaviour_proba), learned.q_values(decisions)
    tasks = cross_fit_tasks(decisions, protocol, folds, start)
    return assemble_cross_fit(decisions, protocol, [task() for task in tasks])


def cross_fit_tasks(
    decisions: pd.DataFrame, protocol: Protocol, folds: np.ndarray, start=None
) -> list[Callable[[], tuple[np.ndarray, np.ndarray, np.ndarray]]]:
    """One callable per fold of ``folds``: it learns the fold's regime from the other folds and returns the fold's
    rows (boolean mask), the regime's recommendations there and its Q-values (n_fold, K). The regime (usual-care
    model, Q-model ensembles) is released when the callable returns.

    Each fold's usual-care model starts its Newton iterations from ``start`` (a usual-care model of the same
    patients' decisions, ``UsualCareModel.model``; :func:`~regimewise.usual_care.fitting.fit_usual_care`), or,
    without one, every fold after the first from the first fold's model, fitted on other patients of the same
    records (with two folds, the other half): the same maxima, in fewer iterations. The first fold's callable hands
    its model on as soon as it is fitted, and the others wait for it, so the numbers do not depend on how many run
    at once; run the callables in their order (the first starts first), as
    :func:`~regimewise.core.concurrency.run_concurrently` does, or one after the other.
    """
    handoff = Future() if start is None else None  # the first fold's usual-care model, for the others

    def task(index, fold):
        def learn_and_score():
            held_out = folds == fold
            training = rows_of(decisions, ~held_out)
            if handoff is None:
                usual_care = fit_usual_care(training, protocol, start)
            elif index == 0:
                usual_care = None
                try:
                    usual_care = fit_usual_care(training, protocol)
                finally:  # the others start cold if this fit fails (its error is raised to the caller)
                    handoff.set_result(None if usual_care is None else usual_care.model)
            else:
                usual_care = fit_usual_care(training, protocol, handoff.result())
            learned = learn_regime(training, protocol, usual_care)
            del training
            return held_out, *score_by_step(learned, rows_of(decisions, held_out))

        return learn_and_score

    return [task(index, fold) for index, fold in enumerate(np.unique(folds))]


def score_by_step(learned: LearnedRegime, frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """``learned.recommend(frame)`` and ``learned.q_values(frame)``, with the Q-features built for one decision step
    at a time rather than for the whole frame.

    The step models score each step's rows on their own (:meth:`FittedQIteration.recommend` and ``q_values`` take
    the rows of step t out of X, in their order, into a design of their own), and every Q-feature depends on its
    own row only, so the rows of one step, in the frame's order, get exactly the numbers of the whole frame; one
    call (:meth:`FittedQIteration.recommend_with_q`) gives both, each step model predicting once. Usual
    care's probabilities (computed in row blocks from the first row) and the clinical rules are computed on the
    whole frame, as ``recommend`` computes them.
    """
    proba = learned.usual_care.predict_proba(frame)
    permitted = None if learned.rules is None else learned.rules.permitted(frame)
    steps = frame["step"].to_numpy(dtype=np.int64)
    codes = np.empty(len(frame), dtype=np.intp)
    q = np.empty((len(frame), len(learned.action_labels)))
    design = q_design_of_rows(learned.q_features, frame)
    for t in np.unique(steps):
        at = np.flatnonzero(steps == t)
        X = design(at)
        codes[at], q[at] = learned.fqi.recommend_with_q(
            X, steps[at], proba[at], None if permitted is None else permitted[at]
        )
    return codes, q


def assemble_cross_fit(decisions: pd.DataFrame, protocol: Protocol, parts) -> tuple[np.ndarray, np.ndarray]:
    """The recommendations (n,) and Q-values (n, K) of every row from the results of :func:`cross_fit_tasks`."""
    recommended = np.empty(len(decisions), dtype=np.int64)
    q = np.empty((len(decisions), len(protocol.actions)))
    for held_out, codes, values in parts:
        recommended[held_out] = codes
        q[held_out] = values
    return recommended, q


def fold_regimes(
    decisions: pd.DataFrame, protocol: Protocol, folds: np.ndarray
) -> list[tuple[np.ndarray, LearnedRegime]]:
    """For each fold of :func:`crossfit_folds`: its rows (boolean mask) and the regime learned from the other folds."""
    return [(folds == fold, fold_regime(decisions, protocol, folds, fold)) for fold in np.unique(folds)]


def fold_regime(decisions: pd.DataFrame, protocol: Protocol, folds: np.ndarray, fold) -> LearnedRegime:
    """The regime learned from the decisions outside fold ``fold`` of ``folds`` (:func:`crossfit_folds`)."""
    return learn_regime(rows_of(decisions, folds != fold), protocol)


def rows_of(decisions: pd.DataFrame, mask: np.ndarray) -> pd.DataFrame:
    """The rows of ``mask``, numbered 0..n-1: ``decisions.loc[mask].reset_index(drop=True)`` with one copy of the rows
    instead of two (``reset_index`` copies the selected rows again)."""
    rows = decisions.loc[mask]
    rows.index = pd.RangeIndex(len(rows))
    return rows


def record_proba(learned, decisions: pd.DataFrame) -> np.ndarray:
    """Usual care's probabilities at the training records, as the regime stage uses them (cross-fitted if so)."""
    fitted = getattr(learned.usual_care, "record_proba", None)
    return learned.usual_care.predict_proba(decisions) if fitted is None else fitted
