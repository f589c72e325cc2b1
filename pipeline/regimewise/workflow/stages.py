"""Stage functions: one per workflow rule, taking and writing plain file paths.

Each stage reads its inputs, calls the statistics in the package and writes its outputs atomically
(:mod:`regimewise.io`). Rules reach them through :func:`run_snakemake_job`; tests and the command line call
them directly. A stage never holds statistics of its own beyond arranging inputs and outputs.
"""

from __future__ import annotations

import json
import logging
import resource
import sys
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from threadpoolctl import threadpool_limits

# Every workflow job imports this module. The modules that bring scikit-learn, statsmodels, lifelines, patsy or
# matplotlib are imported inside the stages that use them (HEAVY_LIBRARIES, checked by a test): a short job, such
# as a join or the appendix, would otherwise spend more time importing them than working.
from regimewise.appendix.assemble import AppendixRun, write_appendix
from regimewise.bootstrap.intervals import combine, merge_intervals
from regimewise.cautions import RECOMMENDATION_CAUTION, stage_caution
from regimewise.core.concurrency import keep_freed_memory, run_concurrently, share_allocator_arenas
from regimewise.core.features import QFeatures, StateScaler, action_codes, known_action_codes
from regimewise.core.seeds import stream_ints
from regimewise.data.validate import validate_records, write_error_report
from regimewise.describe.balance import balance_by_step
from regimewise.errors import ERROR_PREFIX, DataValidationError, StatisticalWarning, UserInputError
from regimewise.evaluation.values import (
    evaluate_all,
    evaluate_fixed_regimes,
    evaluate_learned_regimes,
    evaluate_side_by_side,
    headline_estimator,
    named_strategy_codes,
    values_document,
    with_fixed_regimes,
)
from regimewise.io import (
    parquet_columns,
    parquet_rows,
    read_float_matrix,
    read_frame,
    read_json,
    read_label_codes,
    read_parquet,
    write_json,
    write_parquet,
    write_text,
)
from regimewise.protocol.loading import load_protocol
from regimewise.regime.clinical_rules import ClinicalRuleSet
from regimewise.regime.permitted import permitted_actions
from regimewise.regime.summary import regime_summary, safeguard_summary
from regimewise.report.provenance import build_provenance
from regimewise.report.summary import build_summary
from regimewise.sensitivity.analysis import (
    bounded_actions,
    comparator_curves,
    comparator_sensitivity,
    regime_curve,
    sensitivity_target,
    summarise_sensitivity,
)
from regimewise.usual_care.diagnostics import (
    diagnostics_document,
    model_block,
    overlap_by_step,
    usual_care_diagnostics,
)
from regimewise.workflow.settings import real_input

HEAVY_LIBRARIES = ("sklearn", "statsmodels", "lifelines", "patsy", "matplotlib", "scipy.stats", "scipy.optimize")


def report_stage(
    protocol,
    validation,
    behaviour,
    regime,
    values,
    html,
    summary,
    provenance,
    intervals=None,
    cohort=None,
    sensitivity=None,
    sweep=None,
    survival=None,
    selfcheck=None,
    reproduce="",
    threads=1,
):
    """Assemble summary.json, the provenance appendix and report.html from the stage outputs; ``reproduce`` is the
    command that reruns the analysis (rule parameter, from the command line that started the run); the report's
    figures are drawn in up to ``threads`` processes at once (the same bytes)."""
    from regimewise.report.html import render_html

    pf = load_protocol(protocol)
    p = pf.protocol
    parts = {
        "validation": read_json(validation),
        "behaviour": read_json(behaviour),
        "regime": read_json(regime),
        "values": merge_intervals(read_json(values), None if intervals is None else read_json(intervals)),
        "cohort": None if cohort is None else read_json(cohort),
        "sensitivity": None if sensitivity is None else read_json(sensitivity),
        "sweep": None if sweep is None else read_json(sweep),
        "survival": None if survival is None else read_json(survival),
        "selfcheck": None if selfcheck is None else read_json(selfcheck),
    }
    prov = build_provenance(pf, reproduce)
    headline = build_summary(p, parts, prov)
    write_json(provenance, prov)
    write_json(summary, headline)
    write_text(html, render_html(p, parts, prov, headline, processes=threads))


def appendix_stage(protocol, html, summary, provenance, manifest, command="", reproduce=""):
    """Write the audit appendix beside the stage folders (``<results>/appendix/``, the folder of ``manifest``):
    the environment, the resolved protocol, the seed streams and the commands, then the manifest of every
    artifact. ``html``, ``summary`` and ``provenance`` are inputs only so that it runs after the report."""
    write_appendix(AppendixRun(load_protocol(protocol), Path(manifest).parent.parent, command, reproduce))


log = logging.getLogger("regimewise")


# ---------------------------------------------------------------------------------------------- validate
def validate_stage(protocol, decisions, episodes, summary, errors=None, mapped=None):
    """Check the records and write clean Parquet tables and validation.json.

    ``errors`` (the rule's log ``errors``, in the logs folder, never a stage output) receives
    validation_errors.csv: every finding when validation fails, only the header when it passes. ``mapped``: also
    write the decisions there as the file the later jobs memory-map (:func:`regimewise.io.write_mapped_table`;
    the same table, read by :func:`regimewise.io.read_frame`).
    """
    pf = load_protocol(protocol)
    try:
        result = validate_records(pf)
    except DataValidationError as err:
        if errors is not None:
            write_error_report(errors, err.errors)
        raise
    if errors is not None:
        write_error_report(errors, ())
    write_parquet(decisions, result.decisions, mapped=mapped)
    write_parquet(episodes, result.episodes)
    write_json(summary, result.summary)
    log.info("validated %d decisions in %d episodes", len(result.decisions), result.summary["episodes"])


