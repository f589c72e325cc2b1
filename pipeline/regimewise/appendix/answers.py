"""What the tool can answer for each checklist item, drawn from summary.json and the validated protocol.

Each answer names the report section that shows it (an ``id`` in the report's templates) and the run's files
that hold the numbers. An item without an answer here is for the authors to complete (ethics, registration,
funding, conflicts, data access, the abstract and the discussion). An answer with ``authors_add`` is partial:
the tool states what it knows and says what the authors must add.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from regimewise.estimators import ESTIMATORS


@dataclass(frozen=True)
class Run:
    """The inputs of a checklist: summary.json, the protocol, the run's files and the report sections rendered."""

    summary: dict
    protocol: object
    files: frozenset[str]
    sections: frozenset[str]


@dataclass(frozen=True)
class Answer:
    text: str
    section: str
    files: tuple[str, ...] = ()
    authors_add: str | None = None


Registry = dict[tuple[str, str], Callable[[Run], "Answer | None"]]


def registrar(registry: Registry):
    """A decorator ``@answers(key, *numbers)`` that records a function as the answer to those items."""

    def answers(key: str, *numbers: str):
        def register(function):
            for number in numbers:
                registry[key, number] = function
            return function

        return register

    return answers


METHODS: Registry = {}
answers = registrar(METHODS)


def report_sections(summary: dict) -> frozenset[str]:
    """Ids of the report sections rendered for this summary (the report omits the optional ones it lacks)."""
    always = {"summary-panel", "glossary", "section-reading", "section-protocol", "section-validation"}
    always |= {"section-usual-care", "section-values", "section-provenance"}
    always.add("section-regime" if summary["regime"] is not None else "section-compared")
    optional = {
        "section-cohort": "overlap_rule" in summary["usual_care_model"],
        "section-strategies": summary["strategies"] is not None,
        "section-sensitivity": summary["sensitivity"] is not None,
        "section-sweep": summary["sweep"] is not None,
        "section-survival": summary["survival"] is not None,
    }
    return frozenset(always | {section for section, shown in optional.items() if shown})


# ---------------------------------------------------------------------------------------------- words
def fmt(x, digits: int = 2) -> str:
    """A number as the report shows it; a suppressed count ("<11") as written; a missing one as "not available"."""
    if x is None:
        return "not available"
    if isinstance(x, str):
        return x
    if isinstance(x, int) and not isinstance(x, bool):
        return f"{x:,}"
    return f"{x:,.{digits}f}"


def share(x) -> str:
    return "not available" if x is None else f"{100 * x:.0f}%"


def words(name: str) -> str:
    return str(name).replace("_", " ")


def _states(p) -> str:
    return "; ".join(f"{s.label} ({s.unit})" if s.unit else s.label for s in p.states)


def counts(s) -> str:
    """Records read, kept and dropped, as the validation section shows them."""
    c, v = s["cohort"], s["validation"]
    return (
        f"{fmt(v['rows_read'])} decision rows read; {fmt(c['decisions'])} decisions of {fmt(c['episodes'])} "
        f"episodes ({fmt(c['patients'])} patients) kept; {fmt(v['decisions_dropped_missing'])} decisions and "
        f"{fmt(v['episodes_dropped_missing'])} episodes dropped, {fmt(v['values_filled_missing'])} values filled, "
        "for missing values"
    )


def _missing_policies(p) -> str:
    declared = "; ".join(f"{name}: {words(policy)}" for name, policy in sorted(p.data.missing.items()))
    return f"missing values by state ({declared}; any other state: refused)" if declared else "missing values refused"


# ---------------------------------------------------------------------------------------------- TARGET
@answers("target", "1c")
def _abstract_findings(run):
    return Answer(
        f"Headline result: {run.summary['headline']['sentence']}",
        "summary-panel",
        ("report/summary.json",),
        authors_add="the key assumptions, methods and conclusions, in the abstract's own words",
    )


@answers("target", "3")
def _question(run):
    return Answer(f"The protocol's question: {run.protocol.study.question}", "section-protocol")


def _provenance(run, authors_add: str) -> Answer:
    s = run.summary
    kept = sorted(f for f in run.files if f.startswith(("report/appendix/", "appendix/")))
    listed = "; the run's appendix holds " + ", ".join(kept) if kept else ""
    text = (
        f"The protocol and the {len(s['inputs_sha256'])} input files are identified by SHA-256, with the package "
        f"versions and the root seed {s['root_seed']}, so the analysis can be repeated{listed}"
    )
    return Answer(text, "section-provenance", authors_add=authors_add)


