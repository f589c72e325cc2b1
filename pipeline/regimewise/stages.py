"""Stage functions: one per workflow rule, taking and writing plain file paths.

Each stage reads its inputs, calls the statistics in the package and writes its outputs atomically
(:mod:`regimewise.io`). Rules reach them through :func:`run_snakemake_job`; tests and the command line call
them directly. A stage never holds statistics of its own beyond arranging inputs and outputs.
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from .behaviour import multiclass_auc, probability_of_taken
from .errors import UserInputError
from .evaluate import evaluate_all
from .features import QFeatures, StateScaler, action_codes
from .io import read_parquet, write_json, write_parquet
from .protocol import load_protocol
from .regime import fit_q_learning, fit_usual_care
from .report import report_stage
from .validate import validate_records
from .weighting import inverse_probability_weights, weight_summary

log = logging.getLogger("regimewise")

ERROR_PREFIX = "regimewise error: "
RECOMMENDATION_CAUTION = (
    "Research use only: recommendations of a regime learned from historical records are hypotheses for study, "
    "not medical advice; treatment decisions stay with licensed clinicians under local law and ethics approval."
)


# ---------------------------------------------------------------------------------------------- validate
def validate_stage(protocol, decisions, episodes, summary):
    """Check the records and write clean Parquet tables and validation.json."""
    pf = load_protocol(protocol)
    result = validate_records(pf)
    write_parquet(decisions, result.decisions)
    write_parquet(episodes, result.episodes)
    write_json(summary, result.summary)
    log.info("validated %d decisions in %d episodes", len(result.decisions), result.summary["episodes"])


# ---------------------------------------------------------------------------------------------- behaviour
def proba_columns(labels) -> list[str]:
    return [f"p_{label}" for label in labels]


def behaviour_stage(protocol, decisions, proba, diagnostics):
    """Fit the usual-care model; write the probability of every action at every decision and diagnostics."""
    p = load_protocol(protocol).protocol
    frame = read_parquet(decisions)
    model = fit_usual_care(frame, p)
    probabilities = model.predict_proba(frame)
    table = frame[["episode_id", "step"]].copy()
    table[proba_columns(p.action_labels)] = probabilities
    write_parquet(proba, table)
    write_json(diagnostics, behaviour_diagnostics(p, frame, model, probabilities))


def behaviour_diagnostics(p, frame, model, probabilities) -> dict:
    """Discrimination, fit, and the distribution of the probability of the action taken, by step."""
    codes = action_codes(frame, p.action_labels)
    taken = probability_of_taken(probabilities, codes)
    threshold = p.constraints.support_threshold
    by_step = {}
    for step, rows in frame.groupby("step").indices.items():
        by_step[str(step)] = {
            "decisions": int(len(rows)),
            "taken_probability_min": float(taken[rows].min()),
            "taken_probability_median": float(np.median(taken[rows])),
            "share_taken_below_support": float(np.mean(taken[rows] < threshold)),
            "auc": _safe_auc(codes[rows], probabilities[rows], len(p.actions)),
        }
    fitted = model.model
    return {
        "model": {
            "kind": p.behaviour_model.kind,
            "covariates": list(model.scaler.names) + (["step_fraction"] if model.include_step else []),
            "converged": bool(fitted.converged_),
            "log_likelihood": float(fitted.llf_),
            "params": np.asarray(fitted.params_).tolist(),
            "scaler": model.scaler.to_dict(),
        },
        "decisions": int(len(frame)),
        "auc": float(multiclass_auc(codes, probabilities, len(p.actions))),
        "auc_method": "one-vs-rest macro average",
        "inverse_probability_weights": weight_summary(inverse_probability_weights(taken)),
        "by_step": by_step,
    }


def _safe_auc(codes, probabilities, n_actions):
    """AUC at one step; None when fewer than two actions occur there."""
    if len(np.unique(codes)) < 2:
        return None
    return float(multiclass_auc(codes, probabilities, n_actions))


def read_probabilities(path, labels) -> np.ndarray:
    return read_parquet(path)[proba_columns(labels)].to_numpy(dtype=float)


# ---------------------------------------------------------------------------------------------- regime
def regime_stage(protocol, decisions, proba, table, regime):
    """Learn the support-constrained regime; write recommendations with Q-values and the fitted model."""
    p = load_protocol(protocol).protocol
    frame = read_parquet(decisions)
    probabilities = read_probabilities(proba, p.action_labels)
    features = QFeatures.from_protocol(StateScaler.fit(frame, p), p)
    fqi = fit_q_learning(frame, probabilities, p, features)
    steps = frame["step"].to_numpy(dtype=np.int64)
    X = features.transform(frame)
    q = fqi.q_values(X, steps)
    recommended = fqi.recommend(X, steps, probabilities)
    labels = np.asarray(p.action_labels)
    out = frame[["episode_id", "step", "action"]].copy()
    out["recommended"] = labels[recommended]
    out[[f"q_{a}" for a in p.action_labels]] = q
    out[[f"permitted_{a}" for a in p.action_labels]] = probabilities >= p.constraints.support_threshold
    write_parquet(table, out, caution=RECOMMENDATION_CAUTION)
    write_json(regime, regime_summary(p, frame, fqi, features, recommended, probabilities))


def regime_summary(p, frame, fqi, features, recommended, probabilities) -> dict:
    """The constraints in force, what they changed, and recommended versus taken actions by step."""
    taken = action_codes(frame, p.action_labels)
    labels = p.action_labels
    by_step = {}
    for step, rows in frame.groupby("step").indices.items():
        by_step[str(step)] = {
            "decisions": int(len(rows)),
            "recommended": {a: int(np.sum(recommended[rows] == k)) for k, a in enumerate(labels)},
            "taken": {a: int(np.sum(taken[rows] == k)) for k, a in enumerate(labels)},
        }
    return {
        "caution": RECOMMENDATION_CAUTION,
        "method": "finite-horizon fitted-Q iteration (backward induction), linear Q-model with action-by-state "
        "interactions, support-constrained",
        "constraints": {"support_threshold": p.constraints.support_threshold},
        "decisions": int(len(frame)),
        "decisions_changed_by_support": int(fqi.n_changed_by_support_),
        "decisions_without_permitted_action": int(np.sum((probabilities >= p.constraints.support_threshold).sum(1) == 0)),
        "share_differs_from_taken": float(np.mean(recommended != taken)),
        "by_step": by_step,
        "q_model": {
            "kind": p.q_model.kind,
            "basis": p.q_model.basis,
            "ridge_alpha": p.q_model.ridge_alpha,
            "covariates": ["intercept", *features.names],
            "coefficients": np.asarray(fqi.coef_).tolist(),
            "scaler": features.scaler.to_dict(),
        },
    }


# ---------------------------------------------------------------------------------------------- evaluate
def evaluate_stage(protocol, decisions, proba, table, values):
    """Values of the learned regime, usual care and fixed strategies by each of the protocol's estimators."""
    p = load_protocol(protocol).protocol
    frame = read_parquet(decisions)
    recommended = action_codes(
        read_parquet(table).rename(columns={"action": "taken", "recommended": "action"}), p.action_labels
    )
    write_json(values, evaluate_all(frame, read_probabilities(proba, p.action_labels), recommended, p))


