"""summary.json: every headline number of a run, keyed as the README documents, and the headline sentences."""

from __future__ import annotations

from regimewise.cautions import REPORT_CAUTIONS
from regimewise.evaluation.strategies import headline_strategy
from regimewise.evaluation.values import headline_estimator


# ---------------------------------------------------------------------------------------------- report helpers
def usual_care_summary(behaviour, cohort) -> dict:
    """The usual-care, overlap and balance numbers that summary.json carries (documented in the README)."""
    out = {
        "kind": behaviour["model"]["kind"],
        "brier": behaviour["brier"],
        "folds": behaviour["cross_fitting"]["folds"],
        "probability_floor": behaviour["probability_floor"],
        "inverse_probability_weights_truncated": behaviour["inverse_probability_weights_truncated"],
        "by_step": {
            step: {
                "auc": d["auc"],
                "brier": d["brier"],
                "ess": d["weights"]["before_truncation"]["ess"],
                "ess_truncated": d["weights"]["after_truncation"]["ess"],
                "share_taken_below_support": d["share_taken_below_support"],
            }
            for step, d in behaviour["by_step"].items()
        },
    }
    if cohort is not None:
        for step, d in cohort["overlap_by_step"].items():
            balance = cohort["balance_by_step"][step]
            out["by_step"][step].update(
                overlap=d["verdict"],
                share_recommended_below_support=d["share_recommended_below_support"],
                states_imbalanced_unweighted=balance["n_flagged_unweighted"],
                states_imbalanced_weighted=balance["n_flagged_weighted"],
            )
        out["overlap_rule"] = next(iter(cohort["overlap_by_step"].values()))["rule"]
        out["baseline_states_imbalanced"] = cohort["baseline"]["n_flagged"]
    return out


SUMMARY_SCHEMA_VERSION = "2"


# ---------------------------------------------------------------------------------------------- summary.json
# Counts of episodes, patients or decisions: 1 to min_cell_count − 1 are written "<min_cell_count", as in the report.
SMALL_COUNT_KEYS = frozenset(
    {
        "episodes",
        "patients",
        "decisions",
        "rows_read",
        "decisions_dropped_missing",
        "episodes_dropped_missing",
        "values_filled_missing",
        "decisions_changed_by_support",
        "decisions_without_permitted_action",
        "decisions_changed_by_this_safeguard",
        "rule_violations",
        "n_following",
        "n_episodes",
        "entries_raised",
        "decisions_with_taken_action_raised",
    }
)


def suppress_small_counts(node, threshold: int):
    """A copy of ``node`` with every count under :data:`SMALL_COUNT_KEYS` from 1 to threshold − 1 replaced by
    the string ``"<threshold"`` (the report's small-cell rule, common practice with no source)."""
    if isinstance(node, dict):
        return {
            key: f"<{threshold}" if _small(key, value, threshold) else suppress_small_counts(value, threshold)
            for key, value in node.items()
        }
    if isinstance(node, list):
        return [suppress_small_counts(value, threshold) for value in node]
    return node


def _small(key, value, threshold: int) -> bool:
    return key in SMALL_COUNT_KEYS and isinstance(value, int) and not isinstance(value, bool) and 0 < value < threshold


def build_summary(p, parts, prov) -> dict:
    """Every headline number, keyed as documented in the README (section 'summary.json'); small counts suppressed."""
    return suppress_small_counts(_summary(p, parts, prov), p.report.min_cell_count)