@answers("target", "5")
def _sources(run):
    return _provenance(run, "each data source's original purpose, type, places, setting and period, and any linkage")


@answers("target", "19")
@answers("record", "22.1")
def _access(run):
    return _provenance(run, "where the data, the code and the protocol can be obtained, and on what terms")


@answers("target", "6b")
def _strategies(run):
    s, p = run.summary, run.protocol
    compared = ", ".join(words(name) for name in s["values"])
    headline = s["headline"]
    chosen = "pre-specified in the protocol" if headline["prespecified"] else "the learned regime"
    return Answer(
        f"Strategies compared, each over up to {p.horizon} decision points with the actions "
        f"{', '.join(words(a) for a in p.action_labels)}: {compared}. Headline: {headline['label']} ({chosen}).",
        "section-values",
        ("evaluate/values.json", "regime/regime.json"),
    )


@answers("target", "6d")
def _follow_up(run):
    p = run.protocol
    text = f"Follow-up starts at each episode's first decision point (time zero) and covers up to {p.horizon} of them"
    if p.survival is not None:
        text += f"; survival is followed from the index date to day {p.survival.horizon_days:g}"
    return Answer(text, "section-protocol")


@answers("target", "6e")
def _outcomes(run):
    p = run.protocol
    text = f"The reward after each decision, summed over the episode (discount {p.discount:g}): {p.reward.description}"
    if p.survival is not None:
        text += f"; and the time to the event, to day {p.survival.horizon_days:g}"
    return Answer(text, "section-protocol")


@answers("target", "6f", "7f")
def _contrasts(run):
    s, p = run.summary, run.protocol
    text = (
        "Difference in expected total reward per episode, each strategy minus usual care, had every decision "
        f"followed the strategy; estimators {', '.join(p.evaluation.estimators)}; the headline contrast is "
        f"{s['headline']['label']} minus usual care by {s['headline']['estimator']}"
    )
    if s["survival"] is not None:
        days = ", ".join(f"{t:g}" for t in s["survival"]["times"])
        text += f"; survival: risk difference and restricted-mean-survival difference at day {days}"
    return Answer(text, "section-values", ("evaluate/values.json", "bootstrap/intervals.json"))


@answers("target", "6g", "7g(i)")
def _assumptions(run):
    s, p = run.summary, run.protocol
    positivity = (
        "the learned regime recommends only actions usual care took with probability at least "
        f"{p.constraints.support_threshold:g} in that state, and"
        if s["regime"] is not None
        else "no regime is learned;"
    )
    text = (
        f"At every decision, no unmeasured confounding given the {len(p.states)} recorded states (cannot be checked "
        f"from the records); positivity: {positivity} a strategy the records cannot support is "
        "reported as not identified; consistency; the declared states carry what the next decision needs"
    )
    if s["sensitivity"] is not None:
        return Answer(text + "; hidden confounding is explored in the sensitivity analysis", "section-sensitivity")
    return Answer(text, "glossary")


@answers("target", "6h")
def _analysis_plan(run):
    p, e = run.protocol, run.protocol.evaluation
    return Answer(
        f"Usual-care model: {words(p.behaviour_model.kind)}"
        f"{' mixed with an even floor' if p.behaviour_model.floor_mixture else ''}; "
        f"regime: {words(p.q_model.kind)} Q-model "
        f"({p.q_model.basis} basis), pessimism {p.constraints.pessimism:g}; estimators {', '.join(e.estimators)}; "
        f"{e.replicates} patient-bootstrap replicates, {share(e.interval_level)} {e.interval_method} intervals; "
        f"{_missing_policies(p)}",
        "section-protocol",
    )


@answers("target", "7a")
def _eligibility_emulated(run):
    return Answer(
        f"Every episode of the records that passed validation: {counts(run.summary)}",
        "section-validation",
        ("validate/validation.json",),
        authors_add="how the records were drawn from the source data (the eligibility criteria applied before)",
    )


