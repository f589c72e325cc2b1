"""Code fingerprints of the workflow's rules, derived from the package's own imports.

Snakemake reruns a job when its ``params`` change but does not see the modules a script imports, so every rule
carries ``params: code=stage_code_hash("<rule>")``. The fingerprint is derived, never listed by hand: it hashes
the source of the rule's stage function in :mod:`regimewise.workflow.stages` (the one its ``STAGES`` table names
for the rule) and of the module-level helpers it uses there, every package module that function's names come from,
the transitive closure of their imports read from the source with :mod:`ast`, and the data files (templates)
beside those modules. Editing any module a stage needs, directly or not, changes that stage's fingerprint; editing
a module it does not need changes nothing.
"""

from __future__ import annotations

import ast
import hashlib
from functools import cache
from pathlib import Path

from regimewise import __version__

PACKAGE_DIR = Path(__file__).resolve().parent.parent
PACKAGE = "regimewise"
STAGES_MODULE = "regimewise.workflow.stages"
DATA_SUFFIXES = (".html", ".json", ".yaml", ".css")


def package_modules(root: Path = PACKAGE_DIR) -> dict[str, Path]:
    """Dotted name -> source path of every module of the package under ``root``."""
    modules = {}
    for path in sorted(root.rglob("*.py")):
        parts = path.relative_to(root).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        modules[".".join((PACKAGE, *parts))] = path
    return modules


