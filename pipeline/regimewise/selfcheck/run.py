"""The self-check from start to end: fit the look-alike world on the validated records, rerun the analysis on R
simulated cohorts (in parallel processes), summarise how the pipeline performed, and write selfcheck.json and
selfcheck.html."""

from __future__ import annotations

import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import NoReturn

import numpy as np
from pydantic import ValidationError
from threadpoolctl import threadpool_limits

from regimewise.cautions import REPORT_CAUTIONS, SELFCHECK_CAUTION
from regimewise.data.validate import validate_records
from regimewise.errors import UserInputError
from regimewise.evaluation.values import headline_estimator
from regimewise.io import write_json, write_text
from regimewise.protocol import ProtocolFile, SelfCheckSpec, confounder_problem, load_protocol
from regimewise.selfcheck.cohort import LEARNED, USUAL_CARE, cohort_outcome, cohort_seeds, headline_strategy
from regimewise.selfcheck.fitcheck import follow_up_reproduction, learned_rules, reproduction
from regimewise.selfcheck.page import selfcheck_page
from regimewise.selfcheck.performance import coverage_mcse, performance
from regimewise.selfcheck.regret import regret
from regimewise.selfcheck.world import LookAlikeWorld, fitted_world

# Per worker process: the world fitted once from the records (the fit is deterministic, so every worker's world is
# the same), the protocol and the settings.
_WORKER: dict = {}


def _start_worker(protocol_path: str, replicates: int, truth_episodes: int, confounder_gamma: float) -> None:
    warnings.simplefilter("ignore")
    pf = load_protocol(protocol_path)
    records = validate_records(pf)
    world = fitted_world(records.decisions, pf.protocol, episodes=records.episodes, confounder_gamma=confounder_gamma)
    _WORKER.update(world=world, protocol=pf.protocol, replicates=replicates, truth_episodes=truth_episodes)


def _cohort_job(cohort: int) -> dict:
    with threadpool_limits(limits=1):
        return cohort_outcome(
            _WORKER["world"], _WORKER["protocol"], cohort, _WORKER["replicates"], _WORKER["truth_episodes"]
        )


def settings(pf: ProtocolFile, **given) -> dict:
    """The self-check's settings (``cohorts``, ``replicates``, ``truth_episodes``, ``reference_episodes``,
    ``confounder_gamma``): the command line's where given (not None), else the protocol's ``selfcheck`` section's,
    else defaults; checked against the section's bounds and the protocol (one line naming the first setting out of
    them). ``confounder_gamma`` may be the command line's text."""
    spec = pf.protocol.selfcheck or SelfCheckSpec()
    unknown = set(given) - set(SelfCheckSpec.model_fields)
    if unknown:
        raise TypeError(f"unknown self-check setting(s): {sorted(unknown)}")
    chosen = {
        name: given[name] if given.get(name) is not None else getattr(spec, name) for name in SelfCheckSpec.model_fields
    }
    if given.get("confounder_gamma") is not None:
        chosen["confounder_gamma"] = _gamma_number(given["confounder_gamma"])
    try:
        SelfCheckSpec.model_validate(chosen)
    except ValidationError as err:
        first = err.errors()[0]
        _refuse(str(first["loc"][0]), chosen, first["msg"].lower())
    p = pf.protocol
    problem = confounder_problem(chosen["confounder_gamma"], p.sensitivity, p.analysis.learn_regime)
    if problem is not None:
        _refuse("confounder_gamma", chosen, problem)
    return chosen


def _gamma_number(text) -> float:
    try:
        return float(text)
    except (TypeError, ValueError):
        _refuse("confounder_gamma", {"confounder_gamma": text}, "not a number; give a number of at least 1")


def _refuse(name: str, chosen: dict, problem: str) -> NoReturn:
    raise UserInputError(f"self-check setting {name} = {chosen[name]!r}: {problem} (--{name.replace('_', '-')})")