# ---------------------------------------------------------------------------------------------- dispatch
STAGES = {
    "validate": validate_stage,
    "behaviour": behaviour_stage,
    "regime": regime_stage,
    "evaluate": evaluate_stage,
    "report": report_stage,
}


def run_snakemake_job(smk) -> None:
    """Run the stage named like the Snakemake rule, logging to the rule's log file.

    A :class:`UserInputError` is written to the log and to standard error as one line starting with
    ``regimewise error:`` and the job exits with status 1 (Snakemake then removes its partial outputs).
    """
    log_path = Path(smk.log[0])
    log_path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(log_path, mode="w", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(levelname)s %(message)s"))
    log.addHandler(handler)
    log.setLevel(logging.INFO)
    inputs = {k: v for k, v in smk.input.items()}
    outputs = {k: v for k, v in smk.output.items()}
    kwargs = {k: v for k, v in {**inputs, **outputs}.items() if k in STAGE_ARGUMENTS[smk.rule]}
    try:
        STAGES[smk.rule](**kwargs)
    except UserInputError as err:
        log.error("%s", err)
        print(ERROR_PREFIX + str(err), file=sys.stderr)
        sys.exit(1)
    finally:
        handler.close()
        log.removeHandler(handler)


STAGE_ARGUMENTS = {
    name: set(function.__code__.co_varnames[: function.__code__.co_argcount]) for name, function in STAGES.items()
}
