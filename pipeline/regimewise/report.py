"""The report stage: one self-contained report.html, summary.json and the provenance appendix.

The report opens with the cautions, then the protocol, the validation counts, the usual-care model, the
learned regime in words, the value table and the provenance. Figures are inline SVG (no external assets)
drawn without timestamps so identical inputs give identical bytes. Counts from 1 to
``report.min_cell_count - 1`` are shown as ``<min_cell_count``.
"""

from __future__ import annotations

import io as _io
from importlib import resources

import jinja2
import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from .bootstrap import merge_intervals  # noqa: E402
from .evaluate import headline_estimator  # noqa: E402
from .describe import section_figures, usual_care_summary  # noqa: E402
from .io import read_json, write_json, write_text  # noqa: E402
from .protocol import load_protocol  # noqa: E402
from .provenance import provenance as build_provenance  # noqa: E402

CAUTIONS = (
    "Research use only. This report describes a statistical analysis of historical records; it is not medical "
    "advice and must not be used to treat any patient.",
    "Any strategy shown here is a hypothesis to be studied, not a recommendation. Treatment decisions stay with "
    "licensed clinicians, who know the patient, and follow local law, regulations and ethics approval.",
    "The estimates assume that every reason clinicians had for their choices is recorded in the data (no "
    "unmeasured confounding), that usual care gave every compared action a real chance, and that the models "
    "are adequate. None of these can be proven from the records alone.",
)

SUMMARY_SCHEMA_VERSION = "1"


def report_stage(protocol, validation, behaviour, regime, values, html, summary, provenance, intervals=None,
                 cohort=None, sensitivity=None, sweep=None):
    """Assemble summary.json, the provenance appendix and report.html from the stage outputs."""
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
    }
    prov = build_provenance(pf)
    headline = build_summary(p, parts, prov)
    write_json(provenance, prov)
    write_json(summary, headline)
    write_text(html, render_html(p, parts, prov, headline))