def selfcheck_document(
    records, world: LookAlikeWorld, protocol, results: list[dict], chosen: dict, episodes=None
) -> dict:
    """What selfcheck.json holds: settings, the world's models, the fit check (the records against simulated
    cohort 0; with the survival part, also their events, losses and survival at the horizon from ``episodes``, the
    records' episodes table), the summary (with the learned regime's regret), the failed cohorts and every
    cohort's result (in cohort order). Raises :class:`UserInputError` when fewer than two cohorts completed their
    analysis."""
    results = sorted(results, key=lambda r: r["cohort"])
    failed = [r for r in results if "failed" in r]
    completed = [r for r in results if "failed" not in r]
    if len(completed) < 2:
        first = failed[0]
        raise UserInputError(
            f"the analysis failed on {len(failed)} of {len(results)} look-alike cohorts, so the self-check has "
            f"nothing to summarise; cohort {first['cohort']}: {first['failed']}"
        )
    with threadpool_limits(limits=1), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        first, first_episodes, _ = world.simulate_records(world.n_episodes, cohort_seeds(protocol, 0)[0])
        regret_summary, regret_rows = regret(world, protocol, completed, chosen["reference_episodes"])
        fit_check = reproduction(records, first, protocol) | {"learned_rule": learned_rules(records, first, protocol)}
    if first_episodes is not None and episodes is not None:
        fit_check["follow_up"] = follow_up_reproduction(episodes, first_episodes, protocol.survival.horizon_days)
    summary = summarise(completed, protocol)
    summary["regret"] = regret_summary
    for r in completed:
        if r["cohort"] in regret_rows:
            row = regret_rows[r["cohort"]]
            r["regret"] = {"reference_value": row["reference_value"], "regret": row["regret"]}
    confounder = {} if world.confounder_gamma == 1.0 else {"confounder_gamma": world.confounder_gamma}
    return {
        "caution": SELFCHECK_CAUTION,
        "settings": {
            "cohorts": len(results),
            "cohorts_completed": len(completed),
            "episodes_per_cohort": world.n_episodes,
            "replicates": chosen["replicates"],
            "analysis_replicates": protocol.evaluation.replicates,
            "truth_episodes": chosen["truth_episodes"],
            "reference_episodes": chosen["reference_episodes"],
            "seed": protocol.seed,
            "seed_stream": "selfcheck (11, c): cohort c's records and the draws of its truths; selfcheck_reference "
            "(12): the reference rule's cohorts",
            **confounder,
        },
        "world": {
            "numeric_states": list(world.numeric_states),
            "modelled_discrete_states": list(world.class_states),
            "carried_states": list(world.carried_states),
        },
        "fit_check": fit_check,
        "summary": summary,
        "failed_cohorts": [{"cohort": r["cohort"], "seed": r["seed"], "error": r["failed"]} for r in failed],
        "cohorts": completed,
    }


def write_selfcheck(document: dict, protocol, json_path, html_path) -> None:
    write_json(json_path, document)
    write_text(html_path, selfcheck_page(document, protocol, REPORT_CAUTIONS))


def run_selfcheck(pf: ProtocolFile, out: Path, chosen: dict, cores: int, progress=None) -> dict:
    """Run the whole self-check with the settings ``chosen`` (:func:`settings`) in worker processes; returns what
    selfcheck.json holds (written to ``out`` with selfcheck.html). The same settings give the same bytes whatever
    the number of workers. ``progress(done, cohorts, result)``, if given, is called as the cohorts finish (in
    cohort order)."""
    validated = validate_records(pf)
    records = validated.decisions
    gamma = chosen["confounder_gamma"]
    # in this process first: a cohort too small fails fast
    world = fitted_world(records, pf.protocol, episodes=validated.episodes, confounder_gamma=gamma)
    cohorts = chosen["cohorts"]
    with ProcessPoolExecutor(
        max_workers=max(1, min(cores, cohorts)),
        initializer=_start_worker,
        initargs=(str(pf.path), chosen["replicates"], chosen["truth_episodes"], gamma),
    ) as pool:
        results = []
        for result in pool.map(_cohort_job, range(cohorts)):
            results.append(result)
            if progress is not None:
                progress(len(results), cohorts, result)
    document = selfcheck_document(records, world, pf.protocol, results, chosen, validated.episodes)
    write_selfcheck(document, pf.protocol, out / "selfcheck.json", out / "selfcheck.html")
    return document


