"""A study that only compares named strategies (``analysis.learn_regime: false``), through the whole workflow.

The run uses the small simulated cohort of the shared ``study`` fixture with the demo's guideline comparator and
the fixed strategies, 'always hold' as the protocol's reference, survival, and 10 bootstrap replicates (about two
minutes on 2 cores). Its outputs must hold usual care, the fixed strategies and the comparator with their
contrasts, and no learned regime anywhere.
"""

from __future__ import annotations

import itertools
import json
from importlib import resources
from pathlib import Path

import jsonschema
import pytest
import yaml
from support.cli import run_cli

NAMED = {"always_hold", "always_step_down", "always_step_up", "always_add_agent", "guideline"}
ESTIMATORS = ("pdwis", "wdr", "fqe")


def _compare_only(study: Path, folder: Path, change=None) -> Path:
    """The ``study`` protocol without strategies, learning no regime, with 'always hold' as reference."""
    protocol = yaml.safe_load(study.read_text(encoding="utf-8"))
    protocol.pop("strategies")
    protocol["study"]["question"] = "Would the guideline rule have given a better outcome score than usual care?"
    protocol["analysis"] = {"learn_regime": False}
    protocol["evaluation"].update(replicates=10, shards=2, reference="always_hold")
    for key in ("decisions", "episodes"):
        protocol["data"][key] = str(study.parent / protocol["data"][key])
    if change is not None:
        change(protocol)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def run(study, tmp_path_factory):
    folder = tmp_path_factory.mktemp("compare_only")
    out = folder / "out"
    result = run_cli("run", _compare_only(study, folder), "--out", out, "--cores", 2)
    assert result.returncode == 0, result.stderr
    return out


def _json(out: Path, path: str) -> dict:
    return json.loads((out / path).read_text(encoding="utf-8"))


def test_values_and_intervals_hold_only_usual_care_and_the_named_strategies(run):
    values, intervals = _json(run, "evaluate/values.json"), _json(run, "bootstrap/intervals.json")
    assert {r["name"] for r in values["regimes"]} == {"usual_care", *NAMED}
    assert {(c["regime"], c["versus"]) for c in values["contrasts"]} == {(n, "usual_care") for n in NAMED}
    assert set(intervals["values"]) == {"usual_care", *NAMED} and intervals["regime"] == "none"
    # Every pair of the six regimes, with the protocol's reference always second (regime minus reference).
    pairs = {(c["regime"], c["versus"]) for c in intervals["contrasts"]}
    assert {frozenset(p) for p in pairs} == {frozenset(p) for p in itertools.combinations(["usual_care", *NAMED], 2)}
    assert all(b == "always_hold" for a, b in pairs if "always_hold" in (a, b))
    assert len(intervals["contrasts"]) == len(pairs) * len(ESTIMATORS)
    assert _json(run, "regime/regime.json")["learned"] is False


def test_summary_reports_the_named_strategies_and_their_contrasts(run):
    summary = _json(run, "report/summary.json")
    schema = json.loads(resources.files("regimewise.report").joinpath("summary.schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(summary)
    assert summary["learn_regime"] is False
    assert summary["regime"] is None and summary["learned_regime_sentence"] is None
    assert summary["strategies"] is None and summary["sweep"] is None
    assert set(summary["values"]) == {"usual_care", *NAMED}
    headline = summary["headline"]
    assert (headline["strategy"], headline["label"], headline["prespecified"]) == ("guideline", "Guideline rule", True)
    assert "Guideline rule" in headline["sentence"] and "learned" not in headline["sentence"]
    # The headline's interval is the bootstrap's interval of the guideline minus usual care by the same estimator.
    boot = next(
        c
        for c in summary["bootstrap"]["contrasts"]
        if (c["regime"], c["versus"], c["estimator"]) == ("guideline", "usual_care", headline["estimator"])
    )
    if not boot["withheld"]:
        assert (headline["low"], headline["high"]) == (boot["low"], boot["high"])
    assert summary["bootstrap"]["reference"] == "always_hold"
    assert {(c["regime"], c["estimator"]) for c in summary["contrasts"]} == set(itertools.product(NAMED, ESTIMATORS))
    assert summary["sensitivity"]["strategy"] == "guideline" and summary["sensitivity"]["adoption"] == 1.0
    assert set(summary["survival"]["strategies"]) == {"usual_care", *NAMED}
    assert summary["survival"]["headline_strategy"] == "guideline"
    text = json.dumps(summary)
    assert '"learned"' not in text and "learned regime" not in text.lower()


def test_report_speaks_of_the_named_strategies_only(run):
    html = (run / "report" / "report.html").read_text(encoding="utf-8")
    assert "learned regime" not in html.lower()
    assert "4. The strategies compared" in html and "Named strategies versus usual care" in html
    assert "Guideline rule <strong>(headline)</strong>" in html
    for part in ("sensitivity/sensitivity.json", "survival/survival.json", "describe/cohort.json"):
        assert "learned" not in (run / part).read_text(encoding="utf-8"), part


BAD = {
    "derived strategies": (
        lambda p: p.update(strategies={"partial_adoption": [0.3]}),
        "strategies: partial adoption and the other strategies are derived from the learned regime, but "
        "analysis.learn_regime is false",
    ),
    "sweeps": (
        lambda p: p.update(sweeps={"axes": {"constraints.support_threshold": [0.05, 0.1]}}),
        "sweeps: the specification sweep varies how the regime is learned, but analysis.learn_regime is false",
    ),
    "nothing to compare": (
        lambda p: (p.pop("comparators"), p["evaluation"].update(fixed_strategies=False)),
        "analysis.learn_regime is false and there is nothing to compare with usual care",
    ),
    "no headline among several": (
        lambda p: p.pop("comparators"),
        "analysis.headline: with learn_regime: false, name the strategy the headline reports",
    ),
    "unknown headline": (
        lambda p: p["analysis"].update(headline="always_hol"),
        "analysis.headline: 'always_hol' is not a named strategy of this protocol",
    ),
    "headline of a learned study": (
        lambda p: p["analysis"].update(learn_regime=True, headline="guideline"),
        "remove analysis.headline",
    ),
    "learned reference": (
        lambda p: p["evaluation"].update(reference="learned"),
        "evaluation.reference: 'learned' is not a regime of this protocol",
    ),
    "refit bootstrap": (
        lambda p: p["evaluation"].update(bootstrap_regime="refit"),
        "evaluation.bootstrap_regime: refit learns the regime again",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_a_comparison_only_protocol_that_cannot_work_is_refused_in_one_line(study, tmp_path, case):
    change, expected = BAD[case]
    out = tmp_path / "out"
    result = run_cli("run", _compare_only(study, tmp_path / "study", change), "--out", out)
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert result.returncode == 1 and len(lines) == 1, result.stderr
    assert lines[0].startswith("regimewise error: ") and expected in lines[0]
    assert "Traceback" not in result.stderr + result.stdout
    assert not out.exists() or not any(out.rglob("*.json"))