def _summary(p, parts, prov) -> dict:
    values = parts["values"]
    return {
        "schema_version": SUMMARY_SCHEMA_VERSION,
        "study": {"title": p.study.title, "version": p.study.version, "run_name": p.study.run_name},
        "caution": REPORT_CAUTIONS[0],
        "cohort": {
            "episodes": parts["validation"]["episodes"],
            "patients": parts["validation"]["patients"],
            "decisions": parts["validation"]["rows_kept"],
        },
        "validation": {
            "rows_read": parts["validation"]["rows_read"],
            "decisions_dropped_missing": parts["validation"].get("rows_dropped_missing", 0),
            "episodes_dropped_missing": parts["validation"].get("episodes_dropped_missing", 0),
            "values_filled_missing": sum(
                m.get("filled", 0) for m in parts["validation"].get("missing_data", {}).values()
            ),
            "acknowledged_columns": [a["column"] for a in parts["validation"].get("acknowledged_columns", [])],
        },
        "usual_care_model": {
            "auc": parts["behaviour"]["auc"],
            "converged": parts["behaviour"]["model"]["converged"],
            "inverse_probability_weights": parts["behaviour"]["inverse_probability_weights"],
            **usual_care_summary(parts["behaviour"], parts.get("cohort")),
        },
        "learn_regime": p.analysis.learn_regime,
        "regime": None
        if not p.analysis.learn_regime
        else {
            "support_threshold": parts["regime"]["constraints"]["support_threshold"],
            "decisions_changed_by_support": parts["regime"]["decisions_changed_by_support"],
            "share_differs_from_taken": parts["regime"]["share_differs_from_taken"],
            "cross_fit": parts["regime"]["cross_fit"],
            **safeguard_headlines(parts["regime"], values),
        },
        "values": {r["name"]: r["estimates"] for r in values["regimes"]},
        "usual_care_observed": values["usual_care_observed"],
        "contrasts": values["contrasts"],
        "minimum_reliable_ess": values["minimum_reliable_ess"],
        "bootstrap": values["bootstrap"],
        "headline": headline_block(p, values),
        "learned_regime_sentence": headline_sentence(p, values) if p.analysis.learn_regime else None,
        "strategies": strategy_headlines(p, values),
        "sensitivity": sensitivity_headlines(parts.get("sensitivity")),
        "sweep": sweep_headlines(parts.get("sweep")),
        "selfcheck": selfcheck_headlines(parts.get("selfcheck")),
        "survival": survival_headlines(parts.get("survival"), headline_name(p)),
        "protocol_sha256": prov["protocol"]["sha256"],
        "inputs_sha256": {k: v["sha256"] for k, v in prov["inputs"].items()},
        "root_seed": prov["root_seed"],
    }


def sensitivity_headlines(sensitivity: dict | None) -> dict | None:
    """Γ*, the bounds table, E-values and the plain sentence (the full Γ curve stays in sensitivity.json)."""
    if sensitivity is None:
        return None
    keys = (
        "strategy",
        "strategy_words",
        "adoption",
        "note",
        "estimator",
        "ess",
        "low_ess",
        "level",
        "confounded_decisions",
        "tipping_point",
        "tipping_point_bounds",
        "gamma_max",
        "precision",
        "table",
        "e_values",
        "sentence",
    )
    own = ("strategy", "label", "ess", "low_ess", "tipping_point", "tipping_point_bounds", "table", "sentence")
    comparators = [{key: c[key] for key in own} for c in sensitivity.get("comparators", [])]
    return {key: sensitivity[key] for key in keys} | {"comparators": comparators}


def selfcheck_headlines(selfcheck: dict | None) -> dict | None:
    """The self-check's settings and summary (without the cohorts' rows, which stay in selfcheck.json)."""
    if selfcheck is None:
        return None
    fit = selfcheck["fit_check"]
    return {
        "settings": selfcheck["settings"],
        "summary": selfcheck["summary"],
        "fit_check": {key: fit[key] for key in ("largest_smd", "smd_flag", "flagged", "action_shares", "mean_return")}
        | {"learned_rule": fit.get("learned_rule")},  # absent from documents written before it existed
    }