def _column(results, name, est, key):
    values = [r["estimates"].get(name, {}).get(est, {}).get(key) for r in results]
    return np.array([np.nan if v is None else v for v in values], dtype=float)


def _limits(results, name, est, key):
    pairs = [r["estimates"].get(name, {}).get(est, {}).get(key) or [None, None] for r in results]
    return tuple(np.array([np.nan if v is None else v for v in column], dtype=float) for column in zip(*pairs))


def _measure(estimate, truth, se, low, high, rows):
    """Performance on the cohorts in ``rows`` with an estimate and an interval (None below two such cohorts)."""
    usable = rows & np.isfinite(estimate) & np.isfinite(low) & np.isfinite(high)
    if usable.sum() < 2:
        return None
    se_used = se[usable] if np.all(np.isfinite(se[usable])) else None
    return performance(estimate[usable], truth[usable], se_used, low[usable], high[usable])


def summarise(results: list[dict], protocol) -> dict:
    """Performance of every estimator for every compared strategy's value and contrast with usual care, over all
    cohorts and over the cohorts where the estimate is supported (Morris, White & Crowther 2019)."""
    names = [USUAL_CARE] + ([LEARNED] if LEARNED in results[0]["truths"] else [])
    strategy = headline_strategy(protocol) if protocol.analysis.learn_regime else None
    if strategy is not None:
        names.append(strategy.name)
    rows = []
    for name in names:
        for est in protocol.evaluation.estimators:
            verdicts = np.array([r["estimates"].get(name, {}).get(est, {}).get("verdict") for r in results])
            supported = verdicts == "supported"
            for target in ("value",) if name == USUAL_CARE else ("value", "contrast"):
                truth = np.array([r["truths"][name][target] for r in results], dtype=float)
                estimate = _column(results, name, est, target)
                se = _column(results, name, est, f"{target}_se")
                low, high = _limits(results, name, est, f"{target}_interval")
                everywhere = np.ones(len(results), dtype=bool)
                rows.append(
                    {
                        "strategy": name,
                        "estimator": est,
                        "target": target,
                        "cohorts_supported": int(supported.sum()),
                        "all": _measure(estimate, truth, se, low, high, everywhere),
                        "supported": _measure(estimate, truth, se, low, high, supported),
                    }
                )
    headline_est = headline_estimator(protocol)

    def pick(name, target):
        return next(
            (r for r in rows if (r["strategy"], r["estimator"], r["target"]) == (name, headline_est, target)), None
        )

    true_contrasts = [r["truths"][strategy.name]["contrast"] for r in results] if strategy is not None else []
    out = {
        "estimator": headline_est,
        "rows": rows,
        "usual_care_value": pick(USUAL_CARE, "value"),
        "headline": None if strategy is None else {"name": strategy.name, **(pick(strategy.name, "contrast") or {})},
        "mean_true_contrast": float(np.mean(true_contrasts)) if true_contrasts else None,
    }
    if "confounding" in results[0]:  # only with a hidden confounder in the world: Γ = 1 adds nothing
        naive = pick(results[0]["confounding"]["strategy"], "contrast")
        out["confounding"] = confounding_summary(results, naive["all"] if naive else None)
    if "survival" in results[0]:
        out["survival"] = summarise_survival(results, names, strategy)
    return out


def _holds(truth, limits):
    """Whether ``truth`` lies in ``limits`` (None where either limit is undefined)."""
    low, high = limits
    if low is None or high is None:
        return None
    return low <= truth <= high


def _share(hits) -> dict:
    """The share of True among the defined entries and its Monte Carlo SE √(p(1 − p)/R) (Morris, White &
    Crowther 2019, Table 6, coverage)."""
    defined = [h for h in hits if h is not None]
    if not defined:
        return {"share": None, "mcse": None, "n_used": 0}
    p = sum(defined) / len(defined)
    return {"share": p, "mcse": coverage_mcse(p, len(defined)), "n_used": len(defined)}


