"""Every figure of the report, as inline SVG without timestamps (identical inputs give identical bytes).

The figures read the stage outputs (JSON-ready dicts) only; no statistics are computed here.
"""

from __future__ import annotations

import html
import io

import matplotlib
import numpy as np
from cycler import cycler

from regimewise.estimators import ESTIMATORS

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from regimewise.core.features import dummy_name
from regimewise.describe.balance import SMD_FLAG
from regimewise.evaluation.values import named_strategy_label
from regimewise.usual_care.diagnostics import CRUMP_CUT

# Okabe & Ito (2008), "Color universal design": distinguishable under the common colour-vision deficiencies.
OKABE_ITO = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442", "#000000")
# A reliability bin with fewer decisions than this is drawn hollow: its observed share is too noisy to read.
SPARSE_BIN = 20


# ---------------------------------------------------------------------------------------------- figures
def panel_grid(n_panels):
    apply_style()
    cols = min(4, n_panels)
    rows = int(np.ceil(n_panels / cols))
    fig, axes = plt.subplots(
        rows, cols, figsize=(1.6 * cols + 0.6, 1.6 * rows + 0.5), sharex=True, sharey=True, squeeze=False
    )
    for ax in axes.flat[n_panels:]:
        ax.set_visible(False)
    return fig, axes.flat


def reliability_figure(by_step, labels) -> str:
    """Reliability curves (observed frequency against mean predicted probability), one panel per step."""

    steps = sorted(by_step, key=int)
    fig, axes = panel_grid(len(steps))
    for ax, step in zip(axes, steps):
        ax.plot([0, 1], [0, 1], color="0.7", linewidth=0.8)
        for k, label in enumerate(labels):
            curve = by_step[step]["reliability"][label]
            x, y, n = (
                curve["mean_predicted"],
                curve["observed"],
                curve.get("count", [SPARSE_BIN] * len(curve["observed"])),
            )
            ax.plot(x, y, "-", color=f"C{k}", linewidth=0.9, label=label)
            full = [i for i in range(len(x)) if n[i] >= SPARSE_BIN]
            sparse = [i for i in range(len(x)) if n[i] < SPARSE_BIN]
            ax.plot([x[i] for i in full], [y[i] for i in full], "o", markersize=3, color=f"C{k}")
            ax.plot([x[i] for i in sparse], [y[i] for i in sparse], "o", markersize=3, color=f"C{k}", fillstyle="none")
        ax.set_title(f"decision point {step}")
    fig.supxlabel("mean predicted probability")
    fig.supylabel("observed share")
    fig.axes[0].legend(frameon=False)
    return svg_text(
        fig,
        "Reliability curves of the usual-care model by decision point: observed share of each action "
        f"against its mean predicted probability; hollow points are bins with fewer than {SPARSE_BIN} decisions.",
    )


def overlap_figure(overlap, headline: str | None = None) -> str:
    """Histograms of the probability of the action taken and of the action recommended, one panel per step;
    ``headline`` (a label): the actions compared are that named strategy's, no regime being learned."""

    steps = sorted(overlap, key=int)
    fig, axes = panel_grid(len(steps))
    for ax, step in zip(axes, steps):
        for key, colour, label in (
            ("taken_probability", "C0", "taken"),
            ("recommended_probability", "C5", "recommended" if headline is None else "headline strategy"),
        ):
            counts = np.asarray(overlap[step][key]["histogram"], dtype=float)
            edges = np.linspace(0.0, 1.0, counts.size + 1)
            style = "-" if label == "taken" else "--"
            ax.stairs(counts / max(counts.sum(), 1.0), edges, color=colour, linestyle=style, label=label)
        ax.axvline(CRUMP_CUT, color="0.6", linestyle=":", linewidth=0.8)
        ax.set_title(f"decision point {step}: {overlap[step]['verdict']}")
    fig.supxlabel("usual care's estimated probability of the action")
    fig.supylabel("share of decisions")
    fig.axes[0].legend(frameon=False)
    return svg_text(
        fig,
        "Overlap by decision point: distribution of usual care's estimated probability of the action "
        "taken (solid) and of the action "
        + ("the learned regime recommends" if headline is None else f"the headline strategy ({headline}) prescribes")
        + " (dashed).",
    )