def sweep_headlines(sweep: dict | None) -> dict | None:
    """The specification sweep's sorted table (without the per-Γ bounds, which stay in sweep.json)."""
    if sweep is None:
        return None
    keys = (
        "estimator",
        "level",
        "replicates",
        "gammas",
        "gamma_max",
        "axes",
        "prespecified",
        "prespecified_in_grid",
        "n_specifications",
        "better",
        "intervals_showing_benefit",
        "intervals_showing_benefit_low_ess",
        "sentence",
    )
    row_keys = ("id", "prespecified", "settings", "difference", "low", "high", "ess", "low_ess", "tipping_point")
    return {
        **{key: sweep[key] for key in keys},
        "specifications": [{key: row[key] for key in row_keys} for row in sweep["specifications"]],
    }


def safeguard_headlines(regime: dict, values: dict) -> dict:
    """Side-by-side regimes (what each safeguard changed, rule violations, values) and the readable tree's fidelity."""
    if "side_by_side" not in regime:
        return {}
    estimates = {r["name"]: r["estimates"] for r in values.get("side_by_side", [])}
    return {
        "decisions_without_permitted_action": regime["decisions_without_permitted_action"],
        "pessimism": regime["constraints"]["pessimism"],
        "side_by_side": {
            r["name"]: {
                "share_differs_from_taken": r["share_differs_from_taken"],
                "decisions_changed_by_this_safeguard": r["decisions_changed_by_this_safeguard"],
                "rule_violations": r["rule_violations"],
                "values": {est: e["value"] for est, e in estimates.get(r["name"], {}).items()},
            }
            for r in regime["side_by_side"]
        },
        "readable_tree_fidelity": regime["readable"]["fidelity"],
    }


def headline_name(p) -> str:
    """The regime the headline is about: the protocol's pre-specified strategy, else the learned regime; without a
    learned regime, the named strategy of ``analysis.headline`` (or the only comparator)."""
    if p.headline_regime is not None:
        return p.headline_regime
    chosen = headline_strategy(p.strategies)
    return "learned" if chosen is None else chosen.name


def headline_block(p, values) -> dict:
    """summary.json's ``headline``: the one contrast the report leads with, by the headline estimator.

    Strategy (the pre-specified one of the ``strategies`` section, else the learned regime; the named strategy of
    ``analysis.headline`` when no regime is learned), estimator,
    difference from usual care with its bootstrap interval, ESS, verdict and the plain sentence. A value that is
    not identified has no number here (values.json keeps it for audit)."""
    name, estimator = headline_name(p), headline_estimator(p)
    contrast = next(c for c in values["contrasts"] if c["regime"] == name and c["estimator"] == estimator)
    regime = next(r for r in values["regimes"] if r["name"] == name)
    withheld = contrast.get("withheld") or contrast["verdict"] == "not identified"
    return {
        "strategy": name,
        "label": regime["label"],
        "words": regime.get("words"),
        "better": p.reward.better,
        "prespecified": p.strategies is not None or p.headline_regime is not None,
        "estimator": estimator,
        "difference": None if withheld else contrast["difference"],
        "low": None if withheld else contrast.get("low"),
        "high": None if withheld else contrast.get("high"),
        "level": values["bootstrap"]["level"] if values.get("bootstrap") else None,
        "ess": regime["estimates"][estimator]["ess"],
        "verdict": contrast["verdict"],
        "sentence": strategy_sentence(p, values) if p.strategies is not None else headline_sentence(p, values, name),
    }


