"""The reporting checklist: item lists equal to the published ones, a status for every item, answers drawn from
the run and pointing to sections the report has, byte-identical output.

The input is a hand-built summary.json, validated against the shipped schema, and the demo protocol.
"""

from __future__ import annotations

import copy
import json
import re
from importlib import resources
from pathlib import Path

import jsonschema
import pytest
from support.tiny import REPOSITORY

from regimewise.appendix.checklist import (
    ANSWERS,
    AUTHORS,
    PARTLY,
    SECTION_TITLES,
    STATUS_WORDS,
    build_checklist,
    render_checklist_html,
)
from regimewise.appendix.guidelines import GOTTESMAN, GUIDELINES, RECORD, TARGET
from regimewise.cautions import REPORT_CAUTIONS
from regimewise.io import dumps_json
from regimewise.protocol.loading import load_protocol

PROTOCOL = load_protocol(REPOSITORY / "config" / "protocol.yaml").protocol
FILES = {
    "validate/validation.json",
    "behaviour/behaviour.json",
    "regime/regime.json",
    "regime/recommendations.parquet",
    "evaluate/values.json",
    "bootstrap/intervals.json",
    "describe/cohort.json",
    "sensitivity/sensitivity.json",
    "survival/survival.json",
    "report/report.html",
    "report/summary.json",
    "report/appendix/provenance.json",
}


def _estimate(estimator, value, ess, verdict="supported"):
    return {
        "estimator": estimator,
        "value": value,
        "se": None if value is None else 0.5,
        "ess": ess,
        "n_following": 40 if value is not None else 0,
        "n_episodes": 400,
        "low_ess": ess < 30,
        "verdict": verdict,
        "verdict_reason": None,
    }


def _strategy_row(parameter, difference, ess):
    return {
        "name": f"partial_adoption_{parameter}",
        "family": "partial_adoption",
        "parameter": parameter,
        "words": f"if the learned regime had been followed at {100 * parameter:.0f}% of reviews",
        "estimator": "wdr",
        "value": -17.44 + difference,
        "difference": difference,
        "low": difference - 1,
        "high": difference + 1,
        "ess": ess,
        "share_changed": parameter / 2,
        "verdict": "supported",
    }


