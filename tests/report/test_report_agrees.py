"""The rendered report agrees with summary.json, summary.json with its shipped JSON Schema, and the methods
sentences follow the protocol (issue 16, points 2, 3 and 8).

The shared workflow run (``two_runs`` in tests/conftest.py) is reused: no extra workflow run here.
"""

from __future__ import annotations

import copy
import json
from html.parser import HTMLParser
from importlib import resources

import jsonschema
import pytest

from regimewise.bootstrap.intervals import merge_intervals
from regimewise.io import read_json
from regimewise.protocol import load_protocol
from regimewise.report.html import render_html
from regimewise.report.provenance import build_provenance
from regimewise.report.summary import build_summary, suppress_small_counts


class SummaryNumbers(HTMLParser):
    """Text of every element carrying ``data-summary`` (a JSON Pointer into summary.json), with its attributes."""

    def __init__(self):
        super().__init__()
        self.found, self._open = [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "data-summary" in attrs:
            self._open.append([attrs, ""])

    def handle_data(self, data):
        for entry in self._open:
            entry[1] += data

    def handle_endtag(self, tag):
        if self._open and tag in ("span", "strong"):
            attrs, text = self._open.pop()
            self.found.append((attrs, text.strip()))


def resolve(document, pointer: str):
    """RFC 6901 JSON Pointer (``~1`` for ``/``, ``~0`` for ``~``)."""
    node = document
    for token in pointer.lstrip("/").split("/"):
        token = token.replace("~1", "/").replace("~0", "~")
        node = node[int(token)] if isinstance(node, list) else node[token]
    return node


@pytest.fixture(scope="module")
def outputs(two_runs):
    (out, _), (result, _) = two_runs
    assert result.returncode == 0, result.stderr
    summary = json.loads((out / "report" / "summary.json").read_text(encoding="utf-8"))
    html = (out / "report" / "report.html").read_text(encoding="utf-8")
    return out, summary, html


def panel_of(html: str) -> str:
    start = html.index('<section class="summary-panel"')
    return html[start : html.index("</section>", start)]


def test_figures_drawn_in_two_processes_give_the_same_page(two_runs, study):
    # the report rule draws its figures in two processes: the page must be the one a single process draws
    (out, _), _ = two_runs
    pf = load_protocol(study)
    parts = _parts(out)
    prov = build_provenance(pf)
    headline = build_summary(pf.protocol, parts, prov)
    one = render_html(pf.protocol, parts, prov, headline, processes=1)
    assert render_html(pf.protocol, parts, prov, headline, processes=2) == one
    assert one.count("<svg ") >= 8  # the figures were drawn, not left out


def test_every_panel_number_equals_its_source_in_summary(outputs):
    _, summary, html = outputs
    parser = SummaryNumbers()
    parser.feed(panel_of(html))
    pointers = [attrs["data-summary"] for attrs, _ in parser.found]
    # the headline's difference, interval, ESS and verdict, the tipping point (or Γ max) and survival are there
    for wanted in ("/headline/difference", "/headline/low", "/headline/high", "/headline/ess", "/headline/verdict"):
        assert wanted in pointers
    assert any(p.startswith("/sensitivity/") for p in pointers)
    assert any(p.startswith(f"/survival/strategies/{summary['headline']['strategy']}/") for p in pointers)
    for attrs, text in parser.found:
        source = resolve(summary, attrs["data-summary"])
        if isinstance(source, str):
            assert text == source, attrs
            continue
        shown = float(text.replace(",", "").replace("\u2212", "-"))
        expected = round(float(attrs.get("data-scale", 1)) * source, int(attrs["data-digits"]))
        assert shown == pytest.approx(expected, abs=1e-9), (attrs, text, source)


def test_panel_names_the_estimator_and_the_caution(outputs):
    _, summary, html = outputs
    panel = panel_of(html)
    assert f"({summary['headline']['estimator']})" in panel
    assert f"({summary['sensitivity']['estimator']})" in panel
    assert "Research use only" in panel and "licensed clinicians" in panel
    assert summary["headline"]["sentence"] in panel.replace("&#39;", "'")


def test_summary_matches_the_shipped_json_schema(outputs):
    _, summary, _ = outputs
    schema = json.loads(resources.files("regimewise.report").joinpath("summary.schema.json").read_text())
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.Draft202012Validator(schema).validate(summary)
    assert summary["schema_version"] == "2"


def test_schema_refuses_a_number_for_a_value_that_is_not_identified(outputs):
    _, summary, _ = outputs
    schema = json.loads(resources.files("regimewise.report").joinpath("summary.schema.json").read_text())
    broken = copy.deepcopy(summary)
    broken["headline"].update(verdict="not identified", difference=1.0)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, schema)
    broken = copy.deepcopy(summary)
    broken["headline"]["estimator"] = "WDR"  # one spelling of estimator names
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, schema)