def headline_sentence(p, values, regime: str = "learned") -> str:
    """One plain sentence on the ``regime``-minus-usual-care contrast (default: the learned regime; else a named
    strategy) by the preferred estimator (wdr if run)."""
    contrasts = {c["estimator"]: c for c in values["contrasts"] if c["regime"] == regime}
    name = headline_estimator(p)
    contrast = contrasts[name]
    entry = next(r for r in values["regimes"] if r["name"] == regime)
    ess = entry["estimates"][name]["ess"]
    named = f"the named strategy '{entry['label']}'"
    value = "the learned regime's value" if regime == "learned" else f"the value of {named}"
    if contrast.get("withheld"):
        return f"By {name}, {value} is not identified: {contrast_reason(values, regime, name)}."
    if contrast["difference"] is None:
        return (
            f"The {name} estimate of {value} is undefined: no episode in the records follows it "
            "far enough for the weights to say anything."
        )
    direction = "higher" if contrast["difference"] > 0 else "lower"
    subject = (
        "the learned regime's expected total reward per episode"
        if regime == "learned"
        else f"the expected total reward per episode under {named}"
    )
    sentence = (
        f"By {name}, {subject} is {abs(contrast['difference']):.2f} "
        f"{direction} than usual care's{reads_as(p, contrast['difference'])}"
        f"{_interval_clause(contrast, values.get('bootstrap'))}, resting on an "
        f"effective sample of {ess:.1f} episodes"
    )
    if contrast["low_ess"]:
        return sentence + (
            f", below the {values['minimum_reliable_ess']:.0f} needed to trust it: the data cannot confirm this "
            + (
                "difference; a higher support threshold keeps the regime closer to usual care and better supported."
                if regime == "learned"
                else "difference."
            )
        )
    return sentence + "."


def reads_as(p, difference: float) -> str:
    """' (lower is better: a benefit)' after a difference when the protocol's reward is lower-is-better, else ''."""
    if p.reward.better == "higher":
        return ""
    return f" (lower is better: {'a benefit' if difference < 0 else 'a harm' if difference > 0 else 'no difference'})"


def _interval_clause(contrast, bootstrap) -> str:
    """' (95% interval −1.20 to 3.40 for learned minus usual care; it includes no difference)' or ''."""
    if contrast.get("low") is None or not bootstrap:
        return ""
    low, high = contrast["low"], contrast["high"]
    covers = " — it includes no difference" if low <= 0 <= high else ""
    return f" ({100 * bootstrap['level']:.0f}% bootstrap interval for the difference {low:.2f} to {high:.2f}{covers})"


def survival_headlines(survival: dict | None, headline: str = "learned") -> dict | None:
    """Per strategy at the table times: survival, risk difference against usual care and restricted mean
    survival time, each with its bootstrap interval and whether the effective sample stays adequate; the sentence
    on the ``headline`` regime (the pre-specified strategy, else the learned regime)."""
    if survival is None:
        return None
    intervals = survival["intervals"]["strategies"]
    strategies = {}
    for row in survival["strategies"]:
        point, limits, cut = row["at_times"], intervals.get(row["name"], {}), row["diagnostics"]["unreliable_from"]
        strategies[row["name"]] = {
            "label": row["label"],
            "survival": point["survival"],
            "survival_interval": limits.get("survival"),
            "risk_difference": point["risk_difference"],
            "risk_difference_interval": limits.get("risk_difference"),
            "rmst": point["rmst"],
            "rmst_interval": limits.get("rmst"),
            "rmst_difference": point["rmst_difference"],
            "rmst_difference_interval": limits.get("rmst_difference"),
            "unreliable_from": cut,
            "reliable_at": [cut is None or t < cut for t in survival["times"]],
        }
    return {
        "horizon_days": survival["horizon_days"],
        "times": survival["times"],
        "level": survival["intervals"]["level"],
        "replicates": survival["intervals"]["replicates"],
        "dropout_model": survival["dropout_model"]["used"],
        "grace": survival["grace"],
        "strategies": strategies,
        "headline_strategy": headline,
        "sentence": survival_sentence(survival, strategies, headline),
    }