def _summary() -> dict:
    """A summary.json shaped like the demo's (numbers invented for the test), valid under the shipped schema."""
    step = {"auc": 0.6, "brier": 0.4, "ess_truncated": 100.0, "share_taken_below_support": 0.01}
    return {
        "schema_version": "2",
        "study": {"title": "Checklist test study", "version": "1.0", "run_name": "demo"},
        "caution": REPORT_CAUTIONS[0],
        "cohort": {"episodes": 400, "patients": 362, "decisions": 3200},
        "validation": {
            "rows_read": 3215,
            "decisions_dropped_missing": 15,
            "episodes_dropped_missing": "<11",
            "values_filled_missing": 0,
            "acknowledged_columns": [],
        },
        "usual_care_model": {
            "auc": 0.67,
            "brier": 0.38,
            "kind": "multinomial_logit",
            "folds": 1,
            "converged": True,
            "by_step": {
                "0": {**step, "ess": 111.8, "overlap": "adequate"},
                "1": {**step, "ess": 39.4, "overlap": "thin"},
            },
            "inverse_probability_weights": {},
            "overlap_rule": "common practice, no source",
            "baseline_states_imbalanced": 2,
        },
        "regime": {
            "support_threshold": 0.05,
            "decisions_changed_by_support": 936,
            "share_differs_from_taken": 0.44,
            "cross_fit": {"folds": 2, "agreement": 0.45},
            "readable_tree_fidelity": 0.6,
        },
        "values": {
            "learned": {"wdr": _estimate("wdr", -12.5, 1.1)},
            "usual_care": {"wdr": _estimate("wdr", -17.44, 400.0)},
            "always_step_up": {"wdr": _estimate("wdr", None, 0.0, "not identified")},
            "partial_adoption_0.4": {"wdr": _estimate("wdr", -15.2, 45.8)},
        },
        "usual_care_observed": {"mean_return": -17.44, "se": 0.51, "n_episodes": 400},
        "contrasts": [],
        "minimum_reliable_ess": 30.0,
        "bootstrap": {
            "level": 0.95,
            "method": "percentile",
            "replicates": 20,
            "replicates_used": 19,
            "replicates_failed": 1,
            "contrasts": [],
        },
        "headline": {
            "strategy": "partial_adoption_0.4",
            "label": "Learned regime at 40% of reviews",
            "words": "if the learned regime had been followed at 40% of reviews",
            "prespecified": True,
            "estimator": "wdr",
            "difference": 2.2,
            "low": 1.2,
            "high": 3.2,
            "level": 0.95,
            "ess": 45.8,
            "verdict": "supported",
            "sentence": "Headline sentence of the test.",
            "better": "higher",
        },
        "learned_regime_sentence": "Learned regime sentence of the test.",
        "strategies": {
            "prespecified": True,
            "headline": _strategy_row(0.4, 2.2, 45.8),
            "table": [_strategy_row(0.2, 1.1, 200.0), _strategy_row(0.4, 2.2, 45.8)],
        },
        "sensitivity": {
            "estimator": "wis",
            "ess": 45.8,
            "low_ess": False,
            "level": 0.95,
            "tipping_point": 1.4375,
            "gamma_max": 5.0,
            "table": [],
            "sentence": "Sensitivity sentence of the test.",
        },
        "sweep": None,
        "survival": {
            "horizon_days": 730.0,
            "times": [365.0, 730.0],
            "level": 0.95,
            "headline_strategy": "partial_adoption_0.4",
            "strategies": {
                "partial_adoption_0.4": {
                    "label": "Learned regime at 40% of reviews",
                    "survival": [0.97, 0.95],
                    "risk_difference": [-0.01, -0.02],
                    "rmst": 700.0,
                    "rmst_difference": 3.0,
                    "unreliable_from": 182.0,
                    "reliable_at": [False, False],
                }
            },
            "sentence": "Survival sentence of the test.",
        },
        "protocol_sha256": "a" * 64,
        "inputs_sha256": {"decisions": "b" * 64, "episodes": "c" * 64},
        "root_seed": 20261201,
    }


def _bare(summary: dict) -> dict:
    """The same run without the optional report sections (no cohort, strategies, sensitivity, survival)."""
    bare = copy.deepcopy(summary)
    bare["strategies"] = bare["sensitivity"] = bare["survival"] = None
    del bare["usual_care_model"]["overlap_rule"], bare["usual_care_model"]["baseline_states_imbalanced"]
    return bare


@pytest.fixture(params=["full", "bare"])
def summary(request):
    full = _summary()
    return full if request.param == "full" else _bare(full)


def _items(checklist, key):
    return next(g for g in checklist["guidelines"] if g["key"] == key)["items"]


def _report_ids() -> dict[str, str]:
    """Every id in the report's templates, with the heading text where the id is on a heading."""
    folder = resources.files("regimewise.report").joinpath("templates")
    pages = [folder.joinpath("report.html"), *folder.joinpath("sections").iterdir()]
    text = "\n".join(page.read_text(encoding="utf-8") for page in pages if page.name.endswith(".html"))
    ids = dict.fromkeys(re.findall(r'id="([^"{}]+)"', text), None)
    ids.update(re.findall(r'<h2 id="([^"]+)">([^<]+)</h2>', text))
    return ids