def _absolute(node: ast.ImportFrom, importer: str, is_package: bool) -> str:
    if not node.level:
        return node.module or ""
    base = importer.split(".")
    base = base if is_package else base[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join([*base, node.module] if node.module else base)


def module_imports(path: Path, importer: str, modules: dict) -> list[tuple[str, tuple[str, ...]]]:
    """(imported package module, names taken from it) for every package import of one module, anywhere in it.

    ``from regimewise.x import y`` where ``y`` is itself a module counts as an import of ``regimewise.x.y``.
    """
    path = Path(path)
    source = path.read_text(encoding="utf-8")
    return list(_imports_in(source, importer, path.name == "__init__.py", tuple(sorted(modules))))


@cache
def _imports_in(source: str, importer: str, is_package: bool, module_names: tuple[str, ...]) -> tuple:
    # Parsed once per distinct source text: a fingerprint check after editing one module reparses that module only.
    modules = set(module_names)
    found = []
    for node in _statements(ast.parse(source).body):
        if isinstance(node, ast.Import):
            found += [(a.name, ()) for a in node.names if a.name in modules]
        elif isinstance(node, ast.ImportFrom):
            origin = _absolute(node, importer, is_package)
            if origin.split(".")[0] != PACKAGE:
                continue
            names = tuple(a.name for a in node.names)
            found += [(f"{origin}.{n}", ()) for n in names if f"{origin}.{n}" in modules]
            plain = tuple(n for n in names if f"{origin}.{n}" not in modules)
            if plain and origin in modules:
                found.append((origin, plain))
    return tuple(found)


def _statements(nodes):
    """Every statement in ``nodes`` and in the statement lists nested in them (bodies of functions, classes, loops,
    conditions, ``with``, ``try`` and its handlers, ``match`` cases): where an import can stand, without visiting
    the expressions, which ``ast.walk`` would (about ten times the nodes)."""
    for node in nodes:
        yield node
        for field in ("body", "orelse", "finalbody", "handlers", "cases"):
            children = getattr(node, field, None)
            if isinstance(children, list):  # a lambda's or a conditional expression's body is one expression
                yield from _statements(children)


def import_graph(root: Path = PACKAGE_DIR) -> tuple[dict[str, Path], dict[str, set[str]]]:
    """The package's modules and, for each, the package modules it imports (parents of submodules included)."""
    modules = package_modules(root)
    graph = {}
    for name, path in modules.items():
        imported = {module for module, _ in module_imports(path, name, modules)}
        graph[name] = imported | {m.rpartition(".")[0] for m in imported if m.rpartition(".")[0] in modules}
    return modules, graph


def import_closure(start: set[str], graph: dict[str, set[str]]) -> set[str]:
    """Every package module reachable from ``start`` through imports (``start`` included)."""
    seen, todo = set(), list(start)
    while todo:
        name = todo.pop()
        if name in seen or name not in graph:
            continue
        seen.add(name)
        todo += graph[name]
        parent = name.rpartition(".")[0]
        if parent in graph:  # importing a submodule runs its package's __init__
            todo.append(parent)
    return seen


def stage_rules(modules: dict) -> tuple[str, ...]:
    """Rule names: the keys of the stages module's ``STAGES`` table."""
    return tuple(registered_stages(modules))


def registered_stages(modules: dict) -> dict[str, str]:
    """{rule: the name of its stage function}, read from the ``STAGES`` table of the stages module (a dict literal
    of rule-name strings to function names): the function the dispatcher calls is the one fingerprinted, whatever
    its name (a stage split into jobs keeps its one-call function beside the jobs' functions)."""
    return dict(_stages_table(modules[STAGES_MODULE].read_text(encoding="utf-8")))


@cache
def _stages_table(source: str) -> tuple[tuple[str, str], ...]:
    """:func:`registered_stages` of the stages module's source, parsed once per source text (the fingerprint asks
    for it once per rule and per module it looks at)."""
    for node in ast.parse(source).body:
        targets = [t.id for t in getattr(node, "targets", []) if isinstance(t, ast.Name)]
        if isinstance(node, ast.Assign) and targets == ["STAGES"] and isinstance(node.value, ast.Dict):
            return tuple((key.value, value.id) for key, value in zip(node.value.keys, node.value.values))
    raise KeyError(f"{STAGES_MODULE} has no STAGES table")


def _stage_sources(rule: str, modules: dict) -> tuple[list[str], set[str]]:
    """Source segments of the rule's stage function (:func:`registered_stages`) and the stages module's helpers it
    uses; the modules its names need."""
    path = modules[STAGES_MODULE]
    top, origin = _stages_index(path.read_text(encoding="utf-8"), tuple(sorted(modules.items())))
    function = registered_stages(modules).get(rule)
    if function not in top:
        raise KeyError(f"{STAGES_MODULE} has no stage function for rule {rule!r} in its STAGES table")
    segments, needed, seen, todo = [], set(), set(), [function]
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        if name in origin:
            needed.add(origin[name])
        elif name in top:
            segment, used = top[name]
            segments.append(segment)
            todo += used
    return segments, needed


@cache
def _stages_index(source: str, modules: tuple[tuple[str, Path], ...]) -> tuple[dict, dict]:
    """The stages module parsed once: top-level name -> (its source segment, the names it uses, in walk order);
    imported name -> the package module it comes from."""
    modules = dict(modules)
    lines = source.splitlines(keepends=True)
    top = {}
    for node in ast.parse(source).body:
        used = [n.id for n in ast.walk(node) if isinstance(n, ast.Name)]
        for name in _defined_names(node):
            top[name] = (_segment(lines, node), used)
    path = modules[STAGES_MODULE]
    imports = _imports_in(source, STAGES_MODULE, path.name == "__init__.py", tuple(sorted(modules)))
    origin = {name: imported for imported, names in imports for name in names}
    return top, origin


def _segment(lines: list[str], node: ast.stmt) -> str:
    """The source of a top-level statement, as :func:`ast.get_source_segment` gives it (its offsets are UTF-8 bytes),
    from lines split once."""
    first, last = node.lineno - 1, node.end_lineno - 1
    if first == last:
        return lines[first].encode()[node.col_offset : node.end_col_offset].decode()
    head = lines[first].encode()[node.col_offset :].decode()
    tail = lines[last].encode()[: node.end_col_offset].decode()
    return "".join([head, *lines[first + 1 : last], tail])


def _defined_names(node: ast.stmt) -> list[str]:
    if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
        return [node.name]
    if isinstance(node, ast.Assign):
        return [t.id for t in node.targets if isinstance(t, ast.Name)]
    if isinstance(node, ast.AnnAssign) and isinstance(node.target, ast.Name):
        return [node.target.id]
    return []


def stage_modules(rule: str, root: Path = PACKAGE_DIR, graph=None) -> tuple[str, ...]:
    """Package modules whose source determines the outputs of ``rule`` (sorted dotted names)."""
    modules, graph = import_graph(root) if graph is None else graph
    _, needed = _stage_sources(rule, modules)
    return tuple(sorted(import_closure(needed | {PACKAGE}, graph)))


def stage_files(rule: str, root: Path = PACKAGE_DIR, graph=None) -> tuple[Path, ...]:
    """Source files and data files (templates) of :func:`stage_modules`, sorted by path."""
    graph = import_graph(root) if graph is None else graph
    modules = graph[0]
    files = {modules[name] for name in stage_modules(rule, root, graph)}
    folders = {path.parent for path in files if path.parent != root}
    data = {p for folder in folders for p in _data_files(folder)}
    return tuple(sorted(files | data))


def _data_files(folder: Path) -> list[Path]:
    return [p for p in folder.rglob("*") if p.is_file() and p.suffix in DATA_SUFFIXES]


def stage_code_hashes(root: Path = PACKAGE_DIR) -> dict[str, str]:
    """Fingerprint of every rule: SHA-256 (16 hex digits) of the package version, the stage function's source
    and every file :func:`stage_files` lists, read afresh."""
    root = Path(root)
    graph = import_graph(root)
    out = {}
    for rule in stage_rules(graph[0]):
        segments, _ = _stage_sources(rule, graph[0])
        digest = hashlib.sha256(__version__.encode())
        for segment in segments:
            digest.update(segment.encode())
        for path in stage_files(rule, root, graph):
            digest.update(path.relative_to(root).as_posix().encode())
            digest.update(path.read_bytes())
        out[rule] = digest.hexdigest()[:16]
    return out


@cache
def _hashes_once(root: Path) -> dict[str, str]:
    return stage_code_hashes(root)


def stage_code_hash(rule: str, root: Path = PACKAGE_DIR) -> str:
    """The fingerprint of ``rule`` for a rule's ``params`` (computed once per process, when the Snakefile is read)."""
    hashes = _hashes_once(Path(root))
    if rule not in hashes:
        raise KeyError(f"no stage function for rule {rule!r}; add {rule}_stage to {STAGES_MODULE} and its STAGES")
    return hashes[rule]