def test_one_spelling_for_estimators_and_interval_keys(outputs):
    _, summary, _ = outputs
    text = json.dumps(summary)
    assert "interval_low" not in text and "interval_high" not in text
    for regime in summary["values"].values():
        for name, estimate in regime.items():
            assert estimate["estimator"] == name


def test_small_counts_are_written_as_in_the_report():
    summary = {"cohort": {"episodes": 3, "patients": 0, "decisions": 40}, "regime": {"rule_violations": 10}}
    assert suppress_small_counts(summary, 11) == {
        "cohort": {"episodes": "<11", "patients": 0, "decisions": 40},
        "regime": {"rule_violations": "<11"},
    }
    assert suppress_small_counts({"ess": 3.0, "n_following": True}, 11) == {"ess": 3.0, "n_following": True}


# ---------------------------------------------------------------------------------------------- text from facts
ARTIFACTS = {
    "validation": "validate/validation.json",
    "behaviour": "behaviour/behaviour.json",
    "regime": "regime/regime.json",
    "cohort": "describe/cohort.json",
    "sensitivity": "sensitivity/sensitivity.json",
    "survival": "survival/survival.json",
}


def _parts(out):
    parts = {name: read_json(out / path) for name, path in ARTIFACTS.items()}
    values, intervals = read_json(out / "evaluate/values.json"), read_json(out / "bootstrap/intervals.json")
    parts["values"] = merge_intervals(values, intervals)
    parts["sweep"] = None
    return parts


def _render(study, parts):
    pf = load_protocol(study)
    prov = build_provenance(pf)
    return render_html(pf.protocol, parts, prov, build_summary(pf.protocol, parts, prov))


def _usual_care_folds(parts, k):
    parts["behaviour"]["cross_fitting"]["folds"] = k


def _regime_folds(parts, k):
    parts["regime"]["cross_fit"]["folds"] = k


@pytest.mark.parametrize(
    ("setting", "cross_fitted", "in_sample"),
    [
        # usual-care probabilities: the cross-fitting sentence only with 2+ folds, "in-sample" otherwise
        (_usual_care_folds, "Every decision's probabilities are cross-fitted", "The probabilities are in-sample"),
        # the learned regime: evaluated by cross-fitting, or flagged as judged on the records it was learned from
        (_regime_folds, "-fold cross-fitting by patient", "evaluated on the same records it was learned from"),
    ],
)
def test_methods_sentences_follow_the_protocol(two_runs, study, setting, cross_fitted, in_sample):
    """The report rendered as for a protocol with 5 folds and as for one with 1 fold says different things."""
    (out, _), _ = two_runs
    rendered = {}
    for k in (1, 5):
        parts = _parts(out)
        setting(parts, k)
        rendered[k] = _render(study, parts)
    assert cross_fitted in rendered[5] and in_sample not in rendered[5]
    assert in_sample in rendered[1] and cross_fitted not in rendered[1]


def test_panel_gives_no_survival_number_where_too_few_follow(two_runs, study):
    """As in the survival table: past the day the effective sample falls below the minimum, no number."""
    (out, _), _ = two_runs
    parts = _parts(out)
    pf = load_protocol(study)
    name = build_summary(pf.protocol, parts, build_provenance(pf))["headline"]["strategy"]
    row = next(r for r in parts["survival"]["strategies"] if r["name"] == name)
    row["diagnostics"]["unreliable_from"] = 1.0
    panel = panel_of(_render(study, parts))
    assert "no number is given" in panel and "/risk_difference/" not in panel