# ---------------------------------------------------------------------------------------------- behaviour
def proba_columns(labels) -> list[str]:
    return [f"p_{label}" for label in labels]


def behaviour_stage(protocol, decisions, proba, diagnostics):
    """Fit the usual-care model with cross-fitting; write the records' out-of-fold probabilities and diagnostics.
    The workflow splits this stage in two jobs, :func:`behaviour_fit_stage` (on the critical path: every later
    model needs the probabilities) and :func:`behaviour_diagnostics_stage` (beside the jobs after it), which write
    the same bytes."""
    from regimewise.usual_care.fitting import fit_usual_care

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    model = fit_usual_care(frame, p)
    _write_probabilities(proba, p, frame, model)
    write_json(diagnostics, usual_care_diagnostics(p, frame, model))


def _write_probabilities(path, p, frame, model, mapped=None) -> None:
    table = frame[["episode_id", "step"]].copy()
    table[proba_columns(p.action_labels)] = model.record_proba
    write_parquet(path, table, mapped=mapped)


def same_rows(table: pd.DataFrame, frame: pd.DataFrame) -> bool:
    """Whether a temporary table one job wrote for another (probabilities, fold regimes, side-by-side regimes) has
    the decisions' rows in their order: as many rows, with the same steps."""
    return len(table) == len(frame) and np.array_equal(table["step"].to_numpy(), frame["step"].to_numpy())


def behaviour_fit_stage(protocol, decisions, proba, model, mapped=None):
    """The workflow's first half of :func:`behaviour_stage`: fit the usual-care model and write the records'
    probabilities, and the model's block of behaviour.json (``model``, a temporary file of the workflow read by
    :func:`behaviour_diagnostics_stage`). ``mapped``: also write the probabilities' table there as the file the
    later jobs memory-map (:func:`regimewise.io.write_mapped_table`)."""
    from regimewise.usual_care.fitting import fit_usual_care

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    fitted = fit_usual_care(frame, p)
    _write_probabilities(proba, p, frame, fitted, mapped)
    write_json(model, model_block(p, fitted))


def behaviour_diagnostics_stage(protocol, decisions, proba, model, diagnostics):
    """The workflow's second half of :func:`behaviour_stage`: behaviour.json from the records, the probabilities
    :func:`behaviour_fit_stage` wrote (which must be of these decisions) and the model's block (the same bytes)."""
    from regimewise.usual_care.fitting import usual_care_folds

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    table = read_frame(proba, ["step", *proba_columns(p.action_labels)])  # not the text keys: 12M strings at 1M
    if not same_rows(table, frame):
        raise UserInputError(f"{proba} does not hold the probabilities of these decisions; rerun the workflow")
    # rows in memory as the fit left them (the diagnostics' sums run over the array in its memory order)
    probabilities = np.ascontiguousarray(table[proba_columns(p.action_labels)].to_numpy(dtype=float))
    del table
    folds = usual_care_folds(frame, p)
    document = diagnostics_document(
        p, frame, probabilities, p.behaviour_model.probability_floor, folds, read_json(model)
    )
    write_json(diagnostics, document)


def read_probabilities(path, labels) -> np.ndarray:
    """Usual care's probabilities (n, K) from the behaviour stage's table, reading its probability columns only:
    the same values in the same memory layout as taking them from the whole table, without converting a text key
    per decision (at 12M decisions, 2 to 4 s of each job that reads them) nor building a DataFrame
    (:func:`regimewise.io.read_float_matrix`)."""
    return read_float_matrix(path, proba_columns(labels))


# ---------------------------------------------------------------------------------------------- regime
def crossfit_stage(protocol, decisions, crossfit, threads=1):
    """Learn the cross-fitted fold regimes; write, for every decision, the action and Q-values of the regime
    learned without that decision's patient (:func:`regimewise.regime.learning.cross_fit_tasks`).

    The fold regimes fit their own usual-care models, so they need the validated records only: the workflow runs
    this job beside the behaviour stage, and the regime stage reads its table (a temporary file of the workflow,
    consumed there). With one fold (``evaluation.cross_fit_folds: 1``) or no learned regime the table holds the
    decisions' keys only: the regime stage then evaluates the regime it learns on all records.
    """
    from regimewise.regime.learning import assemble_cross_fit, cross_fit_tasks, crossfit_folds

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    out = frame[["step"]].copy()  # the steps let the readers check the rows (same_rows); no text keys
    folds = crossfit_folds(frame, p) if p.analysis.learn_regime else None
    if folds is not None:
        evaluated, q = assemble_cross_fit(frame, p, run_concurrently(cross_fit_tasks(frame, p, folds), threads))
        out["evaluated"] = evaluated
        out[evaluated_q_columns(p.action_labels)] = q
    write_parquet(crossfit, out, temporary=True)


def read_crossfit(path, frame, labels) -> tuple[np.ndarray, np.ndarray] | None:
    """The cross-fitted actions (n,) and Q-values (n, K) written by :func:`crossfit_stage`, or None when it
    cross-fitted nothing. Its rows must be the decisions' rows, in their order."""
    present = set(parquet_columns(path))  # without a learned regime the table holds the steps only
    table = read_parquet(path, [c for c in ["step", "evaluated", *evaluated_q_columns(labels)] if c in present])
    if not same_rows(table, frame):
        raise UserInputError(
            f"{path} does not hold the cross-fitted regimes of these decisions (its rows differ); rerun the workflow"
        )
    if "evaluated" not in table.columns:
        return None
    return table["evaluated"].to_numpy(dtype=np.int64), table[evaluated_q_columns(labels)].to_numpy(dtype=float)


