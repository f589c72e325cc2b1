"""The survival stage's analysis: every compared strategy cloned, censored at deviation, weighted, and read.

Strategies are those of the evaluation (:func:`regimewise.evaluation.values.regime_targets`: the learned regime as
evaluated, i.e. cross-fitted, usual care and the fixed strategies), so both stages name and define them alike.
Usual care is the natural course (every weight 1 but the dropout weights). The curves are weighted Kaplan–Meier
estimates on a grid of days from time zero (the index date); each strategy is compared with usual care at the
protocol's time points and the horizon (risk difference and ratio, restricted mean survival time). A strategy
whose effective sample at a time is below the rule the values use
(:func:`regimewise.evaluation.values.minimum_reliable_ess`) is flagged unreliable from that time on.

Research use only: survival under a strategy estimated from records is a hypothesis for study, not medical
advice; decisions stay with licensed clinicians, under local law and ethics approval.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from regimewise.core.features import StateScaler, action_codes
from regimewise.core.quantiles import bootstrap_quantile
from regimewise.errors import UserInputError
from regimewise.evaluation.values import minimum_reliable_ess, regime_targets
from regimewise.protocol import Protocol
from regimewise.survival.clones import clone_censor_weight
from regimewise.survival.cox import weighted_cox
from regimewise.survival.curves import contrast, survival_curve
from regimewise.survival.diagnostics import follow_diagnostics
from regimewise.survival.dropout import DropoutModel
from regimewise.survival.timeline import make_timeline

USUAL_CARE = "usual_care"


def survival_inputs(decisions: pd.DataFrame, episodes: pd.DataFrame, protocol: Protocol):
    """The decisions as the survival code reads them (action codes) and the episodes' outcome columns."""
    spec = protocol.survival
    missing = [c for c in ("followup_days", "event") if c not in episodes.columns]
    if missing:
        raise UserInputError(
            f"survival needs follow-up and event columns in the episodes table, and {missing[0]!r} is absent; map "
            "them in data.columns (followup, event) or remove the survival section"
        )
    longest = float(episodes["followup_days"].max())
    if spec.horizon_days > longest:
        raise UserInputError(
            f"survival.horizon_days is {spec.horizon_days:g} but the longest follow-up in the episodes table is "
            f"{longest:g} days; lower the horizon to at most the longest follow-up"
        )
    columns = ("episode_id", "patient_id", "step", "day")  # read, never written: the frame need not copy them
    frame = pd.DataFrame({name: decisions[name] for name in columns}, copy=False)
    frame["action"] = action_codes(decisions, protocol.action_labels)
    return frame, episodes[["episode_id", "followup_days", "event"]]


def time_grid(decisions: pd.DataFrame, protocol: Protocol) -> np.ndarray:
    """Curve grid: every ``grid_days`` (default: the median gap between an episode's decisions) up to the horizon,
    with the protocol's time points and the horizon added."""
    spec = protocol.survival
    step = spec.grid_days
    if step is None:
        gaps = decisions.groupby("episode_id", sort=False)["day"].diff().dropna()
        step = float(gaps.median()) if len(gaps) else spec.horizon_days
    grid = np.arange(step, spec.horizon_days, step)
    return np.union1d(np.union1d(grid, spec.time_points), [spec.horizon_days])


def table_times(protocol: Protocol) -> list[float]:
    """Times of the survival table and contrasts: the protocol's time points and the horizon."""
    spec = protocol.survival
    return sorted({*map(float, spec.time_points), float(spec.horizon_days)})


def _censoring_weights(timeline, decisions, protocol):
    if not protocol.survival.dropout_model:
        return None, {"used": False}
    states = StateScaler.fit(decisions, protocol).state_matrix(decisions)  # categorical states as dummies
    model = DropoutModel().fit(timeline, states)
    info = {
        "used": True,
        "dropouts": model.n_dropouts_,
        "before_first_decision": model.n_dropouts_before_first_decision_,
    }
    return model.weights(timeline, states), info


def clone_tables(decisions, episodes, proba, recommended, protocol, learned_q=None):
    """(dropout summary, iterator of (name, label, CloneTable)) for every compared strategy.

    Each strategy's clone table is built only when the iterator reaches it, so a caller that summarises one table
    before taking the next holds one at a time. ``learned_q``: the learned regime's cross-fitted Q-values, which
    strategies that override usual care only when the expected gain is large need."""
    frame, outcomes = survival_inputs(decisions, episodes, protocol)
    spec = protocol.survival
    timeline = make_timeline(frame, outcomes, proba, spec.horizon_days)
    ipcw, dropout = _censoring_weights(timeline, decisions, protocol)

    def tables():  # the table goes straight out: no local name keeps it alive while the next one is built
        # by rows: a deterministic strategy comes as its action codes (no one-hot matrix is built), a named
        # strategy as a function of the rows, asked here for every row (the same matrix as built whole)
        for entry in regime_targets(decisions, proba, recommended, protocol, learned_q, by_rows=True):
            name = entry["name"]
            yield (
                name,
                entry["label"],
                clone_censor_weight(
                    timeline,
                    None if name == USUAL_CARE else _every_row(entry["target"]),
                    name=name,
                    grace=spec.grace,
                    censoring_weights=ipcw,
                    truncate=None if spec.weight_truncation is None else tuple(spec.weight_truncation),
                ),
            )

    return dropout, tables()