# ---------------------------------------------------------------------------------------------- summary.json
def build_summary(p, parts, prov) -> dict:
    """Every headline number, keyed as documented in the README (section 'summary.json')."""
    values = parts["values"]
    return {
        "schema_version": SUMMARY_SCHEMA_VERSION,
        "study": {"title": p.study.title, "version": p.study.version, "run_name": p.study.run_name},
        "caution": CAUTIONS[0],
        "cohort": {
            "episodes": parts["validation"]["episodes"],
            "patients": parts["validation"]["patients"],
            "decisions": parts["validation"]["rows_kept"],
        },
        "validation": {
            "rows_read": parts["validation"]["rows_read"],
            "decisions_dropped_missing": parts["validation"].get("rows_dropped_missing", 0),
            "episodes_dropped_missing": parts["validation"].get("episodes_dropped_missing", 0),
            "values_filled_missing": sum(m.get("filled", 0) for m in parts["validation"].get("missing_data", {}).values()),
            "acknowledged_columns": [a["column"] for a in parts["validation"].get("acknowledged_columns", [])],
        },
        "usual_care_model": {
            "auc": parts["behaviour"]["auc"],
            "converged": parts["behaviour"]["model"]["converged"],
            "inverse_probability_weights": parts["behaviour"]["inverse_probability_weights"],
            **usual_care_summary(parts["behaviour"], parts.get("cohort")),
        },
        "regime": {
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
        "headline": headline_sentence(p, values),
        "sensitivity": sensitivity_headlines(parts.get("sensitivity")),
        "sweep": sweep_headlines(parts.get("sweep")),
        "protocol_sha256": prov["protocol"]["sha256"],
        "inputs_sha256": {k: v["sha256"] for k, v in prov["inputs"].items()},
        "root_seed": prov["root_seed"],
    }


def sensitivity_headlines(sensitivity: dict | None) -> dict | None:
    """Γ*, the bounds table, E-values and the plain sentence (the full Γ curve stays in sensitivity.json)."""
    if sensitivity is None:
        return None
    keys = ("estimator", "ess", "low_ess", "confounded_decisions", "tipping_point", "gamma_max", "precision",
            "table", "e_values", "sentence")  # fmt: skip
    return {key: sensitivity[key] for key in keys}


def sensitivity_figure(sensitivity: dict) -> str:
    """Bounds of the learned-minus-usual-care difference and their bootstrap interval against Γ."""
    _style()
    # undefined limits (null in JSON) become gaps in the plot
    curve = {key: [float("nan") if v is None else v for v in values] for key, values in sensitivity["curve"].items()}
    fig, ax = plt.subplots(figsize=(6.5, 3.2))
    ax.fill_between(curve["gamma"], curve["interval_low"], curve["interval_high"], color="C0", alpha=0.2,
                    label=f"{100 * sensitivity['level']:.0f}% bootstrap interval of the bounds")  # fmt: skip
    ax.plot(curve["gamma"], curve["contrast_lower"], color="C0", label="bounds of the difference")
    ax.plot(curve["gamma"], curve["contrast_upper"], color="C0")
    ax.axhline(0.0, color="black", linewidth=0.8)
    if sensitivity["tipping_point"] is not None:
        ax.axvline(sensitivity["tipping_point"], color="C3", linestyle="--", label="tipping point Γ*")
    ax.set_xlabel("confounding strength Γ (odds-ratio bound)")
    ax.set_ylabel("learned − usual care")
    ax.legend(frameon=False, fontsize=8, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return _svg(fig)


def sweep_headlines(sweep: dict | None) -> dict | None:
    """The specification sweep's sorted table (without the per-Γ bounds, which stay in sweep.json)."""
    if sweep is None:
        return None
    keys = ("estimator", "level", "replicates", "gammas", "gamma_max", "axes", "prespecified", "prespecified_in_grid",
            "n_specifications", "intervals_above_zero", "intervals_above_zero_low_ess", "sentence")  # fmt: skip
    row_keys = ("id", "prespecified", "settings", "difference", "low", "high", "ess", "low_ess", "tipping_point")
    return {**{key: sweep[key] for key in keys},
            "specifications": [{key: row[key] for key in row_keys} for row in sweep["specifications"]]}  # fmt: skip


def sweep_figure(sweep: dict) -> str:
    """Sorted interval plot: each specification's learned-minus-usual-care difference with its bootstrap interval.

    Lowest estimate at the bottom; the pre-specified analysis in red with a diamond; hollow markers and dashed
    grey intervals: effective sample too small to be trusted. Specifications with an undefined estimate are left out.
    """
    _style()
    rows = [r for r in sweep["specifications"] if r["difference"] is not None]
    fig, ax = plt.subplots(figsize=(6.5, 0.26 * max(len(rows), 1) + 1.2))
    for y, r in enumerate(rows):
        color = "C3" if r["prespecified"] else ("0.6" if r["low_ess"] else "C0")
        if r["low"] is not None:
            ax.hlines(y, r["low"], r["high"], color=color, linewidth=1.2,
                      linestyles="dashed" if r["low_ess"] else "solid")  # fmt: skip
        ax.plot([r["difference"]], [y], "D" if r["prespecified"] else "o", color=color,
                markerfacecolor="none" if r["low_ess"] else color)  # fmt: skip
    ax.axvline(0.0, color="black", linewidth=0.8)
    ax.set_yticks(range(len(rows)), [r["id"] + (" (pre-specified)" if r["prespecified"] else "") for r in rows])
    ax.set_xlabel(f"learned − usual care ({sweep['estimator']}) with {100 * sweep['level']:.0f}% bootstrap interval")
    return _svg(fig)


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


def headline_sentence(p, values) -> str:
    """One plain sentence on the learned-minus-usual-care contrast by the preferred estimator (wdr if run)."""
    contrasts = {c["estimator"]: c for c in values["contrasts"]}
    name = headline_estimator(p)
    contrast = contrasts[name]
    ess = values["regimes"][0]["estimates"][name]["ess"]
    if contrast["difference"] is None:
        return (
            f"The {name} estimate of the learned regime's value is undefined: no episode in the records follows it "
            "far enough for the weights to say anything."
        )
    direction = "higher" if contrast["difference"] > 0 else "lower"
    sentence = (
        f"By {name}, the learned regime's expected total reward per episode is {abs(contrast['difference']):.2f} "
        f"{direction} than usual care's{_interval_clause(contrast, values.get('bootstrap'))}, resting on an "
        f"effective sample of {ess:.1f} episodes"
    )
    if contrast["low_ess"]:
        return sentence + (
            f", below the {values['minimum_reliable_ess']:.0f} needed to trust it: the data cannot confirm this "
            "difference; a higher support threshold keeps the regime closer to usual care and better supported."
        )
    return sentence + "."


def _interval_clause(contrast, bootstrap) -> str:
    """' (95% interval −1.20 to 3.40 for learned minus usual care; it includes no difference)' or ''."""
    if contrast.get("low") is None or not bootstrap:
        return ""
    low, high = contrast["low"], contrast["high"]
    covers = " — it includes no difference" if low <= 0 <= high else ""
    return f" ({100 * bootstrap['level']:.0f}% bootstrap interval for the difference {low:.2f} to {high:.2f}{covers})"


# ---------------------------------------------------------------------------------------------- figures
def _svg(fig) -> str:
    buffer = _io.StringIO()
    fig.savefig(buffer, format="svg", metadata={"Date": None}, bbox_inches="tight")
    plt.close(fig)
    text = buffer.getvalue()
    return text[text.index("<svg") :]


def _style():
    plt.rcParams.update(
        {"svg.hashsalt": "regimewise", "svg.fonttype": "none", "font.size": 9, "axes.spines.top": False,
         "axes.spines.right": False}
    )  # fmt: skip


def actions_by_step_figure(labels, by_step) -> str:
    """Share of each action recommended (learned regime) and taken (usual care) at each decision point."""
    _style()
    steps = sorted(by_step, key=int)
    fig, axes = plt.subplots(1, 2, figsize=(8.5, 3.0), sharey=True)
    for ax, key, title in zip(axes, ("taken", "recommended"), ("Usual care (taken)", "Learned regime (recommended)")):
        bottom = [0.0] * len(steps)
        for label in labels:
            share = [by_step[s][key][label] / by_step[s]["decisions"] for s in steps]
            ax.bar([int(s) for s in steps], share, bottom=bottom, label=label, edgecolor="white", linewidth=0.5)
            bottom = [b + v for b, v in zip(bottom, share)]
        ax.set_title(title)
        ax.set_xlabel("decision point")
    axes[0].set_ylabel("share of decisions")
    axes[1].legend(loc="center left", bbox_to_anchor=(1.0, 0.5), frameon=False)
    return _svg(fig)


def value_figure(regimes, estimators) -> str:
    """Forest plot: each regime's value by each estimator with its bootstrap interval.

    Hollow markers and dashed grey intervals: effective sample too small to be trusted.
    """
    _style()
    fig, ax = plt.subplots(figsize=(7.0, 0.32 * len(regimes) * len(estimators) + 1.2))
    markers = {"is": "v", "wis": "^", "pdis": "<", "pdwis": "o", "dr": ">", "wdr": "s", "fqe": "D"}
    for j, est in enumerate(estimators):
        labelled = False
        for i, r in enumerate(regimes):
            e = r["estimates"].get(est)
            if e is None or e["value"] is None:
                continue
            y = len(regimes) - 1 - i + (j - (len(estimators) - 1) / 2) * (0.8 / len(estimators))
            color = "0.6" if e["low_ess"] else f"C{j}"
            if e.get("low") is not None:
                ax.hlines(y, e["low"], e["high"], color=color, linewidth=1.2,
                          linestyles="dashed" if e["low_ess"] else "solid")  # fmt: skip
            ax.plot([e["value"]], [y], markers.get(est, "o"), color=f"C{j}",
                    markerfacecolor="none" if e["low_ess"] else f"C{j}", label=None if labelled else est)  # fmt: skip
            labelled = True
    ax.set_yticks(range(len(regimes)), [r["label"] for r in reversed(regimes)])
    ax.set_xlabel("estimated value (expected total reward per episode)")
    ax.legend(frameon=False, loc="center left", bbox_to_anchor=(1.0, 0.5))
    return _svg(fig)


def weight_histogram_figure(histograms) -> str:
    """Histogram of log10 cumulative importance weights of the learned regime at each decision point."""
    _style()
    by_step = histograms["by_step"]
    edges = histograms["log10_edges"]
    columns = min(4, len(by_step))
    rows = -(-len(by_step) // columns)
    fig, axes = plt.subplots(rows, columns, figsize=(2.2 * columns, 1.7 * rows), sharex=True, squeeze=False)
    for ax in axes.flat[len(by_step) :]:
        ax.set_visible(False)
    for ax, h in zip(axes.flat, by_step):
        ax.bar(edges[:-1], h["counts"], width=[b - a for a, b in zip(edges[:-1], edges[1:])], align="edge",
               color="C0", edgecolor="white", linewidth=0.4)  # fmt: skip
        ax.set_title(f"decision {h['step']}: {h['zero']:,} at 0", fontsize=8)
    for ax in axes[-1]:
        ax.set_xlabel("log10 weight")
    return _svg(fig)


# ---------------------------------------------------------------------------------------------- html
def cell_count(n, threshold):
    """Small-cell rule: counts 1..threshold-1 are shown as '<threshold' (common practice, no source)."""
    if n is None:
        return "—"
    n = int(n)
    return f"<{threshold}" if 0 < n < threshold else f"{n:,}"


def _number(x, digits=3):
    return "—" if x is None else f"{x:,.{digits}f}"


def render_html(p, parts, prov, headline) -> str:
    environment = jinja2.Environment(
        loader=jinja2.FunctionLoader(lambda name: resources.files("regimewise").joinpath("templates", name).read_text()),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    environment.filters["cell"] = lambda n: cell_count(n, p.report.min_cell_count)
    environment.filters["num"] = _number
    environment.filters["pct"] = lambda x: "—" if x is None else f"{100 * x:.1f}%"
    template = environment.get_template("report.html")
    regime = parts["regime"]
    return template.render(
        p=p,
        cautions=CAUTIONS,
        validation=parts["validation"],
        behaviour=parts["behaviour"],
        regime=regime,
        values=parts["values"],
        prov=prov,
        summary=headline,
        actions_figure=actions_by_step_figure(p.action_labels, regime["by_step"]),
        value_figure=value_figure(parts["values"]["regimes"], p.evaluation.estimators),
        weight_figure=weight_histogram_figure(parts["values"]["learned_weight_histograms"]),
        cohort=parts.get("cohort"),
        usual_care_figures=section_figures(p, parts["behaviour"], parts.get("cohort")),
        sensitivity=parts.get("sensitivity"),
        sensitivity_figure=None if parts.get("sensitivity") is None else sensitivity_figure(parts["sensitivity"]),
        sweep=parts.get("sweep"),
        sweep_figure=None if parts.get("sweep") is None else sweep_figure(parts["sweep"]),
    )