def regime_stage(protocol, decisions, proba, table, regime, crossfit=None, threads=1):
    """Learn the side-by-side regimes; write recommendations with Q-values and the fitted models' summary.

    The ``recommended`` column is the protocol's learned regime (every safeguard the protocol sets); the
    ``recommended_<variant>`` columns hold the side-by-side regimes (:data:`regimewise.regime.learning.SAFEGUARDS`); the
    ``evaluated`` column is what the evaluation scores: each patient's actions under the regime learned without
    that patient (:func:`regimewise.regime.learning.cross_fitted_recommendations`; equal to ``recommended`` with one
    fold). ``crossfit``, the table of :func:`crossfit_stage`, gives those; without it the stage learns the fold
    regimes itself (the same numbers). The workflow splits this stage in two jobs, :func:`regime_fit_stage` (beside
    the crossfit job) and :func:`regime_join_stage`, which write the same bytes.

    ``threads`` of the fits run at once: the side-by-side regimes and the cross-fitted fold regimes do not depend
    on each other (:func:`regimewise.core.concurrency.run_concurrently`; the outputs are the same with any number).

    With ``analysis.learn_regime: false`` nothing is learned: the table keeps the decisions' keys and the action
    taken only, and regime.json says that no regime was learned (:func:`no_regime_summary`).
    """
    from regimewise.regime.learning import assemble_cross_fit, cross_fit_tasks, crossfit_folds

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    if not p.analysis.learn_regime:
        write_parquet(table, frame[RECORD_KEYS].copy())
        write_json(regime, no_regime_summary(p))
        return
    probabilities = read_probabilities(proba, p.action_labels)
    folds = crossfit_folds(frame, p) if crossfit is None else None
    cross_fits = [] if folds is None else cross_fit_tasks(frame, p, folds)
    learned, done = learn_side_by_side(p, frame, probabilities, cross_fits, threads)
    if crossfit is not None:
        crossfitted = read_crossfit(crossfit, frame, p.action_labels)
    else:
        crossfitted = assemble_cross_fit(frame, p, done) if cross_fits else None
    del done
    write_regime(p, frame, learned, crossfitted, table, regime)


RECORD_KEYS = ["episode_id", "step", "action"]  # the decisions' columns the regime stage's table starts with


@dataclass
class SideBySide:
    """What the side-by-side learnings give the regime stage's outputs: each regime's actions at the records
    (``chosen``, {variant: codes}, the protocol's learned regime last), the learned regime's Q-values (n, K), the
    permitted actions (n, K) and regime.json's summary without its ``cross_fit`` part."""

    chosen: dict
    q: np.ndarray
    permitted: np.ndarray
    summary: dict


def learn_side_by_side(p, frame, probabilities, cross_fits, threads=1) -> tuple[SideBySide, list]:
    """Learn the side-by-side regimes (and run the tasks ``cross_fits`` beside them, the longest first); returns
    their :class:`SideBySide` and the results of ``cross_fits``."""
    from regimewise.regime.learning import variant_tasks
    from regimewise.regime.readable import distill_regime

    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p, frame)
    X = features.transform(frame)  # built once: the learnings share it
    fits = variant_tasks(frame, probabilities, p, features, X=X)
    # the fold regimes first: each also fits its own usual-care model, the longest tasks
    done = run_concurrently([*cross_fits, *fits.values()], threads)
    variants = dict(zip(fits, done[len(cross_fits) :]))
    rules = ClinicalRuleSet.from_protocol(p)
    # each regime's actions at the records it learned from (what its recommend returns there: clinical rules for
    # "rules" and "pessimistic"), kept by the fit rather than scored again
    chosen = {name: fqi.record_choice_ for name, fqi in variants.items()}
    fqi = variants[list(variants)[-1]]
    recommended = chosen[list(chosen)[-1]]
    q = fqi.record_q_  # the learned regime's Q-values at the records, kept by its fit (q_values of X there)
    del X
    permitted = permitted_actions(probabilities, p.constraints.support_threshold, rules.permitted(frame))
    summary = regime_summary(p, frame, fqi, features, recommended, probabilities)
    summary.update(safeguard_summary(p, frame, variants, chosen, probabilities, rules))
    summary["readable"] = distill_regime(
        features.scaler.covariate_frame(frame),  # categorical states as their dummies, unscaled
        recommended,
        features.scaler.covariate_states(p),
        p.action_labels,
        groups=frame["patient_id"].to_numpy(),
        random_state=0,
        subset_seed=stream_ints(p.seed, "readable_tree")[0],
    ).to_dict()  # the states, then the missing indicators the models use
    return SideBySide(chosen, q, permitted, summary), done[: len(cross_fits)]


def write_regime(p, frame, learned: SideBySide, crossfitted, table, regime) -> None:
    """Write the regime stage's table and regime.json from the side-by-side regimes and the cross-fitted ones
    (``crossfitted``: :func:`read_crossfit`'s actions and Q-values, or None with one fold)."""
    recommended = learned.chosen[list(learned.chosen)[-1]]
    evaluated, evaluated_q = (recommended, learned.q) if crossfitted is None else crossfitted
    write_recommendations(table, p, frame, learned.chosen, evaluated, evaluated_q, learned.q, learned.permitted)
    cross_fit = {"folds": p.evaluation.cross_fit_folds, "agreement": float(np.mean(evaluated == recommended))}
    write_json(regime, {**learned.summary, "cross_fit": cross_fit})