def confounding_summary(results: list[dict], naive: dict | None) -> dict:
    """With a hidden confounder of strength Γ in the world: the share of cohorts whose point bounds of the
    sensitivity target's contrast with usual care at Γ contain its true contrast, and the share whose bootstrap
    interval of those bounds does, each with its Monte Carlo SE; beside them, ``naive``: the headline estimator's
    ordinary interval's performance for the same contrast (a row of :func:`summarise`)."""
    first = results[0]["confounding"]
    entries = [r["confounding"] for r in results]
    within_bounds = _share([_holds(c["true_contrast"], c["at_gamma"]["bounds"]) for c in entries])
    within_interval = _share([_holds(c["true_contrast"], c["at_gamma"]["interval"]) for c in entries])
    return {
        "gamma": first["gamma"],
        "strategy": first["strategy"],
        "strategy_words": first["strategy_words"],
        "cohorts": len(results),
        "truth_within_bounds": within_bounds["share"],
        "truth_within_bounds_mcse": within_bounds["mcse"],
        "cohorts_with_bounds": within_bounds["n_used"],
        "truth_within_interval": within_interval["share"],
        "truth_within_interval_mcse": within_interval["mcse"],
        "cohorts_with_interval": within_interval["n_used"],
        "naive_coverage": None if naive is None else naive["coverage"],
        "naive_coverage_mcse": None if naive is None else naive["coverage_mcse"],
        "naive_cohorts": 0 if naive is None else naive["n_used"],
        "mean_true_contrast": float(np.mean([c["true_contrast"] for c in entries])),
    }


def _survival_columns(found: list[dict], target: str, at: int):
    """Estimate, bootstrap SE and interval limits of ``target`` at table time ``at`` per cohort (NaN if absent)."""

    def column(values):
        return np.array([np.nan if v is None else v for v in values], dtype=float)

    def at_time(values):
        return None if values is None else values[at]

    limits = [f.get(f"{target}_interval") or [None, None] for f in found]
    return (
        column(at_time(f.get(target)) for f in found),
        column(at_time(f.get(f"{target}_se")) for f in found),
        column(at_time(low) for low, _ in limits),
        column(at_time(high) for _, high in limits),
    )


def summarise_survival(results: list[dict], names: list[str], strategy) -> dict:
    """Performance of the survival analysis at the horizon: every compared strategy's survival and the others'
    risk difference from usual care, against their truths without loss to follow-up, over all cohorts and over
    those where the strategy's effective sample stays reliable to the horizon (Morris, White & Crowther 2019)."""
    first = results[0]["survival"]
    horizon = first["horizon_days"]
    at = first["times"].index(horizon)
    rows = []
    for name in names:
        for target in ("survival",) if name == USUAL_CARE else ("survival", "risk_difference"):
            found = [r["survival"]["estimates"].get(name, {}) for r in results]
            truth = np.array([r["truths"][name][target][at] for r in results], dtype=float)
            estimate, se, low, high = _survival_columns(found, target, at)
            reliable = np.array([bool(f.get("reliable")) for f in found])
            everywhere = np.ones(len(results), dtype=bool)
            rows.append(
                {
                    "strategy": name,
                    "target": target,
                    "time": horizon,
                    "cohorts_reliable": int(reliable.sum()),
                    "all": _measure(estimate, truth, se, low, high, everywhere),
                    "reliable": _measure(estimate, truth, se, low, high, reliable),
                }
            )
    headline = None
    if strategy is not None:
        row = next(r for r in rows if (r["strategy"], r["target"]) == (strategy.name, "risk_difference"))
        headline = {"name": strategy.name, "all": row["all"]}
    true_differences = (
        [r["truths"][strategy.name]["risk_difference"][at] for r in results] if strategy is not None else []
    )
    return {
        "horizon_days": horizon,
        "rows": rows,
        "usual_care": next(r for r in rows if r["strategy"] == USUAL_CARE),
        "headline": headline,
        "mean_true_risk_difference": float(np.mean(true_differences)) if true_differences else None,
        "mean_events": float(np.mean([r["survival"]["events"] for r in results])),
    }