def balance_figure(balance, state_labels) -> str:
    """Balance plot: largest |SMD| of each state before (hollow) and after (filled) weighting, per step."""

    steps = sorted(balance, key=int)
    fig, axes = panel_grid(len(steps))
    names = [n for n in state_labels if n in balance[steps[0]]["states"]] if steps else []
    ys = np.arange(len(names))[::-1]
    for ax, step in zip(axes, steps):
        states = balance[step]["states"]
        before = [states[n]["max_abs_unweighted"] for n in names]
        after = [states[n]["max_abs_weighted"] for n in names]
        ax.plot(
            [np.nan if v is None else v for v in before],
            ys,
            "o",
            markerfacecolor="none",
            color="C0",
            markersize=4,
            label="unweighted",
        )
        ax.plot([np.nan if v is None else v for v in after], ys, "o", color="C1", markersize=3, label="weighted")
        ax.axvline(SMD_FLAG, color="0.6", linestyle=":", linewidth=0.8)
        ax.set_yticks(ys, [state_labels[n] for n in names], fontsize=9)
        ax.set_title(f"decision point {step}")
    fig.supxlabel("largest |standardised mean difference| against the reference action")
    fig.axes[0].legend(frameon=False, fontsize=9)
    return svg_text(
        fig,
        "Balance plot: for each state, the largest absolute standardised mean difference against the "
        "reference action before and after weighting.",
    )


def section_figure_tasks(protocol, behaviour, cohort) -> dict:
    """The inline SVG figures of the usual-care and cohort sections, one callable per figure (each returns its SVG
    text, or an empty string where there are no data), so that the figures can be drawn at once in several
    processes (:func:`regimewise.report.html.render_html`)."""
    labels = {}
    for s in protocol.states:  # a categorical state is balanced level by level
        levels = s.coded_levels if s.kind == "categorical" else ()
        labels.update({dummy_name(s.name, v): f"{s.label}: {v}" for v in levels} or {s.name: s.label})
    return {
        "reliability": lambda: reliability_figure(behaviour["by_step"], protocol.action_labels),
        "overlap": lambda: (
            "" if cohort is None else overlap_figure(cohort["overlap_by_step"], _headline_label(protocol))
        ),
        "balance": lambda: "" if cohort is None else balance_figure(cohort["balance_by_step"], labels),
    }


def _headline_label(protocol) -> str | None:
    """The headline named strategy's label when the protocol learns no regime, else None."""
    name = protocol.headline_regime
    return None if name is None else named_strategy_label(protocol, name)


