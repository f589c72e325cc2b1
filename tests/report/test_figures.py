"""Figures draw only what the records identify: a value that is not identified never stretches an axis (issue 13),
and no figure is wider than the printable page (issue 16)."""

from __future__ import annotations

import re

import matplotlib.pyplot as plt
import numpy as np
import pytest

from regimewise.bootstrap.intervals import interval
from regimewise.report.figures import (
    PRINT_WIDTH_INCHES,
    contrast_figure,
    drawn_contrasts,
    svg_text,
    tradeoff_figure,
)
from regimewise.report.html import unplotted


def tick_numbers(svg: str) -> list[float]:
    """Every number written as text in the SVG (tick labels; matplotlib writes a minus sign as U+2212)."""
    texts = re.findall(r"<text[^>]*>([^<]*)</text>", svg)
    numbers = []
    for text in texts:
        text = text.strip().replace("\u2212", "-")
        if re.fullmatch(r"-?\d+(\.\d+)?", text):
            numbers.append(float(text))
    return numbers


def _row(name, family, share, difference, verdict, low=None, high=None):
    return {
        "name": name,
        "family": family,
        "share_changed": share,
        "difference": difference,
        "low": low,
        "high": high,
        "verdict": verdict,
    }


def test_tradeoff_figure_leaves_out_what_is_not_identified():
    rows = [
        _row("a", "partial_adoption", 0.1, 1.0, "supported", 0.5, 1.5),
        _row("b", "partial_adoption", 0.3, 2.0, "model projection", 0.0, 4.0),
        _row("c", "override_gain", 0.9, 500.0, "not identified", 300.0, 700.0),
    ]
    numbers = tick_numbers(tradeoff_figure(rows))
    assert numbers and max(abs(n) for n in numbers) < 100  # the 500 of the unidentified strategy is not drawn
    assert tradeoff_figure([rows[2]]) is None


def test_contrast_forest_plot_spans_only_the_drawn_contrasts():
    values = {
        "regimes": [
            {"name": "learned", "label": "Learned regime"},
            {"name": "usual_care", "label": "Usual care"},
            {"name": "always_x", "label": "Always x"},
        ],
        "contrasts": [
            {
                "regime": "learned",
                "versus": "usual_care",
                "estimator": "wdr",
                "difference": 2.0,
                "low": 1.0,
                "high": 3.0,
                "low_ess": False,
                "verdict": "supported",
            },
        ],
        "bootstrap": {
            "contrasts": [
                {
                    "regime": "always_x",
                    "versus": "usual_care",
                    "estimator": "wdr",
                    "difference": -190.0,
                    "low": -220.0,
                    "high": 180.0,
                    "low_ess": True,
                    "verdict": "not identified",
                    "withheld": True,
                },
            ]
        },
    }
    svg = contrast_figure(values, ["wdr"])
    assert max(abs(n) for n in tick_numbers(svg)) < 10
    assert "Always x" not in svg and "Learned regime" in svg
    assert unplotted(values, ["wdr"]) == ["Always x"]  # the caption lists exactly what the plot leaves out
    values["bootstrap"]["contrasts"][0]["verdict"] = "model projection"  # withheld alone also keeps it out
    assert "Always x" not in contrast_figure(values, ["wdr"]) and unplotted(values, ["wdr"]) == ["Always x"]


def test_a_wide_figure_is_narrowed_to_the_printable_width():
    fig, ax = plt.subplots(figsize=(11.0, 3.0))
    ax.plot([0, 1], [0, 1], label="a legend entry that sits outside the axes")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0))
    svg = svg_text(fig, "test")
    width_pt = float(re.search(r'width="([\d.]+)pt"', svg).group(1))
    assert width_pt <= PRINT_WIDTH_INCHES * 72 + 1


def test_the_forest_plot_draws_a_model_projection_dashed_whatever_its_effective_sample():
    # fitted-Q evaluation of a strategy is a model projection even when the effective sample is large
    # (evaluation/verdicts.py): its interval is drawn dashed like any other weak estimate
    contrast = {
        "regime": "learned",
        "versus": "usual_care",
        "estimator": "fqe",
        "difference": 2.0,
        "low": 1.0,
        "high": 3.0,
        "low_ess": False,
        "verdict": "supported",
    }
    values = {
        "regimes": [{"name": "learned", "label": "Learned regime"}, {"name": "usual_care", "label": "Usual care"}],
        "contrasts": [contrast],
    }
    assert "stroke-dasharray" not in contrast_figure(values, ["fqe"])
    contrast["verdict"] = "model projection"
    assert "stroke-dasharray" in contrast_figure(values, ["fqe"])


@pytest.mark.parametrize("basic", [False, True])
def test_a_comparator_as_reference_keeps_its_place_in_the_forest_plot(basic):
    # With evaluation.reference naming a comparator, the bootstrap stores its pair with usual care as usual care
    # minus the comparator (bootstrap/intervals.py, regime_pairs). The plot shows comparator minus usual care:
    # the same replicates' differences negated, whose interval numpy's quantiles of the negated draws give
    # (source: numpy.quantile, method "weibull", the rule of core/quantiles.py, on -draws).
    draws = np.random.default_rng(4).normal(1.5, 0.8, size=49)
    stored = {"regime": "usual_care", "versus": "guideline", "estimator": "wdr", "difference": 1.4}
    stored |= interval(1.4, draws, 0.95, 1.0, basic) | {"low_ess": True, "verdict": "model projection"}
    values = {
        "regimes": [
            {"name": "learned", "label": "Learned regime"},
            {"name": "usual_care", "label": "Usual care"},
            {"name": "guideline", "label": "Guideline rule"},
        ],
        "contrasts": [],
        "bootstrap": {"contrasts": [stored]},
    }
    (shown,) = drawn_contrasts(values, ["wdr"])
    assert (shown["regime"], shown["versus"], shown["difference"]) == ("guideline", "usual_care", -1.4)
    q_low, q_high = np.quantile(-draws, [0.025, 0.975], method="weibull")
    expected = (2 * -1.4 - q_high, 2 * -1.4 - q_low) if basic else (q_low, q_high)  # basic: Davison & Hinkley §5.2
    assert (shown["low"], shown["high"]) == pytest.approx(expected, abs=1e-12)
    assert "Guideline rule" in contrast_figure(values, ["wdr"]) and unplotted(values, ["wdr"]) == ["Learned regime"]
