"""selfcheck.html: the self-check's section as one self-contained page (the report's stylesheet, no scripts)."""

from __future__ import annotations

from html import escape

from regimewise.report.stylesheet import report_stylesheet

TARGET_WORDS = {"value": "value", "contrast": "difference from usual care"}
SURVIVAL_WORDS = {"survival": "survival", "risk_difference": "risk difference from usual care"}


def _number(x, digits=3):
    return "—" if x is None else f"{x:,.{digits}f}"


def _percent(x, digits=1):
    return "—" if x is None else f"{100 * x:.{digits}f}%"


def _points(x):
    return "—" if x is None else f"{100 * x:.1f}"


def _coverage(measure):
    if not measure or measure.get("coverage") is None:
        return "—"
    return f"{_percent(measure['coverage'])} ± {_points(measure['coverage_mcse'])}"


def _share_in_words(share, mcse, n) -> str:
    """A share of cohorts in words: '75.0% (Monte Carlo SE 21.7 points) of 4'; a share of 0 or 1, whose Monte Carlo
    SE √(p(1 − p)/R) is 0 and says nothing, as 'all 50 of 50' or 'none of 50'."""
    if share is None:
        return "— of the"
    if share == 1.0:
        return f"all {n} of {n}"
    if share == 0.0:
        return f"none of {n}"
    return f"{_percent(share)} (Monte Carlo SE {_points(mcse)} points) of {n}"


def _share_of(measure):
    """A coverage in words (:func:`_share_in_words`)."""
    if not measure or measure.get("coverage") is None:
        return "— of the"
    return _share_in_words(measure["coverage"], measure["coverage_mcse"], measure["n_used"])


def _confounding_sentence(c, level) -> str:
    """The hidden confounder's check in words."""
    gamma = f"{c['gamma']:g}"
    naive = _share_in_words(c["naive_coverage"], c["naive_coverage_mcse"], c["naive_cohorts"])
    bounds = _share_in_words(c["truth_within_bounds"], c["truth_within_bounds_mcse"], c["cohorts_with_bounds"])
    interval = _share_in_words(c["truth_within_interval"], c["truth_within_interval_mcse"], c["cohorts_with_interval"])
    return (
        f"With a hidden confounder of strength Γ = {gamma} built into the look-alike world (one particular "
        "confounder within the sensitivity model, not the worst case it allows), the sensitivity bounds at "
        f"Γ = {gamma} of the difference between {escape(c['strategy_words'])} and usual care contained the true "
        f"difference in {bounds} cohorts, and their bootstrap intervals in {interval}; the ordinary "
        f"{100 * level:.0f}% intervals, which assume no hidden confounding, covered it in {naive}."
    )


def _performance_table(summary, names) -> str:
    head = (
        "<tr><th scope='col'>Strategy</th><th scope='col'>Estimator</th><th scope='col'>Target</th>"
        "<th scope='col'>Cohorts</th><th scope='col'>Bias (MCSE)</th><th scope='col'>Empirical SE</th>"
        "<th scope='col'>Mean estimated SE</th><th scope='col'>Coverage ± MCSE (points)</th>"
        "<th scope='col'>Mean width</th><th scope='col'>Supported in</th>"
        "<th scope='col'>Coverage where supported</th></tr>"
    )
    body = []
    for row in summary["rows"]:
        m, s = row["all"] or {}, row["supported"]
        body.append(
            f"<tr><td>{escape(names.get(row['strategy'], row['strategy']))}</td><td>{escape(row['estimator'])}</td>"
            f"<td>{TARGET_WORDS[row['target']]}</td><td>{m.get('n_used', 0)}</td>"
            f"<td>{_number(m.get('bias'))} ({_number(m.get('bias_mcse'))})</td>"
            f"<td>{_number(m.get('empirical_se'))}</td><td>{_number(m.get('model_se'))}</td>"
            f"<td>{_coverage(m)}</td><td>{_number(m.get('mean_width'))}</td>"
            f"<td>{row['cohorts_supported']}</td><td>{_coverage(s)}</td></tr>"
        )
    caption = "How the pipeline performed on the look-alike cohorts, by strategy, estimator and target"
    return f"<table><caption>{caption}</caption><thead>{head}</thead>{''.join(body)}</table>"