def sensitivity_figure(sensitivity: dict) -> str:
    """Bounds of the analysed strategy's difference from usual care and their bootstrap interval against Γ."""
    apply_style()
    # undefined limits (null in JSON) become gaps in the plot
    curve = {key: [float("nan") if v is None else v for v in values] for key, values in sensitivity["curve"].items()}
    fig, ax = plt.subplots(figsize=(6.5, 3.2))
    ax.fill_between(
        curve["gamma"],
        curve["low"],
        curve["high"],
        color="C0",
        alpha=0.2,
        label=f"{100 * sensitivity['level']:.0f}% bootstrap interval of the bounds",
    )
    ax.plot(curve["gamma"], curve["contrast_lower"], color="C0", label="bounds of the difference")
    ax.plot(curve["gamma"], curve["contrast_upper"], color="C0")
    ax.axhline(0.0, color="black", linewidth=0.8)
    if sensitivity["tipping_point"] is not None:
        ax.axvline(sensitivity["tipping_point"], color="C5", linestyle="--", label="tipping point Γ* (interval)")
    if sensitivity.get("tipping_point_bounds") not in (None, sensitivity["tipping_point"]):
        ax.axvline(sensitivity["tipping_point_bounds"], color="C5", linestyle=":", label="bounds reach zero")
    ax.set_xlabel("confounding strength Γ (odds-ratio bound)")
    ax.set_ylabel("difference from usual care")
    ax.legend(frameon=False, fontsize=9, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return svg_text(
        fig,
        f"Bounds of the difference between {sensitivity.get('strategy_words', 'the learned regime')} and usual care, "
        "and their bootstrap interval, as the assumed confounding strength grows.",
    )


def sweep_figure(sweep: dict) -> str:
    """Sorted interval plot: each specification's learned-minus-usual-care difference with its bootstrap interval.

    Lowest estimate at the bottom; the pre-specified analysis in red with a diamond; hollow markers and dashed
    grey intervals: effective sample too small to be trusted. Specifications with an undefined estimate are left out.
    """
    apply_style()
    rows = [r for r in sweep["specifications"] if r["difference"] is not None]
    fig, ax = plt.subplots(figsize=(6.5, 0.26 * max(len(rows), 1) + 1.2))
    for y, r in enumerate(rows):
        color = "C3" if r["prespecified"] else ("0.6" if r["low_ess"] else "C0")
        if r["low"] is not None:
            ax.hlines(
                y, r["low"], r["high"], color=color, linewidth=1.2, linestyles="dashed" if r["low_ess"] else "solid"
            )
        ax.plot(
            [r["difference"]],
            [y],
            "D" if r["prespecified"] else "o",
            color=color,
            markerfacecolor="none" if r["low_ess"] else color,
        )
    ax.axvline(0.0, color="black", linewidth=0.8)
    ax.set_yticks(range(len(rows)), [r["id"] + (" (pre-specified)" if r["prespecified"] else "") for r in rows])
    lower = "; lower is better" if sweep.get("better") == "lower" else ""
    ax.set_xlabel(
        f"learned − usual care ({sweep['estimator']}) with {100 * sweep['level']:.0f}% bootstrap interval{lower}"
    )
    return svg_text(
        fig,
        "Each specification's learned-minus-usual-care difference with its bootstrap interval, sorted "
        "by estimate; the pre-specified analysis is marked.",
    )


# ---------------------------------------------------------------------------------------------- figures
# The widest a figure may be, legends included: A4 at the print style's 12 mm side margins holds 7.32 in (Letter
# 7.56 in), so a figure no wider than this prints at its own size and its text stays at 9 pt or more.
PRINT_WIDTH_INCHES = 7.2


def fit_print_width(fig, limit: float = PRINT_WIDTH_INCHES) -> None:
    """Narrow ``fig`` until its tight bounding box (what is saved) is at most ``limit`` inches wide.

    Text keeps its size in points; the axes give up the width instead, so a browser or printer never has to scale
    the figure (and its text) down to fit the page."""
    limit -= 2 * plt.rcParams["savefig.pad_inches"]  # bbox_inches="tight" pads both sides when saving
    for _ in range(5):
        width = fig.get_tightbbox(fig.canvas.get_renderer()).width
        if width <= limit:
            return
        w, h = fig.get_size_inches()
        fig.set_size_inches(max(w - (width - limit) - 0.02, 1.0), h)


def svg_text(fig, summary: str) -> str:
    """Inline SVG of ``fig`` (no timestamp, at most :data:`PRINT_WIDTH_INCHES` wide), marked as an image with
    ``summary`` as its accessible name and title."""
    fit_print_width(fig)
    buffer = io.StringIO()
    fig.savefig(buffer, format="svg", metadata={"Date": None}, bbox_inches="tight")
    plt.close(fig)
    text = buffer.getvalue()
    text = text[text.index("<svg") :]
    label = html.escape(summary, quote=True)
    head = text.index(">") + 1
    opening = text[:head].replace("<svg ", f'<svg role="img" aria-label="{label}" ', 1)
    return opening + f"<title>{label}</title>" + text[head:]


def apply_style():
    plt.rcParams.update(
        {
            "svg.hashsalt": "regimewise",
            "svg.fonttype": "none",
            "text.parse_math": False,  # labels are plain text: "$5 to $10" is never a formula
            "text.usetex": False,
            "font.size": 10,
            "legend.fontsize": 9,
            "axes.titlesize": 10,
            "axes.prop_cycle": cycler(color=OKABE_ITO),
            "axes.spines.top": False,
            "axes.spines.right": False,
        }
    )


def actions_by_step_figure(labels, by_step) -> str:
    """Share of each action recommended (learned regime) and taken (usual care) at each decision point."""
    apply_style()
    steps = sorted(by_step, key=int)
    fig, axes = plt.subplots(1, 2, figsize=(6.8, 3.0), sharey=True)
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
    return svg_text(
        fig, "Share of each action taken by usual care and recommended by the learned regime at each decision point."
    )


def interval_point(ax, at, estimate, mark, vertical, label=None):
    """One estimate with its interval at position ``at``: ``estimate`` = (value, low, high), ``mark`` = (marker,
    colour, weak). Weak (not supported) estimates get a hollow marker and a dashed interval."""
    value, low, high = estimate
    marker, colour, weak = mark
    if low is not None:
        lines = ax.vlines if vertical else ax.hlines
        lines(at, low, high, color=colour, linewidth=1.2, linestyles="dashed" if weak else "solid")
    xy = ([at], [value]) if vertical else ([value], [at])
    ax.plot(*xy, marker, color=colour, markerfacecolor="white" if weak else colour, label=label)


def usual_care_contrasts(values: dict) -> list[dict]:
    """Every regime minus usual care by every estimator: the evaluation's contrasts (learned regime, strategies)
    and, from the bootstrap, the fixed strategies' and comparators' (with their intervals where replicates exist).
    The bootstrap takes the protocol's ``evaluation.reference`` as the second regime of each of its pairs, so with
    a fixed strategy or a comparator as reference its pair with usual care is stored as usual care minus it: that
    one is turned round here (:func:`turned`)."""
    contrasts = [c for c in values["contrasts"] if c["versus"] == "usual_care"]
    seen = {(c["regime"], c["estimator"]) for c in contrasts}
    boot = values.get("bootstrap") or {}
    with_usual = [c for c in boot.get("contrasts", []) if "usual_care" in (c["regime"], c["versus"])]
    with_usual = [c if c["versus"] == "usual_care" else turned(c) for c in with_usual]
    return contrasts + [c for c in with_usual if (c["regime"], c["estimator"]) not in seen]


def turned(contrast: dict) -> dict:
    """A contrast a − b as b − a: the difference negated, the interval's limits negated and swapped (the bootstrap's
    quantile rule is symmetric, so these are the limits the replicates of b − a give: Hyndman & Fan 1996, type 6)."""

    def minus(x):
        return None if x is None else -x

    out = {**contrast, "regime": contrast["versus"], "versus": contrast["regime"]}
    out.update(difference=minus(contrast["difference"]), low=minus(contrast["high"]), high=minus(contrast["low"]))
    if contrast.get("unreported_interval") is not None:
        low, high = contrast["unreported_interval"]
        out["unreported_interval"] = [minus(high), minus(low)]
    return out


def drawn_contrasts(values: dict, estimators) -> list[dict]:
    """The contrasts with usual care that the forest plot draws: the protocol's estimators, a number, identified."""
    return [
        c
        for c in usual_care_contrasts(values)
        if c["estimator"] in estimators
        and c["difference"] is not None
        and not c.get("withheld")
        and c.get("verdict") != "not identified"
    ]


def contrast_figure(values: dict, estimators) -> str:
    """Contrast forest plot: each regime minus usual care, by estimator, with its bootstrap interval.

    Filled markers and solid intervals: supported (:mod:`regimewise.evaluation.verdicts`); hollow markers and
    dashed intervals: model projections (too small an effective sample, or fitted-Q evaluation off usual care). A
    contrast that is not identified is not drawn (the report lists it under
    the plot), so the axis spans only what is drawn.
    """
    apply_style()
    labels = {r["name"]: r["label"] for r in values["regimes"]}
    drawn = drawn_contrasts(values, estimators)
    rows = [name for name in labels if name != "usual_care" and any(c["regime"] == name for c in drawn)]
    fig, ax = plt.subplots(figsize=(7.0, 0.42 * max(len(rows), 1) + 1.1))
    for j, est in enumerate(estimators):
        labelled = False
        for c in (c for c in drawn if c["estimator"] == est):
            y = len(rows) - 1 - rows.index(c["regime"]) + (j - (len(estimators) - 1) / 2) * (0.7 / len(estimators))
            estimate = (c["difference"], c.get("low"), c.get("high"))
            mark = (ESTIMATORS[est].marker, f"C{j}", c.get("verdict", "supported") != "supported")
            interval_point(ax, y, estimate, mark, vertical=False, label=None if labelled else est)
            labelled = True
    ax.axvline(0.0, color="0.3", linewidth=0.8)
    ax.set_yticks(range(len(rows)), [labels[name] for name in reversed(rows)])
    ax.set_ylim(-0.6, len(rows) - 0.4)
    ax.set_xlabel("difference from usual care (expected total reward per episode)")
    ax.legend(frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return svg_text(
        fig,
        "Each strategy minus usual care by each estimator with its bootstrap interval; hollow markers and dashed "
        "intervals are model projections (too small an effective sample, or fitted-Q evaluation of a regime other "
        "than usual care); contrasts that are not identified are not drawn.",
    )


FAMILY_WORDS = {
    "partial_adoption": "partial adoption",
    "override_gain": "switch only when it matters",
    "incremental_odds": "raised odds",
}


def tradeoff_figure(rows: list[dict]) -> str | None:
    """Trade-off of the protocol's strategies: difference from usual care (with its interval) against the share of
    reviews whose action changes, one line per family in grid order.

    ``rows`` is summary.json's ``strategies.table``. Supported strategies are filled, model projections hollow;
    strategies that are not identified are not drawn (the table says why). None when nothing can be drawn.
    """
    drawn = [r for r in rows if r["difference"] is not None and r["verdict"] != "not identified"]
    if not drawn:
        return None
    apply_style()
    fig, ax = plt.subplots(figsize=(6.2, 3.4))
    markers = {"partial_adoption": "o", "override_gain": "s", "incremental_odds": "D"}
    for k, family in enumerate(FAMILY_WORDS):
        points = sorted((r for r in drawn if r["family"] == family), key=lambda r: r["share_changed"])
        if not points:
            continue
        x = [100 * r["share_changed"] for r in points]
        ax.plot(x, [r["difference"] for r in points], color=f"C{k}", linewidth=1.0, label=FAMILY_WORDS[family])
        for xi, r in zip(x, points):
            mark = (markers[family], f"C{k}", r["verdict"] != "supported")
            interval_point(ax, xi, (r["difference"], r["low"], r["high"]), mark, vertical=True)
    ax.axhline(0.0, color="0.3", linewidth=0.8)
    ax.set_xlabel("reviews whose action changes (%)")
    ax.set_ylabel("difference from usual care")
    ax.legend(frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return svg_text(
        fig,
        "Each strategy of the protocol's grid: its difference from usual care with its bootstrap interval against "
        "the share of reviews whose action it changes; hollow markers rest on too small an effective sample.",
    )


def weight_histogram_figure(histograms) -> str:
    """Histogram of log10 cumulative importance weights of the learned regime at each decision point."""
    apply_style()
    by_step = histograms["by_step"]
    edges = histograms["log10_edges"]
    columns = min(4, len(by_step))
    rows = -(-len(by_step) // columns)
    fig, axes = plt.subplots(rows, columns, figsize=(1.7 * columns, 1.6 * rows), sharex=True, squeeze=False)
    for ax in axes.flat[len(by_step) :]:
        ax.set_visible(False)
    for ax, h in zip(axes.flat, by_step):
        ax.bar(
            edges[:-1],
            h["counts"],
            width=[b - a for a, b in zip(edges[:-1], edges[1:])],
            align="edge",
            color="C0",
            edgecolor="white",
            linewidth=0.4,
        )
        ax.set_title(f"decision {h['step']}: {h['zero']:,} at 0")
    for ax in axes[-1]:
        ax.set_xlabel("log10 weight")
    for ax in axes[:, 0]:
        ax.set_ylabel("episodes")
    return svg_text(
        fig,
        "Histograms of the learned regime's cumulative importance weights (log10) at each decision "
        "point; the title gives the episodes whose weight is 0.",
    )


LINE_STYLES = ("-", "--", "-.", ":")


def survival_figure(survival: dict, min_cell_count: int) -> str:
    """Survival curve of every strategy (step functions), dotted from the time its effective sample becomes too
    small; under the plot, the clones still following each strategy at a few times (counts from 1 to
    ``min_cell_count - 1`` shown as ``<min_cell_count``)."""
    apply_style()
    rows = survival["strategies"]
    fig, (ax, table_ax) = plt.subplots(
        2,
        1,
        figsize=(7.0, 3.4 + 0.2 * len(rows)),
        gridspec_kw={"height_ratios": [3.0, 0.2 * len(rows) + 0.3]},
        sharex=False,
    )
    fig.subplots_adjust(hspace=0.45)
    for k, row in enumerate(rows):
        times = [0.0, *row["curve"]["times"]]
        values = [1.0, *row["curve"]["survival"]]
        cut = row["diagnostics"]["unreliable_from"]
        colour, marker = OKABE_ITO[k % len(OKABE_ITO)], "osD^v<>p"[k % 8]
        solid = [(t, v) for t, v in zip(times, values) if v is not None and (cut is None or t <= cut)]
        faint = [(t, v) for t, v in zip(times, values) if v is not None and cut is not None and t >= cut]
        if solid:
            ax.step(*zip(*solid), where="post", color=colour, label=row["label"], marker=marker, markersize=3)
        if faint:
            ax.step(
                *zip(*faint),
                where="post",
                color=colour,
                linestyle=":",
                alpha=0.7,
                label=None if solid else row["label"],
            )
    ax.set_xlabel("days since the index date")
    ax.set_ylabel("share without the event")
    ax.legend(frameon=False, loc="center left", bbox_to_anchor=(1.0, 0.5))
    _following_table(table_ax, rows, min_cell_count, ax.get_xlim())
    return svg_text(
        fig,
        "Survival without the event under each strategy by days since the index date, dotted where too "
        "few copies follow the strategy.",
    )


def _count(n, threshold) -> str:
    n = int(n or 0)
    return f"<{threshold}" if 0 < n < threshold else f"{n:,}"


def _following_table(ax, rows, threshold, xlim):
    """Clones still following each strategy (unweighted) at up to six grid times, aligned under the time axis."""
    grid = rows[0]["diagnostics"]["times"]
    shown = sorted({grid[int(i)] for i in np.linspace(0, len(grid) - 1, min(6, len(grid)))})
    ax.set_xlim(xlim)
    ax.set_ylim(len(rows) + 0.5, -0.5)
    ax.axis("off")
    ax.text(xlim[0], -0.5, "copies still following (unweighted)", fontsize=9, va="bottom", ha="left", style="italic")
    for k, row in enumerate(rows):
        counts = dict(zip(row["diagnostics"]["times"], row["diagnostics"]["n_following"]))
        colour = OKABE_ITO[k % len(OKABE_ITO)]
        ax.text(xlim[0], k + 0.5, row["label"] + "  ", fontsize=9, ha="right", va="center", color=colour)
        for t in shown:
            ax.text(t, k + 0.5, _count(counts.get(t), threshold), fontsize=9, ha="center", va="center", color=colour)
