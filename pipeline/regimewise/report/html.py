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
from regimewise.core.concurrency import run_in_processes
from regimewise.estimators import ESTIMATORS
from regimewise.report.figures import (
    SPARSE_BIN,
    actions_by_step_figure,
    contrast_figure,
    drawn_contrasts,
    section_figure_tasks,
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


def render_html(p, parts, prov, headline, processes: int = 1) -> str:
    """The report page. Its figures are drawn in up to ``processes`` processes at once (the same SVG text: each
    figure is drawn from the same numbers by the same code, :func:`regimewise.core.concurrency.run_in_processes`)."""
    environment = template_environment(p)
    template = environment.get_template("report.html")
    regime = parts["regime"]
    values = parts["values"]
    section = section_figure_tasks(p, parts["behaviour"], parts.get("cohort"))
    # the longest to draw first (at 1M episodes x 12: balance, weights, overlap and reliability about 2 to 4 s
    # each, the others about 1 s), so that the last figure drawn is a short one
    drawn = {
        "balance": section["balance"],
        "weight_figure": None
        if "learned_weight_histograms" not in values
        else lambda: weight_histogram_figure(values["learned_weight_histograms"]),
        "overlap": section["overlap"],
        "reliability": section["reliability"],
        "survival_figure": None
        if parts.get("survival") is None
        else lambda: survival_figure(parts["survival"], p.report.min_cell_count),
        "value_figure": lambda: contrast_figure(values, p.evaluation.estimators),
        "actions_figure": None
        if "by_step" not in regime
        else lambda: actions_by_step_figure(p.action_labels, regime["by_step"]),
        "tradeoff_figure": None
        if headline["strategies"] is None
        else lambda: tradeoff_figure(headline["strategies"]["table"]),
        "sensitivity_figure": None
        if parts.get("sensitivity") is None
        else lambda: sensitivity_figure(parts["sensitivity"]),
        "sweep_figure": None if parts.get("sweep") is None else lambda: sweep_figure(parts["sweep"]),
    }
    tasks = {name: draw for name, draw in drawn.items() if draw is not None}
    figures = dict.fromkeys(drawn) | dict(zip(tasks, run_in_processes(list(tasks.values()), processes)))
    return template.render(
        p=p,
        cautions=REPORT_CAUTIONS,
        validation=parts["validation"],
        behaviour=parts["behaviour"],
        regime=regime,
        values=values,
        prov=prov,
        summary=headline,
        actions_figure=figures["actions_figure"],
        value_figure=figures["value_figure"],
        unplotted=unplotted(values, p.evaluation.estimators),
        tradeoff_figure=figures["tradeoff_figure"],
        weight_figure=figures["weight_figure"],
        cohort=parts.get("cohort"),
        usual_care_figures={name: figures[name] for name in section},
        sensitivity=parts.get("sensitivity"),
        sensitivity_figure=figures["sensitivity_figure"],
        sweep=parts.get("sweep"),
        selfcheck=parts.get("selfcheck"),
        sweep_figure=figures["sweep_figure"],
        survival=parts.get("survival"),
        sparse_bin=SPARSE_BIN,
        estimators=ESTIMATORS,
        survival_figure=figures["survival_figure"],
    )


def unplotted(values: dict, estimators) -> list[str]:
    """Labels of the regimes the forest plot does not draw (no identified contrast with usual care by any estimator)."""
    labels = {r["name"]: r["label"] for r in values["regimes"]}
    kept = {c["regime"] for c in drawn_contrasts(values, estimators)}
    return [label for name, label in labels.items() if name != "usual_care" and name not in kept]