def _survival_table(survival, names) -> str:
    """Performance of the survival analysis at the horizon, one row per strategy and target."""
    head = (
        "<tr><th scope='col'>Strategy</th><th scope='col'>Target</th><th scope='col'>Cohorts</th>"
        "<th scope='col'>Bias (MCSE)</th><th scope='col'>Empirical SE</th><th scope='col'>Mean bootstrap SE</th>"
        "<th scope='col'>Coverage ± MCSE (points)</th><th scope='col'>Intervals excluding 0</th>"
        "<th scope='col'>Reliable in</th><th scope='col'>Coverage where reliable</th></tr>"
    )
    body = []
    for row in survival["rows"]:
        m = row["all"] or {}
        power = _percent(m.get("power")) if row["target"] == "risk_difference" else "—"
        body.append(
            f"<tr><td>{escape(names.get(row['strategy'], row['strategy']))}</td>"
            f"<td>{SURVIVAL_WORDS[row['target']]}</td><td>{m.get('n_used', 0)}</td>"
            f"<td>{_number(m.get('bias'))} ({_number(m.get('bias_mcse'))})</td>"
            f"<td>{_number(m.get('empirical_se'))}</td><td>{_number(m.get('model_se'))}</td>"
            f"<td>{_coverage(m)}</td><td>{power}</td>"
            f"<td>{row['cohorts_reliable']}</td><td>{_coverage(row['reliable'])}</td></tr>"
        )
    caption = (
        f"Survival at the horizon ({survival['horizon_days']:g} days) by clone–censor–weight on the look-alike "
        "cohorts, against the truth had nobody been lost to follow-up (reliable: effective sample above the "
        "analysis's floor up to the horizon)"
    )
    return f"<table><caption>{caption}</caption><thead>{head}</thead>{''.join(body)}</table>"


def _survival_part(summary, names) -> list[str]:
    """The survival part of the page (nothing without it)."""
    survival = summary.get("survival")
    if not survival:
        return []
    uc = (survival["usual_care"] or {}).get("all") or {}
    words = [
        f"The survival analysis's intervals for usual care's survival at {survival['horizon_days']:g} days covered "
        f"the truth in {_share_of(uc)} cohorts"
    ]
    h = (survival.get("headline") or {}).get("all") or {}
    if h:
        words.append(
            f"; for the headline strategy's risk difference from usual care, in {_share_of(h)} cohorts (mean true "
            f"risk difference {_number(survival['mean_true_risk_difference'])}; intervals excluding zero in "
            f"{_percent(h.get('power'))})"
        )
    return [
        "<h2>Survival</h2><p>" + "".join(words) + ". The world ends follow-up with an event in the interval after "
        "each decision and, at an episode's last decision, loss to follow-up, both by logistic regression on the "
        "state and action; the truths switch loss off (survival had nobody been lost, the target of the dropout "
        f"weights). About {survival['mean_events']:,.0f} events per cohort.</p>",
        _survival_table(survival, names),
    ]


def _fit_table(fit, labels) -> str:
    rows = "".join(
        f"<tr><td>{escape(a)}</td><td>{_percent(fit['action_shares']['records'][a])}</td>"
        f"<td>{_percent(fit['action_shares']['simulated'][a])}</td></tr>"
        for a in labels
    )
    r = fit["mean_return"]
    d = fit["decisions_per_episode"]
    rows += (
        f"<tr><td>mean return (SE)</td><td>{_number(r['records'])} ({_number(r['records_se'])})</td>"
        f"<td>{_number(r['simulated'])} ({_number(r['simulated_se'])})</td></tr>"
        f"<tr><td>decisions per episode</td><td>{_number(d['records'], 2)}</td>"
        f"<td>{_number(d['simulated'], 2)}</td></tr>"
    )
    follow = fit.get("follow_up")
    if follow:
        rec, sim = follow["records"], follow["simulated"]
        rows += (
            f"<tr><td>events by day {follow['horizon_days']:g}</td><td>{_percent(rec['event_share'])}</td>"
            f"<td>{_percent(sim['event_share'])}</td></tr>"
            f"<tr><td>lost to follow-up before it</td><td>{_percent(rec['dropout_share'])}</td>"
            f"<td>{_percent(sim['dropout_share'])}</td></tr>"
            f"<tr><td>Kaplan–Meier survival at it</td><td>{_number(rec['survival_at_horizon'])}</td>"
            f"<td>{_number(sim['survival_at_horizon'])}</td></tr>"
        )
    rule = fit.get("learned_rule")
    if rule:
        rows += (
            f"<tr><td>learned rule: recommends the action usual care took</td>"
            f"<td>{_percent(rule['records']['agreement'])}</td><td>{_percent(rule['simulated']['agreement'])}</td></tr>"
        )
        rows += "".join(
            f"<tr><td>learned rule: recommends {escape(a)}</td>"
            f"<td>{_percent(rule['records']['recommended_shares'][a])}</td>"
            f"<td>{_percent(rule['simulated']['recommended_shares'][a])}</td></tr>"
            for a in labels
        )
    head = "<tr><th scope='col'></th><th scope='col'>Records</th><th scope='col'>One simulated cohort</th></tr>"
    caption = "The look-alike world against the records: usual care's action shares, return, follow-up" + (
        ", and the rule the protocol's learner finds in each (fitted on all decisions)" if rule else ""
    )
    return f"<table><caption>{caption}</caption><thead>{head}</thead>{rows}</table>"


