"""Every figure of the report, as inline SVG without timestamps (identical inputs give identical bytes).

The figures read the stage outputs (JSON-ready dicts) only; no statistics are computed here.
"""

from __future__ import annotations

import io

import matplotlib
import numpy as np

from regimewise.estimators import ESTIMATORS

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from regimewise.describe.balance import SMD_FLAG
from regimewise.usual_care.diagnostics import CRUMP_CUT


# ---------------------------------------------------------------------------------------------- figures
def panel_grid(n_panels):
    apply_style()
    cols = min(4, n_panels)
    rows = int(np.ceil(n_panels / cols))
    fig, axes = plt.subplots(
        rows, cols, figsize=(2.2 * cols + 0.8, 2.0 * rows + 0.4), sharex=True, sharey=True, squeeze=False
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
            ax.plot(curve["mean_predicted"], curve["observed"], "-o", markersize=2.5, color=f"C{k}", label=label)
        ax.set_title(f"decision point {step}")
    fig.supxlabel("mean predicted probability")
    fig.supylabel("observed share")
    fig.axes[0].legend(frameon=False, fontsize=7)
    return svg_text(fig)


def overlap_figure(overlap) -> str:
    """Histograms of the probability of the action taken and of the action recommended, one panel per step."""

    steps = sorted(overlap, key=int)
    fig, axes = panel_grid(len(steps))
    for ax, step in zip(axes, steps):
        for key, colour, label in (
            ("taken_probability", "C0", "taken"),
            ("recommended_probability", "C3", "recommended"),
        ):
            counts = np.asarray(overlap[step][key]["histogram"], dtype=float)
            edges = np.linspace(0.0, 1.0, counts.size + 1)
            ax.stairs(counts / max(counts.sum(), 1.0), edges, color=colour, label=label)
        ax.axvline(CRUMP_CUT, color="0.6", linestyle=":", linewidth=0.8)
        ax.set_title(f"decision point {step}: {overlap[step]['verdict']}")
    fig.supxlabel("usual care's estimated probability of the action")
    fig.supylabel("share of decisions")
    fig.axes[0].legend(frameon=False, fontsize=7)
    return svg_text(fig)


def balance_figure(balance, state_labels) -> str:
    """Balance plot: largest |SMD| of each state before (hollow) and after (filled) weighting, per step."""

    steps = sorted(balance, key=int)
    fig, axes = panel_grid(len(steps))
    names = list(state_labels)
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
        ax.set_yticks(ys, [state_labels[n] for n in names], fontsize=7)
        ax.set_title(f"decision point {step}")
    fig.supxlabel("largest |standardised mean difference| against the reference action")
    fig.axes[0].legend(frameon=False, fontsize=7)
    return svg_text(fig)


def section_figures(protocol, behaviour, cohort) -> dict:
    """Inline SVG figures of the usual-care and cohort sections (empty strings where there are no data)."""

    labels = {s.name: s.label for s in protocol.states}
    return {
        "reliability": reliability_figure(behaviour["by_step"], protocol.action_labels),
        "overlap": "" if cohort is None else overlap_figure(cohort["overlap_by_step"]),
        "balance": "" if cohort is None else balance_figure(cohort["balance_by_step"], labels),
    }


def sensitivity_figure(sensitivity: dict) -> str:
    """Bounds of the learned-minus-usual-care difference and their bootstrap interval against Γ."""
    apply_style()
    # undefined limits (null in JSON) become gaps in the plot
    curve = {key: [float("nan") if v is None else v for v in values] for key, values in sensitivity["curve"].items()}
    fig, ax = plt.subplots(figsize=(6.5, 3.2))
    ax.fill_between(
        curve["gamma"],
        curve["interval_low"],
        curve["interval_high"],
        color="C0",
        alpha=0.2,
        label=f"{100 * sensitivity['level']:.0f}% bootstrap interval of the bounds",
    )
    ax.plot(curve["gamma"], curve["contrast_lower"], color="C0", label="bounds of the difference")
    ax.plot(curve["gamma"], curve["contrast_upper"], color="C0")
    ax.axhline(0.0, color="black", linewidth=0.8)
    if sensitivity["tipping_point"] is not None:
        ax.axvline(sensitivity["tipping_point"], color="C3", linestyle="--", label="tipping point Γ*")
    ax.set_xlabel("confounding strength Γ (odds-ratio bound)")
    ax.set_ylabel("learned − usual care")
    ax.legend(frameon=False, fontsize=8, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    return svg_text(fig)


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
    ax.set_xlabel(f"learned − usual care ({sweep['estimator']}) with {100 * sweep['level']:.0f}% bootstrap interval")
    return svg_text(fig)


# ---------------------------------------------------------------------------------------------- figures
def svg_text(fig) -> str:
    buffer = io.StringIO()
    fig.savefig(buffer, format="svg", metadata={"Date": None}, bbox_inches="tight")
    plt.close(fig)
    text = buffer.getvalue()
    return text[text.index("<svg") :]


def apply_style():
    plt.rcParams.update(
        {
            "svg.hashsalt": "regimewise",
            "svg.fonttype": "none",
            "font.size": 9,
            "axes.spines.top": False,
            "axes.spines.right": False,
        }
    )


def actions_by_step_figure(labels, by_step) -> str:
    """Share of each action recommended (learned regime) and taken (usual care) at each decision point."""
    apply_style()
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
    return svg_text(fig)


def value_figure(regimes, estimators) -> str:
    """Forest plot: each regime's value by each estimator with its bootstrap interval.

    Hollow markers and dashed grey intervals: effective sample too small to be trusted. A value whose verdict is
    ``not identified`` gets no point and no interval, so the axis spans only the values plotted.
    """
    apply_style()
    fig, ax = plt.subplots(figsize=(7.0, 0.32 * len(regimes) * len(estimators) + 1.2))
    for j, est in enumerate(estimators):
        labelled = False
        for i, r in enumerate(regimes):
            e = r["estimates"].get(est)
            if e is None or e["value"] is None or e.get("verdict") == "not identified":
                continue
            y = len(regimes) - 1 - i + (j - (len(estimators) - 1) / 2) * (0.8 / len(estimators))
            color = "0.6" if e["low_ess"] else f"C{j}"
            if e.get("low") is not None:
                ax.hlines(
                    y, e["low"], e["high"], color=color, linewidth=1.2, linestyles="dashed" if e["low_ess"] else "solid"
                )
            ax.plot(
                [e["value"]],
                [y],
                ESTIMATORS[est].marker,
                color=f"C{j}",
                markerfacecolor="none" if e["low_ess"] else f"C{j}",
                label=None if labelled else est,
            )
            labelled = True
    ax.set_yticks(range(len(regimes)), [r["label"] for r in reversed(regimes)])
    ax.set_xlabel("estimated value (expected total reward per episode)")
    ax.legend(frameon=False, loc="center left", bbox_to_anchor=(1.0, 0.5))
    return svg_text(fig)


def weight_histogram_figure(histograms) -> str:
    """Histogram of log10 cumulative importance weights of the learned regime at each decision point."""
    apply_style()
    by_step = histograms["by_step"]
    edges = histograms["log10_edges"]
    columns = min(4, len(by_step))
    rows = -(-len(by_step) // columns)
    fig, axes = plt.subplots(rows, columns, figsize=(2.2 * columns, 1.7 * rows), sharex=True, squeeze=False)
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
        ax.set_title(f"decision {h['step']}: {h['zero']:,} at 0", fontsize=8)
    for ax in axes[-1]:
        ax.set_xlabel("log10 weight")
    return svg_text(fig)