def regime_fit_stage(protocol, decisions, proba, fitted, fitted_summary, threads=1):
    """The workflow's first half of :func:`regime_stage`: learn the side-by-side regimes, which need usual care's
    probabilities but not the cross-fitted fold regimes, so this job runs beside the crossfit job. Writes each
    regime's action codes, the learned regime's Q-values and the permitted actions per decision (``fitted``) and
    the summary (``fitted_summary``), temporary files of the workflow read by :func:`regime_join_stage`."""
    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    if not p.analysis.learn_regime:
        write_parquet(fitted, frame[["step"]].copy(), temporary=True)
        write_json(fitted_summary, no_regime_summary(p))
        return
    learned, _ = learn_side_by_side(p, frame, read_probabilities(proba, p.action_labels), [], threads)
    out = frame[["step"]].copy()
    for name, codes in learned.chosen.items():
        out[f"chosen_{name}"] = np.asarray(codes).astype(np.min_scalar_type(max(len(p.action_labels) - 1, 0)))
    out[[f"q_{a}" for a in p.action_labels]] = learned.q
    out[[f"permitted_{a}" for a in p.action_labels]] = learned.permitted
    write_parquet(fitted, out, temporary=True)
    write_json(fitted_summary, learned.summary)


def read_fitted(path, frame, chosen_only: bool = False) -> pd.DataFrame:
    """The table of :func:`regime_fit_stage`, which must hold these decisions' rows (:func:`same_rows`); with
    ``chosen_only``, its steps and the regimes' ``chosen_`` action codes only."""
    columns = None
    if chosen_only:
        columns = ["step", *(c for c in parquet_columns(path) if c.startswith("chosen_"))]
    table = read_parquet(path, columns)
    if not same_rows(table, frame):
        raise UserInputError(
            f"{path} does not hold the side-by-side regimes of these decisions (its rows differ); rerun the workflow"
        )
    return table


def regime_join_stage(protocol, decisions, fitted, fitted_summary, crossfit, table, regime):
    """The workflow's second half of :func:`regime_stage`: join the side-by-side regimes of
    :func:`regime_fit_stage` with the cross-fitted fold regimes of :func:`crossfit_stage` into the regime stage's
    table and regime.json (the same bytes as :func:`regime_stage`). Both files must be of these decisions."""
    p = load_protocol(protocol).protocol
    frame = read_frame(decisions, RECORD_KEYS)
    summary = read_json(fitted_summary)
    columns = read_fitted(fitted, frame)
    if not p.analysis.learn_regime:
        write_parquet(table, frame[RECORD_KEYS].copy())
        write_json(regime, summary)
        return
    chosen = {c.removeprefix("chosen_"): columns[c].to_numpy() for c in columns.columns if c.startswith("chosen_")}
    learned = SideBySide(
        chosen,
        columns[[f"q_{a}" for a in p.action_labels]].to_numpy(dtype=float),
        columns[[f"permitted_{a}" for a in p.action_labels]].to_numpy(dtype=bool),
        summary,
    )
    del columns
    write_regime(p, frame, learned, read_crossfit(crossfit, frame, p.action_labels), table, regime)


def write_recommendations(path, p, frame, chosen, evaluated, evaluated_q, q, permitted) -> None:
    """Write the regime stage's table: the decisions' keys and action, the learned regime's action
    (``recommended``), the cross-fitted action and Q-values the evaluation scores (``evaluated``,
    ``evaluated_q_<action>``: the gains of the override strategies), each side-by-side regime's action, the learned
    regime's Q-values and the permitted actions.

    The label columns are held as action codes and written as their labels' text
    (:func:`regimewise.io.labelled_table`): no Python string per row and label column is built."""
    out = frame[["episode_id", "step", "action"]].copy()
    out["recommended"] = chosen[list(chosen)[-1]]
    out["evaluated"] = evaluated  # what the evaluation scores: learned without the row's patient
    out[evaluated_q_columns(p.action_labels)] = evaluated_q
    for name, codes in chosen.items():
        out[f"recommended_{name}"] = codes
    out[[f"q_{a}" for a in p.action_labels]] = q
    out[[f"permitted_{a}" for a in p.action_labels]] = permitted
    coded = ["recommended", "evaluated", *(f"recommended_{name}" for name in chosen)]
    write_parquet(path, out, caution=RECOMMENDATION_CAUTION, labels=dict.fromkeys(coded, p.action_labels))


def no_regime_summary(p) -> dict:
    """regime.json of a study that learns no regime: the setting, the named strategies it compares and its headline."""
    return {
        "learned": False,
        "reason": "analysis.learn_regime is false: the protocol compares the strategies it names with usual care",
        "named_strategies": list(p.named_strategies),
        "headline": p.headline_regime,
    }


# ---------------------------------------------------------------------------------------------- evaluate
def column_codes(table, column: str, labels) -> np.ndarray:
    """Action codes of one action-label column of the regime stage's recommendations table (the file ``table``),
    that column only read, as Arrow's dictionary (:func:`regimewise.io.read_label_codes`), refused as
    :func:`regimewise.core.features.action_codes` refuses a label outside the protocol's."""
    return known_action_codes(read_label_codes(table, column, labels))


def evaluated_q_columns(labels) -> list[str]:
    """Columns of the regime stage's table holding the cross-fitted Q-values the evaluation uses."""
    return [f"evaluated_q_{label}" for label in labels]


def evaluated_regime(table, labels) -> tuple[np.ndarray, np.ndarray]:
    """The cross-fitted regime as the evaluation scores it, read from the regime stage's table (its columns only):
    action codes (n,) and Q-values (n, K)."""
    q = read_float_matrix(table, evaluated_q_columns(labels))
    return column_codes(table, "evaluated", labels), q