def _regret_sentence(regret) -> str:
    """The learned regime's regret against the reference rule, in words (empty without a learned regime)."""
    if not regret:
        return ""
    check = regret["reference_check"]
    mcse = "" if regret["regret_mcse"] is None else f" (Monte Carlo SE {_number(regret['regret_mcse'])})"
    share = regret["share_of_gain"]
    reached = (
        f"; the learned rules reached {_percent(share)} of the reference's gain over usual care "
        f"({_number(regret['reference_gain'])})"
        if share is not None
        else "; the reference does not improve on usual care in this world"
    )
    return (
        "<p>Regret of the learned regime: its true value fell short of the reference rule's (the protocol's learner "
        f"fitted on {regret['reference_episodes']:,} simulated episodes) by {_number(regret['mean_regret'])} on "
        f"average{mcse}, median {_number(regret['median_regret'])}, from {_number(regret['min_regret'])} to "
        f"{_number(regret['max_regret'])}, over {regret['cohorts']} cohorts{reached}; in "
        f"{_percent(regret['worse_than_usual_care'])} of the cohorts the learned rules were worse than usual care. "
        "The reference is a rule the protocol allows, so this regret is, up to Monte Carlo error, a lower bound on "
        "the regret against the best such rule: the price of the cohort's size. Fitted on "
        f"{check['episodes']:,} episodes instead, the reference's value is {_number(check['value'])} against "
        f"{_number(check['full_value'])} (close values say the reference has settled).</p>"
    )


def _rule_note(fit) -> str:
    """A sentence when the rule learned in a simulated cohort agrees with usual care much more or less often than
    the rule learned in the records (empty otherwise)."""
    rule = fit.get("learned_rule")
    if not rule or not rule["flagged"]:
        return ""
    return (
        f" The rule the protocol's learner finds in a simulated cohort recommends usual care's action at "
        f"{_percent(rule['simulated']['agreement'])} of decisions, against {_percent(rule['records']['agreement'])} in "
        "the records: the look-alike cohorts' overlap with their learned rules, and so their effective sample sizes "
        "and support verdicts, differ from the records', and the coverage above is for rules that act differently "
        "from the records' rule."
    )


def _failures(failed, cohorts) -> str:
    """The cohorts whose analysis failed (empty when none did)."""
    if not failed:
        return ""
    items = "".join(f"<li>cohort {f['cohort']} (seed {f['seed']}): {escape(f['error'])}</li>" for f in failed[:10])
    more = f"<li>… and {len(failed) - 10} more (selfcheck.json)</li>" if len(failed) > 10 else ""
    return (
        f"<p><strong>The analysis failed on {len(failed)} of {cohorts} look-alike cohorts</strong>; the figures above "
        "leave them out, which may flatter the pipeline. The same failure may happen on records like these:</p>"
        f"<ul>{items}{more}</ul>"
    )


