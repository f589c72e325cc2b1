"""checklist.json and checklist.html: the run mapped to three reporting checklists.

TARGET (Cashin et al. 2025) for studies emulating a target trial, RECORD (Benchimol et al. 2015) for routinely
collected health data, and the three questions of Gottesman et al. (2019) for treatment policies learned from
observational data. Every item carries a status: filled by the tool (with the answer drawn from summary.json and
the protocol and the report section that shows it), partly filled (the tool's part, and what the authors must
add), or for the authors to complete (nothing the run can know: ethics, registration, funding, conflicts, data
access, the abstract and the discussion). Where each item list was checked is in :mod:`.guidelines`.

The dictionary holds no time, host name or absolute path: the same summary, protocol and file list give the same
bytes.
"""

from __future__ import annotations

from importlib import resources
from pathlib import PurePosixPath

import jinja2

from regimewise.appendix.answers import METHODS, Answer, Run, report_sections
from regimewise.appendix.findings import FINDINGS
from regimewise.appendix.guidelines import GUIDELINES, Guideline, Item
from regimewise.report.stylesheet import report_stylesheet

CHECKLIST_SCHEMA_VERSION = "1"
FILLED = "filled by the tool"
PARTLY = "partly filled by the tool"
AUTHORS = "for the authors to complete"
STATUS_WORDS = {
    FILLED: "the run answers the item; the report section named shows it",
    PARTLY: "the run answers part of the item; the authors add what is named",
    AUTHORS: "nothing in the run can answer the item",
}
ANSWERS = {**METHODS, **FINDINGS}

# The report's section headings, by the id each carries in report/templates (a test compares them).
SECTION_TITLES = {
    "summary-panel": "Summary",
    "section-reading": "How to read this report",
    "section-protocol": "1. Protocol",
    "section-validation": "2. Records and validation",
    "section-usual-care": "3. Usual-care model",
    "section-cohort": "3b. Cohort, balance and overlap",
    "section-regime": "4. The learned regime in words",
    "section-compared": "4. The strategies compared",
    "section-values": "5. Values of the regimes",
    "section-strategies": "5b. Strategies the records can support",
    "section-sensitivity": "6. Sensitivity to unmeasured confounding",
    "section-sweep": "6b. Specification sweep",
    "section-survival": "6c. Survival under each strategy",
    "section-provenance": "Appendix: provenance",
    "glossary": "Glossary",
}


# ---------------------------------------------------------------------------------------------- checklist.json
def build_checklist(summary: dict, protocol, run_files: set[str]) -> dict:
    """The checklist of one run: ``summary`` is its report/summary.json, ``protocol`` the validated protocol and
    ``run_files`` the paths of its artifacts relative to the run's folder (forward slashes)."""
    run = Run(summary, protocol, _relative_files(run_files), report_sections(summary))
    return {
        "schema_version": CHECKLIST_SCHEMA_VERSION,
        "study": {key: summary["study"][key] for key in ("title", "version", "run_name")},
        "caution": summary["caution"],
        "statuses": STATUS_WORDS,
        "guidelines": [_guideline(guideline, run) for guideline in GUIDELINES],
    }


def _relative_files(run_files) -> frozenset[str]:
    files = frozenset(str(PurePosixPath(f)) for f in run_files)
    wrong = sorted(f for f in files if PurePosixPath(f).is_absolute() or ".." in PurePosixPath(f).parts)
    if wrong:
        raise ValueError(f"run_files must be relative to the run's folder; got {wrong[0]!r}")
    return files


def _guideline(guideline: Guideline, run: Run) -> dict:
    items = [_item(guideline.key, item, run) for item in guideline.items]
    return {
        "key": guideline.key,
        "title": guideline.title,
        "citation": guideline.citation,
        "source_table": guideline.source_table,
        "wording": guideline.wording,
        "checked_against": guideline.checked_against,
        "counts": guideline.counts,
        "scope_note": guideline.scope_note,
        "tally": {status: sum(i["status"] == status for i in items) for status in STATUS_WORDS},
        "items": items,
    }


def _item(key: str, item: Item, run: Run) -> dict:
    compute = ANSWERS.get((key, item.number))
    answer: Answer | None = None if compute is None else compute(run)
    row = {"number": item.number, "section": item.section, "wording": item.wording}
    if answer is None:
        return {**row, "status": AUTHORS, "answer": None, "report_section": None, "files": [], "authors_add": None}
    if answer.section not in run.sections:
        raise ValueError(f"{key} item {item.number} points to {answer.section!r}, which this run's report lacks")
    files = sorted(f for f in run.files if any(f == c or f.endswith("/" + c) for c in answer.files))
    return {
        **row,
        "status": PARTLY if answer.authors_add else FILLED,
        "answer": answer.text,
        "report_section": answer.section,
        "files": files,
        "authors_add": answer.authors_add,
    }


# ---------------------------------------------------------------------------------------------- checklist.html
def render_checklist_html(checklist: dict, *, report_href: str = "../report.html") -> str:
    """checklist.html: one self-contained page in the report's style; ``report_href`` is the report's address
    relative to the page (the default suits a page in report/appendix/)."""
    environment = jinja2.Environment(
        loader=jinja2.FunctionLoader(
            lambda name: resources.files("regimewise.appendix").joinpath("templates", name).read_text(encoding="utf-8")
        ),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    return environment.get_template("checklist.html").render(
        checklist=checklist,
        stylesheet=report_stylesheet(),
        report_href=report_href,
        titles=SECTION_TITLES,
        authors=AUTHORS,
    )
