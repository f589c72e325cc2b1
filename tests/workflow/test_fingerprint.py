"""Stage fingerprints are derived from the imports: editing a module reruns every stage that needs it.

The check edits, in a temporary copy of the package, each module in turn and recomputes every rule's
fingerprint. The transitive closure is cross-checked with the standard library's :mod:`modulefinder`, an import
resolver independent of the project's own.
"""

from __future__ import annotations

import ast
import modulefinder
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import regimewise
from regimewise.workflow.fingerprint import (
    _segment,
    _stage_sources,
    import_graph,
    stage_code_hashes,
    stage_files,
    stage_modules,
)
from regimewise.workflow.stages import HEAVY_LIBRARIES, STAGES

PACKAGE = Path(regimewise.__file__).parent


@pytest.fixture(scope="module")
def copy(tmp_path_factory):
    root = tmp_path_factory.mktemp("package") / "regimewise"
    shutil.copytree(PACKAGE, root, ignore=shutil.ignore_patterns("__pycache__"))
    return root


def test_editing_a_module_changes_exactly_the_stages_that_need_it(copy):
    graph = import_graph(copy)
    modules = graph[0]
    before = stage_code_hashes(copy)
    files = {rule: set(stage_files(rule, copy, graph)) for rule in before}
    for name, path in modules.items():
        original = path.read_bytes()
        path.write_bytes(original + b"\n# edited by the fingerprint test\n")
        try:
            after = stage_code_hashes(copy)
        finally:
            path.write_bytes(original)
        for rule in before:
            changed = after[rule] != before[rule]
            assert changed == (path in files[rule]), f"editing {name}: {rule} fingerprint changed={changed}"


@pytest.mark.parametrize(
    ("module", "rules"),
    [  # the cases the hand-kept list missed (issue: stale results after a code edit)
        ("regimewise.core.quantiles", {"combine", "sweep_spec", "sweep"}),
        ("regimewise.sensitivity.bounds", {"bootstrap_shard", "combine", "sweep_spec"}),
        (
            "regimewise.usual_care.fitting",
            {"behaviour", "regime_fit", "evaluate_learned", "bootstrap_shard", "sweep_spec"},
        ),
        ("regimewise.core.weighting", {"behaviour", "evaluate_fixed", "combine", "bootstrap_shard", "describe"}),
    ],
)
def test_the_modules_the_old_list_missed_now_count(module, rules):
    for rule in rules:
        assert module in stage_modules(rule), f"{module} should feed {rule}"


def test_a_template_edit_reruns_the_report_and_appendix_only(copy):
    template = copy / "report" / "templates" / "report.html"
    before = stage_code_hashes(copy)
    original = template.read_bytes()
    template.write_bytes(original + b"\n")
    try:
        after = stage_code_hashes(copy)
    finally:
        template.write_bytes(original)
    # the appendix renders its checklist page with the report's stylesheet from the same templates folder (and
    # lists the report in its manifest), and so does the self-check's page; no stage before the report may rerun,
    # nor a self-check cohort job
    assert {rule for rule in before if before[rule] != after[rule]} == {"report", "appendix", "selfcheck"}


def test_closure_agrees_with_the_standard_library_module_finder(copy, tmp_path):
    # Reference: modulefinder (Python standard library) resolves the imports of a script that imports the modules
    # each stage function draws names from; every package module it finds must be in the stage's fingerprint.
    graph = import_graph(copy)
    for rule in ("validate", "regime", "bootstrap_shard", "report"):
        _, needed = _stage_sources(rule, graph[0])
        script = tmp_path / f"{rule}.py"
        script.write_text("".join(f"import {name}\n" for name in sorted(needed)))
        finder = modulefinder.ModuleFinder(path=[str(copy.parent)])
        finder.run_script(str(script))
        found = {name for name in finder.modules if name.split(".")[0] == "regimewise"}
        assert found <= set(stage_modules(rule, copy, graph)), rule


def test_definition_sources_are_the_standard_library_segments():
    # Reference: ast.get_source_segment (Python standard library); the fingerprint splits the lines once instead.
    path = PACKAGE / "workflow" / "stages.py"
    source = path.read_text(encoding="utf-8")
    lines = source.splitlines(keepends=True)
    nodes = ast.parse(source).body
    assert len(nodes) > 20
    for node in nodes:
        assert _segment(lines, node) == ast.get_source_segment(source, node)
    # and a statement that starts inside a line, with a multi-byte character before it
    text = "x = 'é'; y = (1,\n     2)\n"
    node = ast.parse(text).body[1]
    assert _segment(text.splitlines(keepends=True), node) == ast.get_source_segment(text, node) == "y = (1,\n     2)"


def test_a_rule_is_fingerprinted_by_the_function_its_stages_table_names(copy):
    # the behaviour rule calls behaviour_fit_stage (behaviour_stage, the whole stage in one call, serves tests and
    # benchmarks): an edit of that function must rerun the behaviour rule and nothing else
    path = copy / "workflow" / "stages.py"
    original = path.read_text(encoding="utf-8")
    head = "def behaviour_fit_stage(protocol, decisions, proba, model, mapped=None):\n"
    assert original.count(head) == 1
    before = stage_code_hashes(copy)
    path.write_text(original.replace(head, head + "    pass  # edited by the fingerprint test\n"), encoding="utf-8")
    try:
        after = stage_code_hashes(copy)
    finally:
        path.write_text(original, encoding="utf-8")
    assert set(before) == set(STAGES)
    assert {rule for rule in before if before[rule] != after[rule]} == {"behaviour"}


@pytest.mark.parametrize(
    "module",
    [
        "regimewise.workflow.stages",  # every job imports it
        # what the short jobs use: the joins of evaluate and sensitivity, the bootstrap's intervals, the
        # regime join, the appendix, and validation (alone on the machine at the start of a run)
        "regimewise.evaluation.values",
        "regimewise.bootstrap.intervals",
        "regimewise.sensitivity.analysis",
        "regimewise.appendix.assemble",
        "regimewise.appendix.checklist",  # imported by the appendix job when it writes the checklist page
        "regimewise.data.validate",
    ],
)
def test_a_job_starts_without_the_heavy_libraries(module):
    # a fresh interpreter: this test process has long imported them all
    code = f"import sys, {module}\nprint(' '.join(m for m in {HEAVY_LIBRARIES!r} if m in sys.modules))"
    loaded = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert loaded == [], f"importing {module} loads {loaded}; import them inside the functions that use them"