def evaluate_fixed_stage(protocol, decisions, proba, fixed, threads=1):
    """Values of the regimes that do not depend on the learned regime (usual care, the fixed strategies, the
    protocol's comparators: :func:`regimewise.evaluation.values.evaluate_fixed_regimes`), written for the evaluate
    stage. They need the records and usual care's probabilities only, so the workflow runs this job while the
    regime is learned; its file is a temporary one of the workflow, consumed by the combine rule."""
    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    regimes = evaluate_fixed_regimes(frame, read_probabilities(proba, p.action_labels), p, threads=threads)
    write_json(fixed, {"decisions": len(frame), "regimes": regimes})


def read_fixed(path, frame) -> list[dict]:
    """The entries written by :func:`evaluate_fixed_stage`, which must be of these decisions."""
    return read_values_part(path, len(frame))["regimes"]


def read_values_part(path, n_decisions: int) -> dict:
    """A part of values.json written by one of the evaluate jobs (:func:`evaluate_fixed_stage`,
    :func:`evaluate_learned_stage`, :func:`evaluate_side_stage`), which must be of these ``n_decisions``
    decisions."""
    document = read_json(path)
    if document.get("decisions") != n_decisions:
        raise UserInputError(
            f"{path} holds the values of {document.get('decisions')} decisions, not of these {n_decisions}; "
            "rerun the workflow"
        )
    return document


def fitted_learned_regime(path, frame, labels) -> tuple[np.ndarray, np.ndarray]:
    """The protocol's learned regime as :func:`regime_fit_stage` wrote it (its ``chosen_`` column, the last, and
    its Q-values): what the evaluation scores with one cross-fitting fold."""
    columns = read_fitted(path, frame)
    chosen = [c for c in columns.columns if c.startswith("chosen_")]
    if not chosen:
        raise UserInputError(f"{path} holds no learned regime; rerun the workflow")
    return columns[chosen[-1]].to_numpy(dtype=np.int64), columns[[f"q_{a}" for a in labels]].to_numpy(dtype=float)


def evaluate_learned_stage(protocol, decisions, proba, learned, crossfit=None, fitted=None, threads=1):
    """The workflow's part of :func:`evaluate_stage` that depends on the learned regime as evaluated: values of the
    learned regime and of the strategies built from it (without a learned regime, of the named strategies), with
    values.json's head (:func:`regimewise.evaluation.values.evaluate_learned_regimes`), in a temporary file read by
    :func:`evaluate_join_stage`.

    The regime evaluated is the cross-fitted one: ``crossfit``, the table of :func:`crossfit_stage`, so this job
    starts when the fold regimes are learned, beside the side-by-side regimes. With one fold it is the regime
    learned on all records, from ``fitted`` (:func:`regime_fit_stage`)."""
    from regimewise.regime.learning import crossfit_folds

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    probabilities = read_probabilities(proba, p.action_labels)
    recommended = learned_q = folds = None
    if p.analysis.learn_regime:
        folds = crossfit_folds(frame, p)
        if (crossfit if folds is not None else fitted) is None:
            raise UserInputError(
                f"the evaluation needs the {'cross-fitted' if folds is not None else 'learned'} regime's table; "
                "rerun the workflow"
            )
        if folds is None:
            recommended, learned_q = fitted_learned_regime(fitted, frame, p.action_labels)
        else:
            crossfitted = read_crossfit(crossfit, frame, p.action_labels)
            if crossfitted is None:
                raise UserInputError(f"{crossfit} holds no cross-fitted regime; rerun the workflow")
            recommended, learned_q = crossfitted
    part = evaluate_learned_regimes(
        frame, probabilities, recommended, p, learned_folds=folds, learned_q=learned_q, threads=threads
    )
    write_json(learned, {"decisions": len(frame), **part})


def evaluate_side_stage(protocol, decisions, proba, fitted, side, threads=1):
    """The workflow's part of :func:`evaluate_stage` for the side-by-side regimes: every estimator for each of
    them (:func:`regimewise.evaluation.values.evaluate_side_by_side`), read from the table of
    :func:`regime_fit_stage`, so this job starts as soon as they are learned; a temporary file read by
    :func:`evaluate_join_stage`. Without a learned regime there is none (null)."""
    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    columns = read_fitted(fitted, frame, chosen_only=True)
    variants = {
        c.removeprefix("chosen_"): columns[c].to_numpy(dtype=np.int64)
        for c in columns.columns
        if c.startswith("chosen_")
    }
    del columns
    entries = None
    if p.analysis.learn_regime and variants:
        probabilities = read_probabilities(proba, p.action_labels)
        entries = evaluate_side_by_side(frame, probabilities, variants, p, threads=threads)
    write_json(side, {"decisions": len(frame), "side_by_side": entries})


def evaluate_join_stage(protocol, decisions, learned, fixed, side, values):
    """The first join of the workflow's combine rule (:func:`combine_stage`): values.json joined from the parts of
    :func:`evaluate_learned_stage`, :func:`evaluate_fixed_stage` and :func:`evaluate_side_stage` (the same bytes as
    :func:`evaluate_stage`). Each part must be of these decisions (their count is read from the file's metadata,
    not its rows)."""
    p = load_protocol(protocol).protocol
    n = parquet_rows(decisions)
    head = read_values_part(learned, n)
    regimes = with_fixed_regimes(head["regimes"], read_values_part(fixed, n)["regimes"], p, p.analysis.learn_regime)
    entries = read_values_part(side, n)["side_by_side"]
    write_json(values, values_document(p, head["observed"], regimes, head["histograms"], entries))