@answers("target", "7b")
def _strategies_emulated(run):
    s, p = run.summary, run.protocol
    if s["regime"] is None:
        return Answer(
            "A record follows a strategy at a decision when the action taken is the strategy's. No regime was learned "
            "(analysis.learn_regime: false): the strategies are the fixed rules and comparators the protocol names, "
            "checked against its clinical rules when it is read",
            "section-compared",
            ("regime/regime.json",),
        )
    return Answer(
        "A record follows a strategy at a decision when the action taken is the strategy's. The learned regime "
        f"recommends only actions that the {len(p.constraints.clinical_rules)} clinical rules allow and usual care "
        f"took with probability at least {s['regime']['support_threshold']:g}; it differs from the action taken at "
        f"{share(s['regime']['share_differs_from_taken'])} of decisions",
        "section-regime",
        ("regime/recommendations.parquet", "regime/regime.json"),
    )


@answers("target", "7c")
def _assignment_emulated(run):
    s, m = run.summary, run.summary["usual_care_model"]
    families = {ESTIMATORS[name].family for name in run.protocol.evaluation.estimators}
    means = []
    if families & {"weights", "both"}:
        means.append("inverse-probability weights of the actions taken, from the usual-care model")
    if families & {"model", "both"}:
        means.append("outcome models of the recorded states")
    text = (
        f"No randomisation: confounding by the recorded states is adjusted for by {' and by '.join(means)} "
        f"(usual-care model {words(m['kind'])}, AUC {fmt(m['auc'])})"
    )
    if s["survival"] is not None:
        text += "; for survival, every episode is cloned into every strategy at time zero (clone-censor-weight)"
    return Answer(text, "section-usual-care", ("behaviour/behaviour.json",))


@answers("target", "7d")
def _follow_up_emulated(run):
    p = run.protocol
    text = f"From each episode's first recorded decision to its last (at most {p.horizon})"
    if run.summary["survival"] is None:
        return Answer(text, "section-protocol")
    sv = p.survival
    dropout = "weighted for" if sv.dropout_model else "assumed unrelated to the outcome in"
    text += (
        f"; survival from the index date to the event or censoring, ending at day {sv.horizon_days:g}; a copy is "
        f"censored at its first deviation after a grace of {sv.grace} decision point(s); loss to follow-up is "
        f"{dropout} the analysis"
    )
    return Answer(text, "section-survival", ("survival/survival.json",))


@answers("target", "7e")
def _outcomes_emulated(run):
    columns = run.protocol.data.columns
    text = f"The reward column '{columns.reward}' of the decisions table"
    if run.protocol.survival is not None:
        text += f"; the follow-up '{columns.followup}' and event '{columns.event}' columns of the episodes table"
    return Answer(
        text, "section-protocol", authors_add="how the reward and the event were derived from the source records"
    )


@answers("target", "7g(ii)")
@answers("record", "7.1")
def _variables(run):
    p = run.protocol
    return Answer(
        f"The {len(p.states)} state variables as declared: {_states(p)}; actions: "
        f"{', '.join(words(a) for a in p.action_labels)}",
        "section-protocol",
        authors_add="the codes and algorithms that derived them from the source records",
    )


@answers("target", "7h(i)")
def _analysis_done(run):
    s, p = run.summary, run.protocol
    m, boot = s["usual_care_model"], s["bootstrap"]
    text = f"Usual-care model {words(m['kind'])} over {m['folds']} fold(s); "
    if s["regime"] is None:
        text += "no regime learned (analysis.learn_regime: false): the named strategies evaluated"
    else:
        folds = (s["regime"]["cross_fit"] or {}).get("folds") or 1
        text += "the learned regime evaluated " + (
            f"cross-fitted over {folds} folds" if folds > 1 else "on the records it was learned from"
        )
    if boot is None:
        text += "; no bootstrap replicates (estimates without intervals)"
    else:
        held = "" if s["regime"] is None else f", the learned regime {p.evaluation.bootstrap_regime} in each"
        text += (
            f"; {boot['replicates_used']} of {boot['replicates']} bootstrap replicates used, {boot['method']} "
            f"intervals at {share(boot['level'])}{held}"
        )
    return Answer(text + f"; {_missing_policies(p)}", "section-values", ("bootstrap/intervals.json",))


@answers("target", "7h(ii)")
def _sensitivity_methods(run):
    s = run.summary
    if s["sensitivity"] is None:
        return None
    sens = s["sensitivity"]
    text = (
        f"Marginal sensitivity model for hidden confounding, Γ up to {fmt(sens['gamma_max'], 1)}, bounds on the "
        f"{sens['estimator']} value"
    )
    if s["sweep"] is not None:
        text += f"; specification sweep over {', '.join(map(words, s['sweep'].get('axes', [])))}"
    return Answer(text, "section-sensitivity", ("sensitivity/sensitivity.json", "sweep/sweep.json"))
