"""report.html: one self-contained page rendered from the stage outputs with the templates in ``templates/``.

The report opens with the cautions, then the protocol, the validation counts, the usual-care model, the
learned regime in words (or, when the protocol learns none, the named strategies it compares), the value table and
the provenance. Figures are inline SVG (no external assets).
Counts from 1 to ``report.min_cell_count - 1`` are shown as ``<min_cell_count``.
"""

from __future__ import annotations

import re
from importlib import resources

import jinja2

from regimewise.cautions import REPORT_CAUTIONS
from regimewise.estimators import ESTIMATORS
from regimewise.report.figures import (
    SPARSE_BIN,
    actions_by_step_figure,
    contrast_figure,
    drawn_contrasts,
    section_figures,
    sensitivity_figure,
    survival_figure,
    sweep_figure,
    tradeoff_figure,
    weight_histogram_figure,
)


# ---------------------------------------------------------------------------------------------- html
def cell_count(n, threshold):
    """Small-cell rule: counts 1..threshold-1 are shown as '<threshold' (common practice, no source)."""
    if n is None:
        return "—"
    if isinstance(n, str):  # already suppressed in summary.json
        return n
    n = int(n)
    return f"<{threshold}" if 0 < n < threshold else f"{n:,}"


def _number(x, digits=3):
    return "—" if x is None else f"{x:,.{digits}f}"


def report_stylesheet() -> str:
    """The report's stylesheet (``templates/report.css``), shared by every HTML page a run writes."""
    return resources.files("regimewise.report").joinpath("templates", "report.css").read_text(encoding="utf-8")


def template_environment(p) -> jinja2.Environment:
    """The report's templates with their filters (cell counts, numbers, percentages, identifiers as words)."""
    environment = jinja2.Environment(
        loader=jinja2.FunctionLoader(
            lambda name: resources.files("regimewise.report").joinpath("templates", name).read_text()
        ),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    environment.filters["cell"] = lambda n: cell_count(n, p.report.min_cell_count)
    environment.filters["words"] = lambda identifier: str(identifier).replace("_", " ")
    environment.filters["num"] = _number
    environment.filters["pct"] = lambda x: "—" if x is None else f"{100 * x:.1f}%"
    environment.filters["uncited"] = lambda words: re.sub(r" \([^()]*\d{4}\)$", "", words)  # drop "(Author 2016)"
    environment.filters["points"] = lambda x: "—" if x is None else f"{100 * x:,.1f}"  # percentage points
    return environment


def render_html(p, parts, prov, headline) -> str:
    environment = template_environment(p)
    template = environment.get_template("report.html")
    regime = parts["regime"]
    return template.render(
        p=p,
        cautions=REPORT_CAUTIONS,
        validation=parts["validation"],
        behaviour=parts["behaviour"],
        regime=regime,
        values=parts["values"],
        prov=prov,
        summary=headline,
        actions_figure=actions_by_step_figure(p.action_labels, regime["by_step"]) if "by_step" in regime else None,
        value_figure=contrast_figure(parts["values"], p.evaluation.estimators),
        unplotted=unplotted(parts["values"], p.evaluation.estimators),
        tradeoff_figure=None if headline["strategies"] is None else tradeoff_figure(headline["strategies"]["table"]),
        weight_figure=weight_histogram_figure(parts["values"]["learned_weight_histograms"])
        if "learned_weight_histograms" in parts["values"]
        else None,
        cohort=parts.get("cohort"),
        usual_care_figures=section_figures(p, parts["behaviour"], parts.get("cohort")),
        sensitivity=parts.get("sensitivity"),
        sensitivity_figure=None if parts.get("sensitivity") is None else sensitivity_figure(parts["sensitivity"]),
        sweep=parts.get("sweep"),
        selfcheck=parts.get("selfcheck"),
        sweep_figure=None if parts.get("sweep") is None else sweep_figure(parts["sweep"]),
        survival=parts.get("survival"),
        sparse_bin=SPARSE_BIN,
        estimators=ESTIMATORS,
        survival_figure=None
        if parts.get("survival") is None
        else survival_figure(parts["survival"], p.report.min_cell_count),
    )


def unplotted(values: dict, estimators) -> list[str]:
    """Labels of the regimes the forest plot does not draw (no identified contrast with usual care by any estimator)."""
    labels = {r["name"]: r["label"] for r in values["regimes"]}
    kept = {c["regime"] for c in drawn_contrasts(values, estimators)}
    return [label for name, label in labels.items() if name != "usual_care" and name not in kept]