def evaluate_stage(protocol, decisions, proba, table, values, fixed=None, threads=1):
    """Values of the learned regime, usual care, fixed strategies and the protocol's strategies by each estimator;
    ``threads`` (the rule's) of the folds' outcome models and of the regimes' estimates at once (the same numbers
    with any number).

    ``fixed``, the file of :func:`evaluate_fixed_stage` (the workflow's), gives the values of usual care, the fixed
    strategies and the comparators; without it the stage computes them itself (the same numbers)."""
    from regimewise.regime.learning import crossfit_folds

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    done = None if fixed is None else read_fixed(fixed, frame)
    if not p.analysis.learn_regime:  # usual care and the named strategies only
        probabilities = read_probabilities(proba, p.action_labels)
        write_json(values, evaluate_all(frame, probabilities, None, p, threads=threads, fixed=done))
        return
    recommended, learned_q = evaluated_regime(table, p.action_labels)  # cross-fitted (regime stage)
    side = [c for c in parquet_columns(table) if c.startswith("recommended_")]  # side-by-side regimes
    variants = {c.removeprefix("recommended_"): column_codes(table, c, p.action_labels) for c in side}
    write_json(
        values,
        evaluate_all(
            frame,
            read_probabilities(proba, p.action_labels),
            recommended,
            p,
            variants or None,
            learned_folds=crossfit_folds(frame, p),
            learned_q=learned_q,
            threads=threads,
            fixed=done,
        ),
    )


# ---------------------------------------------------------------------------------------------- describe
def describe_stage(protocol, decisions, proba, table, cohort, episodes=None):
    """Cohort table (with follow-up and events when the episodes have them), balance before and after weighting,
    and overlap of taken and recommended actions by step (without a learned regime, the headline named
    strategy's actions)."""
    from regimewise.describe.cohort import cohort_table

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    outcomes = None if episodes is None else read_parquet(episodes)
    probabilities = read_probabilities(proba, p.action_labels)
    if p.analysis.learn_regime:
        recommended = column_codes(table, "recommended", p.action_labels)
    else:
        recommended = named_strategy_codes(frame, p, p.headline_regime)
    write_json(
        cohort,
        {
            "caution": stage_caution(p),
            "baseline": cohort_table(frame, p, outcomes),
            "balance_by_step": balance_by_step(frame, probabilities, p),
            "overlap_by_step": overlap_by_step(
                frame["step"].to_numpy(),
                action_codes(frame, p.action_labels),
                recommended,
                probabilities,
                p.constraints.support_threshold,
            ),
        },
    )


# ---------------------------------------------------------------------------------------------- bootstrap
def bootstrap_shard_stage(protocol, decisions, shard, replicates, episodes=None, table=None):
    """Run one shard's bootstrap replicates (wildcard ``shard``), one BLAS thread per job; with a survival
    section, each replicate also estimates every strategy's survival. With ``evaluation.bootstrap_regime: fixed``
    the replicates hold the regime stage's cross-fitted regime (``table``) fixed; without ``table`` it is learned
    again here from the records (the same numbers, at the cost of one more learning)."""
    from regimewise.bootstrap.replicates import HeldRegime, run_shard
    from regimewise.regime.learning import crossfit_folds

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    outcomes = read_parquet(episodes) if p.survival is not None and episodes is not None else None
    held = None
    if table is not None and p.evaluation.bootstrap_regime == "fixed" and p.analysis.learn_regime:
        held = HeldRegime(*evaluated_regime(table, p.action_labels), crossfit_folds(frame, p))
    with threadpool_limits(limits=1):
        out = run_shard(frame, p, int(shard), episodes=outcomes, held=held)
    write_json(replicates, out)
    log.info("bootstrap shard %s: %d replicates", shard, len(out["replicates"]))


def bootstrap_stage(protocol, values, shards, intervals):
    """Combine the shards into percentile intervals for every value and contrast; flag disagreeing estimators."""
    _write_intervals(load_protocol(protocol).protocol, values, read_shards(shards), intervals)


def read_shards(shards) -> list[dict]:
    """The documents of the bootstrap shard files (:func:`bootstrap_shard_stage`), in the order given."""
    return [read_json(path) for path in shards]


def _write_intervals(p, values, found, intervals) -> None:
    write_json(intervals, combine(read_json(values), found, p))


# ---------------------------------------------------------------------------------------------- sensitivity
def sensitivity_curves_stage(protocol, decisions, proba, table, curves):
    """The bounds curves over the Γ grid of the learned regime (or the headline strategy) and of each comparator:
    the sensitivity analysis's work on the records, which needs no bootstrap result. The workflow runs it beside the
    evaluate stage; :func:`sensitivity_stage` combines its curves with the bootstrap's (a temporary file of the
    workflow, consumed there; JSON with non-finite numbers kept as they are)."""
    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    recommended = None
    if p.analysis.learn_regime:
        recommended = column_codes(table, "evaluated", p.action_labels)  # as evaluated
    recommended = bounded_actions(frame, p, recommended)
    target = sensitivity_target(p)
    probabilities = read_probabilities(proba, p.action_labels)
    point = regime_curve(frame, probabilities, recommended, p, adoption=target["adoption"])
    found = {"point": point, "comparators": comparator_curves(frame, probabilities, p)}
    write_text(curves, json.dumps(_curve_lists(found), allow_nan=True, sort_keys=True) + "\n")


def _curve_lists(value):
    if isinstance(value, dict):
        return {k: _curve_lists(v) for k, v in value.items()}
    return value.tolist() if isinstance(value, np.ndarray) else value


