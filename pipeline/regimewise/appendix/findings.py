"""Answers to the results and discussion items, the items beyond TARGET's scope, RECORD and the three questions of
Gottesman et al. (2019), drawn from summary.json and the protocol (see :mod:`regimewise.appendix.answers`)."""

from __future__ import annotations

from regimewise.appendix.answers import Answer, Registry, counts, fmt, registrar, share, words

FINDINGS: Registry = {}
answers = registrar(FINDINGS)


def _headline_estimate(s) -> dict:
    h = s["headline"]
    return s["values"][h["strategy"]][h["estimator"]]


# ---------------------------------------------------------------------------------------------- TARGET results
@answers("target", "8")
@answers("record", "13.1")
def _participants(run):
    s = run.summary
    following = _headline_estimate(s).get("n_following")
    return Answer(
        f"{counts(s)}; {fmt(following)} episodes follow the headline strategy at every decision",
        "section-validation",
        ("validate/validation.json", "evaluate/values.json"),
        authors_add="the numbers assessed for eligibility in the source data, and a flow diagram",
    )


@answers("target", "9")
def _baseline(run):
    if "section-cohort" not in run.sections:
        return None
    flagged = run.summary["usual_care_model"].get("baseline_states_imbalanced")
    return Answer(
        "Baseline state by the first action taken (with sequential strategies an episode is compatible with several "
        f"strategies at time zero, so the table is by action, not by strategy); {fmt(flagged)} states flagged as "
        "imbalanced by their standardised mean difference",
        "section-cohort",
        ("describe/cohort.json",),
        authors_add="baseline characteristics the records do not carry as states",
    )


@answers("target", "10")
def _follow_up_length(run):
    sv = run.summary["survival"]
    if sv is None:
        return None
    cut = sv["strategies"].get(sv["headline_strategy"], {}).get("unreliable_from")
    tail = (
        f"too few episodes follow the headline strategy for its weights to be trusted from day {fmt(cut, 0)}"
        if cut is not None
        else "the headline strategy's weights stay trustworthy to the horizon"
    )
    return Answer(f"Survival follow-up to day {fmt(sv['horizon_days'], 0)}; {tail}", "section-survival")


@answers("target", "11")
def _missing(run):
    v = run.summary["validation"]
    return Answer(
        f"{fmt(v['values_filled_missing'])} values filled, {fmt(v['decisions_dropped_missing'])} decisions and "
        f"{fmt(v['episodes_dropped_missing'])} episodes dropped, by the protocol's missing-data policies",
        "section-validation",
        ("validate/validation.json",),
        authors_add="missing data by strategy (the tool counts them over all records)",
    )


@answers("target", "12")
def _outcome_distribution(run):
    u = run.summary["usual_care_observed"]
    return Answer(
        f"Observed mean total reward under usual care {fmt(u['mean_return'])} (standard error {fmt(u['se'])}, "
        f"{fmt(u['n_episodes'])} episodes); expected values under every other strategy in the values table",
        "section-values",
        ("evaluate/values.json",),
        authors_add="the outcome's distribution in the words of the source population",
    )


@answers("target", "13")
def _effects(run):
    s = run.summary
    parts = [s["headline"]["sentence"], *([s["learned_regime_sentence"]] if s["learned_regime_sentence"] else [])]
    if s["survival"] is not None:
        parts.append(s["survival"]["sentence"])
    return Answer(" ".join(dict.fromkeys(parts)), "summary-panel", ("report/summary.json",))


@answers("target", "14")
def _sensitivity_results(run):
    s = run.summary
    if s["sensitivity"] is None:
        return None
    parts = [s["sensitivity"]["sentence"]] + ([s["sweep"]["sentence"]] if s["sweep"] is not None else [])
    return Answer(" ".join(parts), "section-sensitivity", ("sensitivity/sensitivity.json", "sweep/sweep.json"))


@answers("target", "16")
def _limitations(run):
    s = run.summary
    return Answer(
        f"The headline verdict is '{s['headline']['verdict']}'; estimates resting on an effective sample below "
        f"{fmt(s['minimum_reliable_ess'], 0)} episodes are flagged in the report",
        "summary-panel",
        authors_add="the discussion of the limitations: target trial versus emulation, plausibility of the assumptions",
    )


# ---------------------------------------------------------------------------------------------- beyond TARGET
@answers("target", "X1")
def _decision_points(run):
    p = run.protocol
    actions = "; ".join(f"{words(a.label)} ({a.description})" for a in p.actions)
    return Answer(f"Up to {p.horizon} decision points per episode; at each one of: {actions}", "section-protocol")


@answers("target", "X2")
def _usual_care_fit(run):
    m = run.summary["usual_care_model"]
    ess = [d["ess"] for d in m["by_step"].values() if isinstance(d.get("ess"), (int, float))]
    verdicts = [d["overlap"] for d in m["by_step"].values() if d.get("overlap")]
    text = f"{words(m['kind'])}, AUC {fmt(m['auc'])}, Brier score {fmt(m['brier'])}"
    if ess:
        text += f"; effective sample of the weights per decision point {fmt(min(ess), 1)} to {fmt(max(ess), 1)}"
    if verdicts:
        text += "; overlap: " + ", ".join(f"{verdicts.count(v)} {v}" for v in dict.fromkeys(verdicts))
    return Answer(text, "section-usual-care", ("behaviour/behaviour.json", "describe/cohort.json"))