def _every_row(target):
    """A target of :func:`regime_targets` with ``by_rows``, for every decision: (n,) action codes as they are,
    a function of the rows evaluated on all of them."""
    return target(slice(None)) if callable(target) else target


def strategy_curve(table, grid, protocol):
    """The strategy's SurvivalCurve on the grid; a strategy no clone follows gets an undefined (NaN) curve."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return survival_curve(table, grid, protocol.survival.horizon_days)


def survival_values(decisions, episodes, proba, recommended, protocol, learned_q=None) -> dict:
    """Survival and RMST of every strategy and their contrasts with usual care at the table times.

    The compact form a bootstrap replicate records: {name: {"survival": [...], "rmst": x,
    "risk_difference": [...], "rmst_difference": y}}.
    """
    _, tables = clone_tables(decisions, episodes, proba, recommended, protocol, learned_q)
    times = table_times(protocol)
    curves = {name: strategy_curve(table, times, protocol) for name, _, table in tables}
    return {name: _point(curve, curves[USUAL_CARE], times) for name, curve in curves.items()}


def _point(curve, usual, times) -> dict:
    versus = contrast(curve, usual, times).to_dict()
    return {
        "survival": [None if np.isnan(v) else float(v) for v in curve.at(times)],
        "rmst": None if np.isnan(curve.rmst) else float(curve.rmst),
        "risk_difference": versus["risk_difference"],
        "rmst_difference": versus["rmst_difference"],
    }


def survival_analysis(decisions, episodes, proba, recommended, protocol, learned_q=None) -> dict:
    """Everything survival.json holds except the bootstrap intervals (added by the stage)."""
    dropout, tables = clone_tables(decisions, episodes, proba, recommended, protocol, learned_q)
    grid = time_grid(decisions, protocol)
    times = table_times(protocol)
    floor = minimum_reliable_ess(int(decisions["episode_id"].nunique()), protocol.evaluation)
    curves, summaries, kept = {}, [], {}
    for name, label, table in tables:  # each table summarised, then released (kept only for the Cox model)
        curves[name] = strategy_curve(table, grid, protocol)
        diagnostics = follow_diagnostics(table, grid, floor, protocol.survival.horizon_days)
        summaries.append((name, label, table.to_dict(), diagnostics.to_dict()))
        if protocol.survival.cox:
            kept[name] = table
        del table
    rows = [
        {
            "name": name,
            "label": label,
            "clones": clones,
            "curve": curves[name].to_dict(),
            "at_times": _point(curves[name], curves[USUAL_CARE], times),
            "diagnostics": diagnostics,
        }
        for name, label, clones, diagnostics in summaries
    ]
    out = {
        "horizon_days": float(protocol.survival.horizon_days),
        "grid": [float(t) for t in grid],
        "times": times,
        "grace": protocol.survival.grace,
        "dropout_model": dropout,
        "weight_truncation": protocol.survival.weight_truncation,
        "minimum_reliable_ess": floor,
        "strategies": rows,
        "cox": weighted_cox(kept, USUAL_CARE).to_dict() if protocol.survival.cox else None,
    }
    return out


def survival_intervals(point: dict, replicates: list[dict], protocol: Protocol) -> dict:
    """Percentile-bootstrap limits (the project's quantile rule) of each strategy's survival, risk difference,
    RMST and RMST difference at the table times, from the replicates' :func:`survival_values`.

    lifelines' own interval assumes integer weights, so the patient bootstrap (models refitted as the evaluation's
    replicates are, a patient's clones kept together) gives the intervals.
    """
    level = protocol.evaluation.interval_level
    probabilities = [(1 - level) / 2, (1 + level) / 2]
    out = {}
    for row in point["strategies"]:
        name = row["name"]
        draws = [r[name] for r in replicates if name in r]
        out[name] = {
            key: _limits([d[key] for d in draws], probabilities)
            for key in ("survival", "risk_difference", "rmst", "rmst_difference")
        }
    return {"level": level, "replicates": len(replicates), "strategies": out}


def _limits(draws: list, probabilities) -> dict | None:
    """{"low": ..., "high": ...} per position (lists) or for a scalar; None where fewer than 2 draws are defined,
    and no interval at all without replicates (evaluation.replicates: 0 runs no bootstrap shard)."""
    if not draws:
        return None
    if isinstance(draws[0], list):
        columns = list(zip(*draws, strict=True))
        pairs = [_scalar_limits(column, probabilities) for column in columns]
        return {"low": [p[0] for p in pairs], "high": [p[1] for p in pairs]}
    low, high = _scalar_limits(draws, probabilities)
    return {"low": low, "high": high}


def _scalar_limits(values, probabilities):
    defined = np.asarray([v for v in values if v is not None], dtype=float)
    if defined.size < 2:
        return None, None
    low, high = bootstrap_quantile(defined, probabilities)
    return float(low), float(high)