# ---------------------------------------------------------------------------------------------- the item lists
def test_the_input_summary_is_valid_under_the_shipped_schema(summary):
    schema = json.loads(resources.files("regimewise.report").joinpath("summary.schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(summary)


def test_target_has_its_21_items_with_the_published_sub_items():
    numbers = [i.number for i in TARGET.items if not i.number.startswith("X")]
    # 21 items in 6 sections: the TARGET statement's abstract (Cashin et al. 2025, JAMA 334:1084; BMJ 390:e087179).
    assert sorted({int(re.match(r"\d+", n).group()) for n in numbers}) == list(range(1, 22))
    assert {i.section.split(":")[0] for i in TARGET.items if not i.number.startswith("X")} == {
        "Abstract", "Introduction", "Methods", "Results", "Discussion", "Other information"
    }  # fmt: skip
    # Sub-items and their order: the published checklist table as given by two secondary reproductions of it, which
    # agree; the table itself was not read here.
    assert numbers == [
        "1a", "1b", "1c", "2", "3", "4", "5",
        "6a", "6b", "6c", "6d", "6e", "6f", "6g", "6h",
        "7a", "7b", "7c", "7d", "7e", "7f", "7g(i)", "7g(ii)", "7h(i)", "7h(ii)",
        "8", "9", "10", "11", "12", "13", "14", "15", "16", "17", "18", "19", "20", "21",
    ]  # fmt: skip
    assert len(numbers) == 39
    # The additions for dynamic strategies are ours, marked X, and TARGET's scope note says so.
    assert [i.number for i in TARGET.items if i.number.startswith("X")] == ["X1", "X2", "X3", "X4", "X5", "X6"]
    assert "beyond" in TARGET.scope_note and "not part of TARGET" in TARGET.scope_note


def test_record_has_its_13_items_numbered_after_strobe():
    # 13 items: the RECORD statement's abstract (Benchimol et al. 2015, PLoS Med 12:e1001885); numbers: its
    # checklist table as reproduced in PMC5434499 (Table 1) and PMC11064235.
    assert [i.number for i in RECORD.items] == [
        "1.1", "1.2", "1.3", "6.1", "6.2", "6.3", "7.1", "12.1", "12.2", "12.3", "13.1", "19.1", "22.1"
    ]  # fmt: skip
    # Each extends a STROBE item, numbered 1 to 22 (STROBE statement, von Elm et al. 2007).
    assert all(1 <= int(i.number.split(".")[0]) <= 22 for i in RECORD.items)


def test_gottesman_has_its_three_questions():
    # Three question headings in the Comment (Gottesman et al. 2019, Nat Med 25:16), as quoted by two secondary
    # notes; the Comment was not read here, and it numbers nothing: Q1-Q3 are ours.
    assert [i.number for i in GOTTESMAN.items] == ["Q1", "Q2", "Q3"]
    assert "variable" in GOTTESMAN.items[0].wording and "effective sample" in GOTTESMAN.items[1].wording
    assert "prospectively" in GOTTESMAN.items[2].wording


def test_every_answer_belongs_to_an_item():
    items = {(g.key, i.number) for g in GUIDELINES for i in g.items}
    assert set(ANSWERS) <= items


# ---------------------------------------------------------------------------------------------- statuses and answers
def test_every_item_has_a_status_and_the_published_number(summary):
    checklist = build_checklist(summary, PROTOCOL, FILES)
    for guideline, built in zip(GUIDELINES, checklist["guidelines"], strict=True):
        assert [i["number"] for i in built["items"]] == [i.number for i in guideline.items]
        assert all(i["status"] in STATUS_WORDS for i in built["items"])
        assert sum(built["tally"].values()) == len(guideline.items)


def test_items_for_the_authors_carry_no_tool_answer(summary):
    checklist = build_checklist(summary, PROTOCOL, FILES)
    for guideline in checklist["guidelines"]:
        for item in guideline["items"]:
            if item["status"] == AUTHORS:
                assert item["answer"] is None and item["report_section"] is None
                assert item["files"] == [] and item["authors_add"] is None
            else:
                assert item["answer"] and item["report_section"]
                assert (item["authors_add"] is not None) == (item["status"] == PARTLY)
    # What a run cannot know: ethics, registration, funding, conflicts (TARGET 17, 18, 20, 21), access (RECORD 12.1).
    target, record = _items(checklist, "target"), _items(checklist, "record")
    assert {i["status"] for i in target if i["number"] in {"17", "18", "20", "21"}} == {AUTHORS}
    assert next(i for i in record if i["number"] == "12.1")["status"] == AUTHORS


def test_answers_point_to_sections_the_report_renders(summary):
    checklist = build_checklist(summary, PROTOCOL, FILES)
    ids = _report_ids()
    pointed = {i["report_section"] for g in checklist["guidelines"] for i in g["items"] if i["report_section"]}
    assert pointed <= set(ids)
    assert pointed <= set(SECTION_TITLES)
    absent = {"section-cohort", "section-strategies", "section-sensitivity", "section-survival", "section-sweep"}
    if summary["survival"] is None:  # the bare run: the report has none of its optional sections
        assert not pointed & absent


def test_section_titles_equal_the_report_headings():
    ids = _report_ids()
    for section, title in SECTION_TITLES.items():
        assert section in ids
        if ids[section] is not None:
            assert ids[section] == title


def test_answers_are_drawn_from_the_summary():
    summary = _summary()
    summary["headline"]["ess"] = 123.4
    summary["sensitivity"]["sentence"] = "A sentence only this test writes."
    checklist = build_checklist(summary, PROTOCOL, FILES)
    target, questions = _items(checklist, "target"), _items(checklist, "gottesman")
    assert "123.4" in next(i for i in questions if i["number"] == "Q2")["answer"]
    assert next(i for i in target if i["number"] == "14")["answer"] == "A sentence only this test writes."
    assert "1.44" in next(i for i in questions if i["number"] == "Q1")["answer"]  # Γ* 1.4375 as the report rounds
    assert "always step up" in next(i for i in target if i["number"] == "X5")["answer"]
    assert "day 182" in next(i for i in target if i["number"] == "10")["answer"]
    files = next(i for i in target if i["number"] == "7c")["files"]
    assert files == ["behaviour/behaviour.json"]


def test_a_sweep_and_a_regime_evaluated_without_cross_fitting_are_reported():
    summary = _summary()
    summary["sweep"] = {"axes": ["support_threshold"], "sentence": "Sweep sentence of the test."}
    summary["regime"]["cross_fit"] = {"folds": 1}
    target = _items(build_checklist(summary, PROTOCOL, FILES), "target")
    assert next(i for i in target if i["number"] == "14")["answer"].endswith("Sweep sentence of the test.")
    assert "support threshold" in next(i for i in target if i["number"] == "7h(ii)")["answer"]
    assert "optimistic" in next(i for i in target if i["number"] == "X6")["answer"]
    assert "on the records it was learned from" in next(i for i in target if i["number"] == "7h(i)")["answer"]


def test_only_files_of_the_run_are_named(summary):
    few = {"report/summary.json"}
    checklist = build_checklist(summary, PROTOCOL, few)
    named = {f for g in checklist["guidelines"] for i in g["items"] for f in i["files"]}
    assert named <= few


def test_absolute_run_files_are_refused(summary):
    with pytest.raises(ValueError, match="relative"):
        build_checklist(summary, PROTOCOL, {"/tmp/run/report/summary.json"})


# ---------------------------------------------------------------------------------------------- bytes
def test_two_builds_give_identical_bytes(summary):
    first = build_checklist(summary, PROTOCOL, FILES)
    second = build_checklist(copy.deepcopy(summary), PROTOCOL, sorted(FILES, reverse=True))
    assert dumps_json(first).encode() == dumps_json(second).encode()  # the bytes regimewise.io.write_json writes
    assert render_checklist_html(first) == render_checklist_html(second)
    # Nothing of the machine: the protocol was read from the repository, whose absolute path must not appear.
    for text in (dumps_json(first), render_checklist_html(first)):
        assert str(REPOSITORY) not in text and str(Path.home()) not in text


def test_the_page_is_self_contained_in_the_report_style(summary):
    checklist = build_checklist(summary, PROTOCOL, FILES)
    page = render_checklist_html(checklist)
    css = resources.files("regimewise.report").joinpath("templates", "report.css").read_text(encoding="utf-8")
    assert css in page
    assert "<link" not in page and "src=" not in page and "http" not in page
    assert checklist["caution"] in page.replace("&#39;", "'")
    for guideline in checklist["guidelines"]:
        for item in guideline["items"]:
            if item["report_section"]:
                assert f'href="../report.html#{item["report_section"]}"' in page