@answers("target", "X3")
@answers("gottesman", "Q2")
def _effective_sample(run):
    s = run.summary
    estimator = s["headline"]["estimator"]
    learned = ""
    if "learned" in s["values"]:
        learned = f" and the learned regime's ({estimator}) on {fmt(s['values']['learned'][estimator]['ess'], 1)}"
    return Answer(
        f"{fmt(s['cohort']['episodes'])} episodes; the headline estimate rests on an effective sample of "
        f"{fmt(s['headline']['ess'], 1)} episodes{learned}; "
        f"below {fmt(s['minimum_reliable_ess'], 0)} an estimate is flagged as unreliable",
        "section-values",
        ("evaluate/values.json",),
    )


@answers("target", "X4")
def _constraints(run):
    s, c = run.summary, run.protocol.constraints
    change = "no limit" if c.max_intensity_change is None else f"at most {c.max_intensity_change} step(s)"
    if s["regime"] is None:
        return Answer(
            f"No regime was learned (analysis.learn_regime: false); the named strategies keep to the "
            f"{len(c.clinical_rules)} clinical rules (checked when the protocol is read) and intensity change "
            f"{change}; "
            f"support threshold {c.support_threshold:g} (an action below it counts as unsupported in the verdicts)",
            "section-compared",
            ("regime/regime.json",),
        )
    return Answer(
        f"{len(c.clinical_rules)} clinical rules; support threshold {c.support_threshold:g} "
        f"({fmt(s['regime']['decisions_changed_by_support'])} decisions changed by it); pessimism {c.pessimism:g}; "
        f"intensity change {change}",
        "section-regime",
        ("regime/regime.json",),
    )


@answers("target", "X5")
def _identified(run):
    s = run.summary
    estimator = s["headline"]["estimator"]
    missing = [words(n) for n, by in s["values"].items() if by.get(estimator, {}).get("verdict") == "not identified"]
    text = (
        f"Not identified by {estimator} (no number is reported for them): {', '.join(missing)}"
        if missing
        else f"Every strategy evaluated is identified by {estimator}"
    )
    return Answer(text, "section-values", ("evaluate/values.json",))


@answers("target", "X6")
def _cross_fit(run):
    if run.summary["regime"] is None:
        return Answer(
            "No regime was learned (analysis.learn_regime: false), so nothing is cross-fitted: the named strategies "
            "are fixed in the protocol; the bootstrap refits usual care and the outcome models in each replicate",
            "section-values",
            ("regime/regime.json",),
        )
    fit = run.summary["regime"]["cross_fit"] or {}
    held = (
        "holds the learned regime fixed" if run.protocol.evaluation.bootstrap_regime == "fixed" else "learns it again"
    )
    if (fit.get("folds") or 1) < 2:
        text = "Evaluated on the same records it was learned from (no cross-fitting): its values are optimistic"
    else:
        text = (
            f"Cross-fitted over {fit['folds']} folds: each patient is scored with the regime learned on the other "
            f"folds, which agree with the full-data regime at {share(fit.get('agreement'))} of decisions"
        )
    return Answer(
        f"{text}; the bootstrap {held} in each replicate", "section-values", ("regime/recommendations.parquet",)
    )


# ---------------------------------------------------------------------------------------------- RECORD
@answers("record", "12.2")
def _cleaning(run):
    return Answer(
        "Every record was checked against the protocol's data contract (types, plausible ranges, order of decisions, "
        f"the de-identification guard) and the missing-data policies applied: {counts(run.summary)}",
        "section-validation",
        ("validate/validation.json",),
        authors_add="the cleaning done before the records reached the tool",
    )


@answers("record", "19.1")
def _secondary_data(run):
    s = run.summary
    if s["sensitivity"] is None:
        return None
    return Answer(
        f"Unmeasured confounding: {s['sensitivity']['sentence']}",
        "section-sensitivity",
        ("sensitivity/sensitivity.json",),
        authors_add="misclassification, changing eligibility over time and other limits of routinely collected data",
    )


# ---------------------------------------------------------------------------------------------- Gottesman et al.
@answers("gottesman", "Q1")
def _all_variables(run):
    s, p = run.summary, run.protocol
    text = (
        f"The usual-care model uses the {len(p.states)} recorded states ({', '.join(p.state_names)}); it discriminates "
        f"the actions taken with AUC {fmt(s['usual_care_model']['auc'])}"
    )
    sens = s["sensitivity"]
    if sens is not None and sens.get("tipping_point") is not None:
        text += (
            f"; a hidden factor would have to change the odds of the action taken by Γ = {fmt(sens['tipping_point'])} "
            "for the interval of the bounded difference to include zero"
        )
    return Answer(
        text,
        "section-usual-care",
        ("behaviour/behaviour.json",),
        authors_add="whether clinicians used information the records lack (clinical judgement, not a number)",
    )


@answers("gottesman", "Q3")
def _prospective(run):
    s = run.summary
    if s["regime"] is None:
        return Answer(
            "No regime was learned (analysis.learn_regime: false): the strategies compared are the rules the protocol "
            "names, fixed before the analysis and checked against the clinical rules",
            "section-compared",
            ("regime/regime.json",),
            authors_add="a prospective evaluation, transfer to other sites and times, and clinicians' review of the "
            "reward",
        )
    fidelity = s["regime"].get("readable_tree_fidelity")
    return Answer(
        f"The learned regime differs from the action taken at {share(s['regime']['share_differs_from_taken'])} of "
        f"decisions and keeps to the clinical rules and the support threshold; its readable summary reproduces it at "
        f"{share(fidelity)} of decisions",
        "section-regime",
        ("regime/regime.json",),
        authors_add="a prospective evaluation, transfer to other sites and times, and clinicians' review of the reward",
    )
