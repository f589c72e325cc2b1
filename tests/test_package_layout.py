"""The package's import graph, read from the source with ``ast``: data flows one way through the subpackages.

Fails on an import loop, an import of a subpackage above the importer in :data:`LAYERS`, a private name
imported from another module, or a package import inside a function (a way to dodge a loop) unless
:data:`DEFERRED` lists it with its reason. The loop and layer checks read imports anywhere in a module, deferred
ones included.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import regimewise
from regimewise.workflow.fingerprint import module_imports, package_modules

PACKAGE = Path(regimewise.__file__).parent

# Lowest first: a module may import from its own layer's modules and from layers below it, never above.
LAYERS = tuple(
    "__init__ errors cautions estimators protocol io core data usual_care describe regime evaluation survival "
    "sensitivity bootstrap report appendix demo selfcheck workflow cli".split()
)


def layer(module: str) -> int:
    """Layer index of a dotted module name under the package (``regimewise.core.folds`` -> ``core``)."""
    parts = module.split(".")
    top = parts[1] if len(parts) > 1 else "__init__"
    if top not in LAYERS:
        pytest.fail(f"{module}: subpackage {top!r} is not in LAYERS; add it where its imports put it")
    return LAYERS.index(top)


MODULES = package_modules(PACKAGE)

# (module, function) -> why its package import waits until the function runs. Only start-up time justifies one:
# every `regimewise` command and every Snakefile read imports these modules, and the deferred import pulls in
# the report's machinery (matplotlib, statsmodels), several seconds, for one command or one file.
DEFERRED = {
    ("regimewise.appendix.assemble", "_checklist"): "the checklist renders with the report's figures module",
    ("regimewise.cli", "_rerender_report"): "only `verify --report-only` runs the report stage in-process",
    # about 3 s more per command, measured with `python -c "import regimewise.cli, regimewise.selfcheck.run"`
    ("regimewise.cli", "cmd_selfcheck"): "only `selfcheck` fits and evaluates models in-process",
}
# Modules each of whose functions may defer its package imports, and why.
DEFERRED_MODULES = {
    # every workflow job imports it: 2.3 s of CPU before any work when it imported every stage's modules, most of
    # the short jobs' time (tests/workflow/test_fingerprint.py checks that it loads none of HEAVY_LIBRARIES)
    "regimewise.workflow.stages": "a stage imports the modules that bring the heavy libraries it needs",
}


def test_every_module_has_a_layer():
    for name in MODULES:
        layer(name)


@pytest.mark.parametrize("name", sorted(MODULES))
def test_imports_go_down_only(name):
    for imported, _ in module_imports(MODULES[name], name, MODULES):
        assert layer(imported) <= layer(name), f"{name} imports {imported}, which sits above it"


@pytest.mark.parametrize("name", sorted(MODULES))
def test_no_private_names_across_modules(name):
    for imported, names in module_imports(MODULES[name], name, MODULES):
        private = [n for n in names if n.startswith("_") and n != "__version__"]
        assert not private, f"{name} imports private {private} from {imported}"


@pytest.mark.parametrize("name", sorted(MODULES))
def test_no_package_imports_inside_functions(name):
    tree = ast.parse(MODULES[name].read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            for inner in ast.walk(node):
                if isinstance(inner, ast.ImportFrom) and (inner.level or (inner.module or "").startswith("regimewise")):
                    if (name, node.name) not in DEFERRED and name not in DEFERRED_MODULES:
                        pytest.fail(f"{name}:{inner.lineno} imports the package inside {node.name}()")


def test_every_deferred_import_is_still_there():
    for module, function in DEFERRED:
        tree = ast.parse(MODULES[module].read_text(encoding="utf-8"))
        found = [
            inner
            for node in ast.walk(tree)
            if isinstance(node, ast.FunctionDef) and node.name == function
            for inner in ast.walk(node)
            if isinstance(inner, ast.ImportFrom)
        ]
        assert found, f"{module}.{function}() no longer defers an import; remove it from DEFERRED"
    for module in DEFERRED_MODULES:
        tree = ast.parse(MODULES[module].read_text(encoding="utf-8"))
        deferred = [
            node.name
            for node in ast.walk(tree)
            if isinstance(node, ast.FunctionDef) and any(isinstance(i, ast.ImportFrom) for i in ast.walk(node))
        ]
        assert deferred, f"no function of {module} defers an import; remove it from DEFERRED_MODULES"


def test_no_import_loops():
    graph = {name: {imp for imp, _ in module_imports(path, name, MODULES)} for name, path in MODULES.items()}
    state: dict[str, int] = {}

    def visit(node, trail):
        state[node] = 1
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                loop = trail[trail.index(nxt) :] + [nxt]
                pytest.fail("import loop: " + " -> ".join(loop))
            if nxt not in state:
                visit(nxt, [*trail, nxt])
        state[node] = 2

    for name in sorted(graph):
        if name not in state:
            visit(name, [name])


def test_the_check_sees_a_planted_loop(tmp_path):
    """The graph reader finds imports in every form the package uses (guards the test itself)."""
    (tmp_path / "a.py").write_text("from regimewise.b import thing\nfrom . import c\n")
    modules = {"regimewise.a": tmp_path / "a.py", "regimewise.b": tmp_path / "b.py", "regimewise.c": tmp_path / "c.py"}
    found = {imp for imp, _ in module_imports(modules["regimewise.a"], "regimewise.a", modules)}
    assert found == {"regimewise.b", "regimewise.c"}