def survival_sentence(survival: dict, strategies: dict, name: str = "learned") -> str:
    """One plain sentence on regime ``name`` against usual care at the horizon."""
    learned, horizon = strategies.get(name), survival["horizon_days"]
    what = "the learned regime"
    if name != "learned":
        what = f"the headline strategy ({_lower(learned['label']) if learned else name})"
    if learned is None or learned["risk_difference"][-1] is None:
        return f"Survival to day {horizon:g} under {what} is undefined: no episode follows it from the start."
    difference = 100 * learned["risk_difference"][-1]
    limits = learned["risk_difference_interval"] or {}
    low, high = (limits.get("low") or [None])[-1], (limits.get("high") or [None])[-1]
    direction = "lower" if difference < 0 else "higher"
    sentence = (
        f"By day {horizon:g}, the estimated risk of the event under {what} is {abs(difference):.1f} "
        f"percentage points {direction} than under usual care (risk difference {difference:+.1f}"
    )
    if low is not None:
        level = 100 * survival["intervals"]["level"]
        sentence += f"; {level:.0f}% bootstrap interval {100 * low:+.1f} to {100 * high:+.1f}"
    sentence += ")"
    if learned["unreliable_from"] is not None and learned["unreliable_from"] <= horizon:
        return sentence + (
            f"; but from day {learned['unreliable_from']:g} too few episodes still follow {what} for the "
            "weights to be trusted, so the records cannot confirm this difference."
        )
    return sentence + "."


# ---------------------------------------------------------------------------------------------- strategies
def contrast_reason(values: dict, regime: str, estimator: str) -> str:
    """The verdict's plain reason of ``regime``'s estimate by ``estimator`` (values.json)."""
    estimates = next(r["estimates"] for r in values["regimes"] if r["name"] == regime)
    return estimates[estimator].get("verdict_reason") or "the records cannot identify it"


def strategy_rows(p, values: dict) -> list[dict]:
    """The trade-off table: every strategy of the protocol's grid by the headline estimator, with its contrast
    against usual care, interval, ESS, share of decisions changed and verdict (numbers withheld when not
    identified)."""
    name = headline_estimator(p)
    contrasts = {c["regime"]: c for c in values["contrasts"] if c["estimator"] == name}
    rows = []
    for r in values["regimes"]:
        if "family" not in r:
            continue
        e, c = r["estimates"][name], contrasts[r["name"]]
        rows.append(
            {
                "name": r["name"],
                "label": r["label"],
                "family": r["family"],
                "parameter": r["parameter"],
                "words": r["words"],
                "estimator": name,
                "value": e["value"],
                "difference": c["difference"],
                "low": c.get("low"),
                "high": c.get("high"),
                "ess": e["ess"],
                "share_changed": r["share_changed"],
                "verdict": c["verdict"],
                "reason": e.get("verdict_reason"),
            }
        )
    return rows


def strategy_headlines(p, values: dict) -> dict | None:
    """summary.json's ``strategies`` block: the trade-off table and the protocol's pre-specified headline strategy."""
    if p.strategies is None:
        return None
    rows = strategy_rows(p, values)
    wanted = p.strategies.headline
    headline = next(r for r in rows if r["family"] == wanted.family and r["parameter"] == wanted.value)
    return {"headline": headline, "prespecified": True, "table": rows}


def strategy_sentence(p, values: dict) -> str:
    """One plain sentence on the pre-specified headline strategy: what it is, its contrast, ESS and verdict."""
    h = strategy_headlines(p, values)["headline"]
    start = f"Pre-specified headline strategy: {h['words']}"
    if h["verdict"] == "not identified" or h["difference"] is None:
        return f"{start}, the records cannot identify its value ({h['reason'] or 'no estimate'})."
    direction = "higher" if h["difference"] > 0 else "lower"
    sentence = (
        f"{start}, the expected total reward per episode would have been {abs(h['difference']):.2f} {direction} "
        f"than under usual care{reads_as(p, h['difference'])} by {h['estimator']}"
        f"{_interval_clause(h, values.get('bootstrap'))}, resting on an "
        f"effective sample of {h['ess']:.1f} episodes; verdict: {h['verdict']}"
    )
    if h["verdict"] == "model projection":
        return sentence + " — the data cannot confirm this difference; it rests mostly on the outcome model."
    return sentence + " (the effective sample reaches the protocol's minimum)."


def _lower(label: str) -> str:
    """A label inside a sentence: its first letter in lower case ("Learned regime at 40%…" → "learned regime…")."""
    return label[:1].lower() + label[1:]