def read_curves(path) -> tuple[dict, dict]:
    """The curves of :func:`sensitivity_curves_stage`: the main target's and each comparator's, as it found them."""
    found = json.loads(Path(path).read_text(encoding="utf-8"))

    def curve(c):
        return c | {"bounded": np.asarray(c["bounded"], dtype=float)}

    return curve(found["point"]), {name: curve(c) for name, c in found["comparators"].items()}


def sensitivity_stage(protocol, curves, intervals, shards, sensitivity):
    """Bounds of the learned regime's (or the headline strategy's) value and contrast over Γ (the curves of
    :func:`sensitivity_curves_stage`), their bootstrap intervals, Γ* and E-values."""
    _write_sensitivity(load_protocol(protocol).protocol, curves, intervals, read_shards(shards), sensitivity)


def _write_sensitivity(p, curves, intervals, found, sensitivity) -> None:
    """:func:`sensitivity_stage` with the shards' documents ``found`` read already."""
    point, comparators = read_curves(curves)
    target = sensitivity_target(p)
    replicates = [r["sensitivity"] for shard in found for r in shard["replicates"] if "sensitivity" in r]
    bootstrap = read_json(intervals)
    headline = headline_contrast(bootstrap, p, target["name"])
    out = summarise_sensitivity(point, replicates, p, headline, target)
    out["comparators"] = comparator_sensitivity(comparators, replicates, p, bootstrap)
    write_json(sensitivity, out)


def combine_stage(protocol, decisions, learned, fixed, side, curves, shards, values, intervals, sensitivity):
    """The workflow's ``combine`` rule, the joins that end the analysis before the report, one after the other in
    one job: values.json from the evaluate jobs' parts (:func:`evaluate_join_stage`), the bootstrap intervals from
    values.json and the shards (:func:`bootstrap_stage`), then sensitivity.json from the bounds curves, the
    intervals and the shards (:func:`sensitivity_stage`). Each file is the one its function writes on its own (the
    same bytes); together they take one job's start-up instead of three (the imports are most of a join's time),
    and the shard files, read once, serve both the intervals and the sensitivity analysis."""
    evaluate_join_stage(protocol, decisions, learned, fixed, side, values)
    p, found = load_protocol(protocol).protocol, read_shards(shards)
    _write_intervals(p, values, found, intervals)
    _write_sensitivity(p, curves, intervals, found, sensitivity)


def headline_contrast(intervals: dict, p, regime: str = "learned") -> dict | None:
    """``regime``-minus-usual-care contrast of the headline estimator (wdr if run) with its interval."""
    name = headline_estimator(p)
    for contrast in intervals.get("contrasts", []):
        if (contrast["regime"], contrast["versus"], contrast["estimator"]) == (regime, "usual_care", name):
            return contrast
    return None


# ---------------------------------------------------------------------------------------------- survival
def survival_stage(protocol, decisions, episodes, proba, table, shards, survival):
    """Survival of every strategy by clone–censor–weight, with diagnostics and bootstrap intervals from the
    shards (whose replicates refit usual care and the dropout model, and hold the regime fixed or learn it again as
    ``evaluation.bootstrap_regime`` says)."""
    from regimewise.survival.analysis import survival_analysis, survival_intervals

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    probabilities = read_probabilities(proba, p.action_labels)
    recommended, learned_q = None, None  # without a learned regime: usual care and the named strategies only
    if p.analysis.learn_regime:
        recommended, learned_q = evaluated_regime(table, p.action_labels)  # as the evaluation scores it
    out = survival_analysis(frame, read_parquet(episodes), probabilities, recommended, p, learned_q)
    replicates = [r["survival"] for path in shards for r in read_json(path)["replicates"] if "survival" in r]
    out["intervals"] = survival_intervals(out, replicates, p)
    out["caution"] = stage_caution(p)
    write_json(survival, out)


# ---------------------------------------------------------------------------------------------- sweep
def sweep_spec_stage(protocol, decisions, spec, result):
    """One specification of the sweep (wildcard ``spec``): refit, evaluate and bootstrap; one BLAS thread."""
    from regimewise.bootstrap.sweep import run_specification

    p = load_protocol(protocol).protocol
    frame = read_frame(decisions)
    with threadpool_limits(limits=1):
        out = run_specification(frame, p, spec)
    write_json(result, out)
    log.info("sweep %s: %d of %d replicates used", spec, out["replicates_used"], out["replicates"])


def sweep_stage(protocol, specs, sweep):
    """Combine the specifications into the table sorted by the learned-minus-usual-care contrast."""
    from regimewise.bootstrap.sweep import combine_sweep

    p = load_protocol(protocol).protocol
    write_json(sweep, combine_sweep([read_json(path) for path in specs], p))


# ---------------------------------------------------------------------------------------------- self-check
def selfcheck_cohort_stage(protocol, decisions, episodes, cohort, result):
    """One look-alike cohort of the self-check (wildcard ``cohort``): simulate, analyse, and compute its truths."""
    from regimewise.selfcheck.cohort import cohort_outcome
    from regimewise.selfcheck.world import fitted_world

    p = load_protocol(protocol).protocol
    world = fitted_world(
        read_frame(decisions), p, episodes=read_parquet(episodes), confounder_gamma=p.selfcheck.confounder_gamma
    )
    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the analysis of the records themselves reports its warnings
        out = cohort_outcome(world, p, int(cohort), p.selfcheck.replicates, p.selfcheck.truth_episodes)
    write_json(result, out)
    if "failed" in out:
        log.warning("self-check cohort %s: the analysis failed (%s); the summary leaves it out", cohort, out["failed"])
    else:
        log.info("self-check cohort %s: %d of %d replicates used", cohort, out["replicates_used"], out["replicates"])