def selfcheck_page(document: dict, protocol, cautions) -> str:
    """The page: cautions, the headline sentence, the performance table, the fit check and the settings."""
    s, summary, fit = document["settings"], document["summary"], document["fit_check"]
    headline = summary.get("headline") or {}
    names = {"usual_care": "Usual care", "learned": "Learned regime"}
    if headline.get("name"):
        names[headline["name"]] = headline["name"].replace("_", " ")
    est = summary["estimator"]
    uc = (summary.get("usual_care_value") or {}).get("all") or {}
    sentences = [
        f"On records like these, the pipeline's {100 * protocol.evaluation.interval_level:.0f}% intervals for usual "
        f"care's value ({escape(est)}) covered the truth in {_share_of(uc)} look-alike cohorts."
    ]
    h = (headline.get("all") or {}) if headline else {}
    if h:
        sentences.append(
            f"For the headline strategy ({escape(names[headline['name']])}), the interval of its difference from usual "
            f"care covered the truth in {_share_of(h)} cohorts, and excluded zero (detected a benefit; the mean true "
            f"difference was {_number(summary['mean_true_contrast'])}) in {_percent(h.get('power'))} of them."
        )
    regret = _regret_sentence(summary.get("regret"))
    failures = _failures(document.get("failed_cohorts", []), s["cohorts"])
    confounding = summary.get("confounding")
    if confounding:
        sentences.append(_confounding_sentence(confounding, protocol.evaluation.interval_level))
    hidden = (
        f"a hidden confounder of strength Γ = {confounding['gamma']:g} at the decisions the protocol's sensitivity "
        "analysis allows to be confounded (it tilts usual care's choice and shifts that decision's reward)"
        if confounding
        else "no hidden confounding"
    )
    flagged = fit["flagged"]
    listed = ", ".join(
        f"{escape(f['state'])} at decision point {f['step']} ({_number(f['smd'], 2)})" for f in flagged[:5]
    )
    drift = (
        f"{len(flagged)} state and decision-point pair(s) differ from the records by a standardised difference of at "
        f"least {fit['smd_flag']}: {listed}{', …' if len(flagged) > 5 else ''}"
        if flagged
        else f"every state at every decision point is below a standardised difference of {fit['smd_flag']} from the "
        f"records (largest {_number(fit['largest_smd'])})"
    )
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>Self-check: {escape(protocol.study.title)}</title><style>{report_stylesheet()}</style></head><body>",
        "<main>",
        f"<h1>Self-check on look-alike cohorts</h1><p>{escape(protocol.study.title)}</p>",
        "<section class='cautions'>" + "".join(f"<p>{escape(c)}</p>" for c in (document["caution"], *cautions)),
        "</section>",
        "<h2>What the self-check found</h2><p>" + " ".join(sentences) + "</p>",
        regret,
        failures,
        "<p>The look-alike world is only as good as its fitted models (plasmode simulation: Franklin, Schneeweiss, "
        "Polinski &amp; Rassen 2014): it keeps the records' first decisions and simulates the rest from regressions "
        "of each state, the reward and follow-up on the state and action, with usual care from the protocol's "
        f"usual-care model and {hidden}. Good coverage here says the estimators work when those models "
        "are right; it cannot show that they are. Truths are those of the rules learned in each simulated cohort "
        "(the cross-fitted target), computed on "
        f"{s['truth_episodes']:,} simulated episodes per policy with common random numbers. Monte Carlo standard "
        "errors follow Morris, White &amp; Crowther (2019, Stat Med 38:2074).</p>",
        _performance_table(summary, names),
        *_survival_part(summary, names),
        f"<h2>How well the world reproduces the records</h2><p>{drift[:1].upper() + drift[1:]}.{_rule_note(fit)}</p>",
        _fit_table(fit, protocol.action_labels),
        "<h2>Settings</h2><ul>",
        f"<li>{s['cohorts']} simulated cohorts of {s['episodes_per_cohort']:,} episodes each "
        f"({s['cohorts_completed']} completed their analysis)</li>",
        f"<li>{s['replicates']} bootstrap replicates per cohort (the analysis itself uses "
        f"{s['analysis_replicates']})</li>",
        f"<li>{s['truth_episodes']:,} simulated episodes per policy for each cohort's truths; the reference rule "
        f"learned from {s['reference_episodes']:,}</li>",
        f"<li>root seed {s['seed']}; {escape(s['seed_stream'])}</li></ul>",
        "</main></body></html>",
    ]
    return "\n".join(parts) + "\n"
