"""Specification sweeps: does the learned regime's advantage over usual care survive other analysis choices?

The protocol's ``sweeps.axes`` list alternative values of a fixed set of settings
(:data:`regimewise.protocol.SWEEP_AXES`); every combination is one specification
(:func:`regimewise.protocol.sweep_specifications`, ``spec_00`` being the pre-specified analysis). For one
specification :func:`run_specification` refits usual care and the regime on the records, evaluates the learned
regime and usual care, and bootstraps patients (``sweeps.replicates`` resamples, refitted as
``evaluation.bootstrap_regime`` says: the specification's regime held fixed, or learned again) for a
percentile interval of the learned-minus-usual-care contrast and for percentile-bootstrap intervals of its
confounding-sensitivity bounds at the sweep's Γ values (:mod:`regimewise.sensitivity.analysis`). :func:`combine_sweep`
sorts the specifications by their point contrast, the display of a specification curve (Simonsohn, Simmons &
Nelson 2020, Nature Human Behaviour 4:1208) or multiverse analysis (Steegen, Tuerlinckx, Gelman & Vanpaemel
2016, Perspectives on Psychological Science 11:702).

Replicate ``r`` of the specification with index ``i`` draws its resample from
stream ``("sweep", i, r)`` of :mod:`regimewise.core.seeds`, so one specification's job reproduces its bytes
alone. Model fits inside a specification use the root seed exactly as the main analysis does, so the
pre-specified specification's point contrast equals the main analysis's.

Research use only: a sweep shows how fragile an estimate is; it recommends no treatment.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from regimewise.bootstrap.intervals import interval
from regimewise.bootstrap.replicates import (
    held_regime,
    learn_and_evaluate,
    patient_groups,
    run_replicate,
)
from regimewise.cautions import SWEEP_CAUTION
from regimewise.core.seeds import stream_rng
from regimewise.errors import UserInputError
from regimewise.evaluation.values import headline_estimator, point_values
from regimewise.io import to_jsonable
from regimewise.protocol.model import Protocol, Specification, sweep_specifications
from regimewise.sensitivity.analysis import summarise_sensitivity


# ---------------------------------------------------------------------------------------------- one specification
def find_specification(protocol: Protocol, spec_id: str) -> Specification:
    """The specification ``spec_id`` of the protocol's sweep grid."""
    grid = {spec.id: spec for spec in sweep_specifications(protocol)}
    if spec_id not in grid:
        raise UserInputError(
            f"sweep specification {spec_id!r} is not in the protocol's grid ({', '.join(grid) or 'no sweeps'}); "
            "rerun the workflow after changing sweeps.axes."
        )
    return grid[spec_id]


def analysis_protocol(spec: Specification, protocol: Protocol) -> Protocol:
    """The specification's protocol for the sweep: no fixed strategies, comparators or derived strategies (not
    compared here), the sweep's Γ values. Without derived strategies the confounding bounds are the learned
    regime's in the point analysis and in every replicate alike (with a partial-adoption headline the replicates
    would otherwise bound that strategy while the point bounds the learned regime)."""
    p = spec.protocol
    return p.model_copy(
        update={
            "evaluation": p.evaluation.model_copy(update={"fixed_strategies": False, "reference": "usual_care"}),
            "comparators": [],
            "strategies": None,
            "sensitivity": p.sensitivity.model_copy(update={"gammas": list(protocol.sweeps.gammas)}),
        }
    )


def sweep_rng(root_seed: int, spec_index: int, replicate: int) -> np.random.Generator:
    """Generator of replicate ``replicate`` of specification ``spec_index``."""
    return stream_rng(root_seed, "sweep", spec_index, replicate)


def contrasts(point_values: dict) -> dict:
    """{estimator: learned − usual care} (None where either value is undefined)."""
    learned, usual = point_values["learned"], point_values["usual_care"]
    return {est: None if learned[est] is None or usual[est] is None else learned[est] - usual[est] for est in learned}


def run_specification(decisions: pd.DataFrame, protocol: Protocol, spec_id: str) -> dict:
    """Point contrast, bootstrap intervals and confounding bounds of one specification of the protocol's sweep."""
    spec = find_specification(protocol, spec_id)
    p = analysis_protocol(spec, protocol)
    held = held_regime(decisions, p)  # None when the replicates learn the regime again
    values, curve = learn_and_evaluate(decisions, p, held=held)
    groups = patient_groups(decisions)
    replicates = [_replicate(decisions, groups, p, spec.index, r, held) for r in range(protocol.sweeps.replicates)]
    good = [r for r in replicates if "contrast" in r]
    level = p.evaluation.interval_level
    point = contrasts(point_values(values))
    learned = values["regimes"][0]["estimates"]
    bounds = summarise_sensitivity(curve, [r["sensitivity"] for r in good], p, None)
    name = headline_estimator(p)
    return {
        "caution": SWEEP_CAUTION,
        "id": spec.id,
        "index": spec.index,
        "settings": spec.settings,
        "prespecified": spec.prespecified,
        "in_grid": spec.in_grid,
        "estimator": name,
        "level": level,
        "replicates": protocol.sweeps.replicates,
        "replicates_used": len(good),
        "replicates_failed": [{"replicate": r["replicate"], "error": r["error"]} for r in replicates if "error" in r],
        "replicate_contrasts": [{"replicate": r["replicate"], **r["contrast"]} for r in good],
        "contrasts": {
            est: {
                "difference": diff,
                "ess": learned[est]["ess"],
                "low_ess": learned[est]["low_ess"],
                **interval(diff, [r["contrast"][est] for r in good], level, 1.0),
            }
            for est, diff in point.items()
        },
        "sensitivity": {
            key: bounds[key]
            for key in ("estimator", "ess", "low_ess", "table", "tipping_point", "gamma_max", "precision", "sentence")
        },
    }