def selfcheck_stage(protocol, decisions, episodes, cohorts, selfcheck, page):
    """The self-check's summary (selfcheck.json) and its page (selfcheck.html) from the cohort jobs."""
    from regimewise.selfcheck.run import selfcheck_document, write_selfcheck
    from regimewise.selfcheck.world import fitted_world

    p = load_protocol(protocol).protocol
    records, outcomes = read_frame(decisions), read_parquet(episodes)
    results = [read_json(path) for path in cohorts]
    world = fitted_world(records, p, episodes=outcomes, confounder_gamma=p.selfcheck.confounder_gamma)
    document = selfcheck_document(records, world, p, results, p.selfcheck.model_dump(), outcomes)
    write_selfcheck(document, p, selfcheck, page)


# ---------------------------------------------------------------------------------------------- dispatch
STAGES = {
    "validate": validate_stage,
    "behaviour": behaviour_fit_stage,
    "behaviour_diagnostics": behaviour_diagnostics_stage,
    "crossfit": crossfit_stage,
    "regime_fit": regime_fit_stage,
    "regime": regime_join_stage,
    "evaluate_fixed": evaluate_fixed_stage,
    "evaluate_learned": evaluate_learned_stage,
    "evaluate_side": evaluate_side_stage,
    "describe": describe_stage,
    "bootstrap_shard": bootstrap_shard_stage,
    "sensitivity_curves": sensitivity_curves_stage,
    "combine": combine_stage,
    "survival": survival_stage,
    "sweep_spec": sweep_spec_stage,
    "sweep": sweep_stage,
    "selfcheck_cohort": selfcheck_cohort_stage,
    "selfcheck": selfcheck_stage,
    "report": report_stage,
    "appendix": appendix_stage,
}


def run_snakemake_job(smk) -> None:
    """Run the stage named like the Snakemake rule, logging to the rule's log file.

    The stage receives the rule's inputs, outputs, named logs, wildcards, those of its ``params`` it names (never
    ``code``, the fingerprint) and the rule's ``threads`` if it takes them.

    Inputs named by a stand-in (a path with braces, :mod:`regimewise.workflow.settings`) reach the stage as the real
    path. A :class:`UserInputError` is written to the log and to standard error as one line starting with
    ``regimewise error:`` and the job exits with status 1 (Snakemake then removes its partial outputs).
    """
    share_allocator_arenas()  # before any thread: two threads' freed memory is reused, not held twice
    keep_freed_memory()  # large arrays from the heap, not mapped and faulted in afresh each time
    log_path = Path(smk.log[0])
    log_path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(log_path, mode="w", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(levelname)s %(message)s"))
    log.addHandler(handler)
    log.setLevel(logging.INFO)
    inputs = {k: real_input(v) for k, v in smk.input.items()}
    outputs = {k: v for k, v in smk.output.items()}
    named_logs = {k: v for k, v in smk.log.items()}
    wildcards = {k: v for k, v in smk.wildcards.items()}
    params = {k: v for k, v in smk.params.items()}
    kwargs = {
        k: v
        for k, v in {**params, **wildcards, **named_logs, **inputs, **outputs, "threads": smk.threads}.items()
        if k in STAGE_ARGUMENTS[smk.rule]
    }
    started = time.perf_counter()
    shown = warnings.showwarning
    warnings.showwarning = _logged_warning(shown)
    try:
        # BLAS on one thread whatever the rule's threads (Snakemake sets OMP_NUM_THREADS to them): a multi-threaded
        # BLAS may sum in another order, and the outputs must not depend on the cores (core/concurrency.py)
        with threadpool_limits(limits=1):
            STAGES[smk.rule](**kwargs)
        log_resource_use(time.perf_counter() - started)
    except UserInputError as err:
        log.error("%s", err)
        print(ERROR_PREFIX + str(err), file=sys.stderr)
        sys.exit(1)
    finally:
        warnings.showwarning = shown
        handler.close()
        log.removeHandler(handler)


def _logged_warning(show):
    """``warnings.showwarning`` that also writes a :class:`StatisticalWarning` to the rule's log (one line,
    ``WARNING StatisticalWarning: <message>``), so the stage's log keeps its warnings as long as its outputs stand
    (:func:`regimewise.workflow.progress.warning_line` counts them there); standard error still gets them."""

    def showwarning(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, StatisticalWarning):
            log.warning("%s: %s", category.__name__, " ".join(str(message).split()))
        show(message, category, filename, lineno, file, line)

    return showwarning


def log_resource_use(wall_seconds: float) -> None:
    """Log the job's wall time, CPU time (user and system), the system's part of it and peak resident memory
    (one line, read by bench/bench_scale.py).

    System time is mostly the kernel clearing memory the job touches for the first time; on a virtual machine
    that hands freed memory back to its host it can be a large and varying part of a big job's CPU time. Only the
    log gets these machine-dependent figures; no artifact does.
    """
    usage = resource.getrusage(resource.RUSAGE_SELF)
    log.info(
        "resource use: wall %.2f s, cpu %.2f s, system %.2f s, peak rss %.1f MB",
        wall_seconds,
        usage.ru_utime + usage.ru_stime,
        usage.ru_stime,
        usage.ru_maxrss / 1024,  # kilobytes on Linux
    )


STAGE_ARGUMENTS = {
    name: set(function.__code__.co_varnames[: function.__code__.co_argcount]) for name, function in STAGES.items()
}