def _replicate(decisions, groups, protocol: Protocol, spec_index: int, replicate: int, held=None) -> dict:
    """One patient-bootstrap replicate of a specification (:func:`regimewise.bootstrap.replicates.run_replicate` with
    the specification's own seed stream and, with ``bootstrap_regime: fixed``, its regime ``held`` fixed): its
    contrasts and bounds curve, or why it failed."""
    rng = sweep_rng(protocol.seed, spec_index, replicate)
    out = run_replicate(decisions, groups, protocol, replicate, len(groups), rng=rng, held=held)
    if "error" in out:
        return out
    return {"replicate": replicate, "contrast": contrasts(out["values"]), "sensitivity": out["sensitivity"]}


# ---------------------------------------------------------------------------------------------- combine
def combine_sweep(results: list[dict], protocol: Protocol) -> dict:
    """The specifications sorted by their headline contrast (undefined last), the pre-specified one flagged.

    Refuses results that do not match the protocol's current grid (stale or missing specification files).
    """
    grid = sweep_specifications(protocol)
    found = {r["id"]: r for r in results}
    for spec in grid:
        if spec.id not in found or to_jsonable(found[spec.id]["settings"]) != to_jsonable(spec.settings):
            raise UserInputError(
                f"sweep result of {spec.id} is missing or was computed for other settings; rerun the sweep rules."
            )
    name = headline_estimator(protocol)
    rows = sorted((_row(found[spec.id], name) for spec in grid), key=_sort_key)
    lower = protocol.reward.better == "lower"
    benefit = [row for row in rows if row["low"] is not None and (row["high"] < 0 if lower else row["low"] > 0)]
    benefit_low_ess = sum(row["low_ess"] for row in benefit)
    level = protocol.evaluation.interval_level
    rank = next(i for i, row in enumerate(rows, 1) if row["prespecified"])
    return {
        "caution": SWEEP_CAUTION,
        "estimator": name,
        "level": level,
        "replicates": protocol.sweeps.replicates,
        "gammas": list(protocol.sweeps.gammas),
        "gamma_max": protocol.sensitivity.gamma_max,
        "axes": list(grid[0].settings),
        "prespecified": grid[0].id,
        "prespecified_in_grid": grid[0].in_grid,
        "n_specifications": len(rows),
        "better": protocol.reward.better,
        "intervals_showing_benefit": len(benefit),
        "intervals_showing_benefit_low_ess": benefit_low_ess,
        "specifications": rows,
        "sentence": sweep_sentence(len(benefit), benefit_low_ess, len(rows), rank, name, level, lower),
    }


def _row(result: dict, name: str) -> dict:
    headline = result["contrasts"][name]
    return {
        "id": result["id"],
        "prespecified": result["prespecified"],
        "settings": result["settings"],
        "difference": headline["difference"],
        "low": headline["low"],
        "high": headline["high"],
        "bootstrap_se": headline["bootstrap_se"],
        "n_replicates": headline["n_replicates"],
        "ess": headline["ess"],
        "low_ess": headline["low_ess"],
        "replicates_used": result["replicates_used"],
        "replicates_failed": len(result["replicates_failed"]),
        "tipping_point": result["sensitivity"]["tipping_point"],
        "sensitivity_low_ess": result["sensitivity"]["low_ess"],
        "bounds": result["sensitivity"]["table"],
        "contrasts": result["contrasts"],
    }


def _sort_key(row: dict):
    difference = row["difference"]
    defined = difference is not None and math.isfinite(difference)
    return (not defined, difference if defined else 0.0, row["id"])


def sweep_sentence(
    benefit: int, benefit_low_ess: int, total: int, rank: int, estimator: str, level: float, lower: bool = False
) -> str:
    """One plain sentence: how many specifications keep the interval of the difference on the side of a benefit
    (above zero, or below zero when lower is better; and how many of those rest on too small an effective sample),
    and where the pre-specified analysis ranks."""
    if benefit == 0:
        count = f"None of the {total} specifications keeps"
    elif benefit == total:
        count = f"All {total} specifications keep"
    else:
        count = f"{benefit} of the {total} specifications keep{'s' if benefit == 1 else ''}"
    unreliable = ""
    if benefit_low_ess:
        unreliable = f" ({benefit_low_ess} of them on too small an effective sample to be trusted)"
    side = "below zero (lower is better)" if lower else "above zero"
    return (
        f"{count} the {100 * level:.0f}% bootstrap interval of the learned-minus-usual-care difference "
        f"({estimator}) {side}{unreliable}; the pre-specified analysis ranks {rank} of {total} by its "
        "estimate (1 = lowest)."
    )
