"""One line, in our words, for a protocol that fails validation: the key path as written in the file, what is
wrong and how to fix it, with a "did you mean …" (difflib) for a misspelt key or value.

pydantic's own locations carry the names of its internal validators for a setting that accepts several forms
(``q_model.ridge_alpha.function-before[...]``); the path is rebuilt here by walking the protocol as read, so
only keys and list positions the user wrote appear. A missing required key beside an unknown one is reported
as the unknown key with the suggestion, because that is what the user wrote.
"""

from __future__ import annotations

import difflib
import re
from typing import get_args

from pydantic import BaseModel, ValidationError

from regimewise.protocol.identifiers import free_text_category, looks_like_identifier, mask

# Names pydantic gives its internal validators inside a location (union members, wrappers); never user keys.
_INTERNAL = re.compile(
    r"^(?:(?:function|json|lax|strict|tagged|is|nullable|union|chain)[-\w]*\[.*\]|constrained-\w+|"
    r"literal\[.*\]|list\[.*\]|dict\[.*\]|tuple\[.*\]|set\[.*\]|int|float|str|bool|none)$"
)


_IDENTIFIER_PATTERN = r"^[a-z][a-z0-9_]{0,39}$"


# What each kind of value is called when a setting accepts several forms.
_KINDS = {
    "float_parsing": "a number",
    "float_type": "a number",
    "finite_number": "a finite number",
    "int_parsing": "a whole number",
    "int_type": "a whole number",
    "int_from_float": "a whole number",
    "list_type": "a list",
    "tuple_type": "a list",
    "bool_type": "true or false",
    "string_type": "text",
    "dict_type": "a section of keys",
    "model_type": "a section of keys",
}


def describe_validation_error(err: ValidationError, data=None, root: type[BaseModel] | None = None) -> str:
    """One line for the first problem of ``err`` (``data``: the mapping validated; ``root``: its model class)."""
    groups = _grouped(err.errors(include_url=False), data)
    extras = [g for g in groups if g["errors"][0]["type"] == "extra_forbidden"]
    parents_with_extra = {g["path"][:-1] for g in extras}
    missing = [g for g in groups if g["errors"][0]["type"] == "missing"]
    shown = [g for g in groups if not (g in missing and g["path"][:-1] in parents_with_extra)]
    first = (extras or shown)[0]
    if first in extras:
        siblings = [str(g["path"][-1]) for g in missing if g["path"][:-1] == first["path"][:-1]]
        line = _unknown_key(first["path"], siblings, root)
    else:
        line = _describe(first)
    others = len(shown) - 1
    more = f" (and {others} more problem{'s' if others > 1 else ''}: fix this one and check again)" if others else ""
    return one_line(line) + more


def one_line(text) -> str:
    return " ".join(str(text).split())


# ---------------------------------------------------------------------------------------------- locations
def _grouped(problems: list[dict], data) -> list[dict]:
    """The problems grouped by the path they have in the file, in pydantic's order; a union member that failed
    on the whole value is dropped when another member got further into it (the user meant that member)."""
    groups: dict[tuple, dict] = {}
    for problem in problems:
        path, on_key, tagged = _written_path(problem["loc"], data)
        group = groups.setdefault((path, on_key), {"path": path, "on_key": on_key, "tagged": False, "errors": []})
        group["tagged"] |= tagged
        group["errors"].append(problem)
    out = list(groups.values())
    deeper = [g["path"] for g in out]
    return [
        g
        for g in out
        if not (
            g["tagged"]
            and isinstance(g["errors"][0].get("input"), (list, dict))
            and any(len(p) > len(g["path"]) and p[: len(g["path"])] == g["path"] for p in deeper)
        )
    ] or out


def _written_path(loc: tuple, data) -> tuple[tuple, bool, bool]:
    """(keys and list positions as written, whether the problem is a mapping's key, whether a union was crossed)."""
    parts, node, on_key, tagged = [], data, False, False
    for step in loc:
        if step == "[key]":
            on_key = True
        elif isinstance(node, dict) and step in node:
            parts.append(step)
            node = node[step]
        elif isinstance(node, list) and isinstance(step, int) and 0 <= step < len(node):
            parts.append(step)
            node = node[step]
        elif isinstance(step, str) and _INTERNAL.match(step):
            tagged = True
        else:
            parts.append(step)
            node = None
    return tuple(parts), on_key, tagged


def _path_text(path: tuple) -> str:
    text = ""
    for part in path:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text


def _where(path: tuple) -> str:
    return f"{_path_text(path)}: " if path else ""


# ---------------------------------------------------------------------------------------------- messages
def _unknown_key(path: tuple, missing: list[str], root) -> str:
    """An unknown key: the close required key missing beside it, else the close allowed key, else what to do."""
    name = str(path[-1])
    close = difflib.get_close_matches(name, missing, n=1, cutoff=0.6)
    allowed = _allowed_keys(root, path[:-1])
    line = f"{_path_text(path)}: unknown key {name!r}"
    if close:
        return line + f"; did you mean {close[0]!r}? Correct the spelling"
    close = _close(name, allowed)
    if close:
        line += f"; did you mean {close[0]!r}? Correct the spelling"
    if missing:
        return line + f"; the required key {missing[0]!r} is missing beside it: rename {name!r} if it means that"
    if close:
        return line
    if allowed:
        return line + f"; remove it or use one of the keys allowed here: {', '.join(allowed)}"
    return line + "; remove it or correct its spelling (see config/protocol.schema.json)"


def _describe(group: dict) -> str:
    problems, path = group["errors"], group["path"]
    first = problems[0]
    if first["type"] == "missing":
        return f"{_path_text(path)}: required key is missing; add it (see config/protocol.schema.json)"
    if group["tagged"] and len(problems) > 1:
        return _where(path) + _one_of_forms(problems)
    if first["type"] in ("value_error", "assertion_error"):
        return _where(path) + re.sub(r"^(Value|Assertion) error, ", "", first["msg"])
    if first["type"] == "literal_error":
        return _not_listed(path, first, group["on_key"])
    if group["on_key"]:
        return f"{_path_text(path[:-1])}: key {_shown(path[-1])} {_rule(first)}"
    got = "" if isinstance(first.get("input"), (dict, list)) else f" (got {_shown(first.get('input'))})"
    return f"{_where(path)}{_rule(first)}{got}{_quote_hint(first)}"


def _not_listed(path: tuple, problem: dict, on_key: bool) -> str:
    values = _literal_values(problem)
    value = path[-1] if on_key else problem.get("input")
    where = _where(path[:-1]) + "key " if on_key else _where(path)
    line = f"{where}{_shown(value)} is not one of {', '.join(map(repr, values))}"
    return line + _suggestion(value, values, "; use one of these")


def _one_of_forms(problems: list[dict]) -> str:
    """A setting that accepts several forms (a number or 'cv'; 'all', 'first' or a list): name every form."""
    value, forms, words = problems[0].get("input"), [], []
    for problem in problems:
        if problem["type"] == "literal_error":
            words += _literal_values(problem)
            forms.append(" or ".join(repr(v) for v in _literal_values(problem)))
        else:
            forms.append(_form(problem))
    shown = "this value" if isinstance(value, (dict, list)) else _shown(value)
    return f"{shown} is not accepted; write {', or '.join(dict.fromkeys(forms))}" + _suggestion(value, words, "")


_BOUNDS = {"greater_than_equal": ("at least", "ge"), "greater_than": ("above", "gt")}
_BOUNDS.update(less_than_equal=("at most", "le"), less_than=("below", "lt"))


def _form(problem: dict) -> str:
    """One accepted form of a setting, named from the member that refused the value."""
    kind, ctx = problem["type"], problem.get("ctx") or {}
    if kind in _BOUNDS:
        words, key = _BOUNDS[kind]
        return f"a number {words} {ctx.get(key)}"
    if kind == "value_error" and isinstance(problem.get("input"), bool):
        return "a number (YAML reads yes, no, true, false, on and off as booleans)"
    return _KINDS.get(kind) or _rule(problem).removeprefix("must be ")


def _rule(problem: dict) -> str:
    """pydantic's message in our words: what the value must be."""
    ctx = problem.get("ctx") or {}
    if problem["type"] == "string_pattern_mismatch" and ctx.get("pattern") == _IDENTIFIER_PATTERN:
        return "must be lower-case letters, digits and _, starting with a letter (at most 40 characters)"
    if problem["type"] in _KINDS:
        return "must be " + _KINDS[problem["type"]]
    text = re.sub(r"^(Value|Assertion) error, ", "", problem["msg"]).replace(" after validation", "")
    if problem["type"] in ("too_short", "too_long") and isinstance(problem.get("input"), str):
        text = text.replace(" items", " characters").replace(" item,", " character,")
    text = re.sub(r"^(Input|List|String|Tuple|Dictionary|Value) should (be|have)", r"must \2", text)
    return re.sub(r"^Input should ", "must ", text)


def _literal_values(problem: dict) -> list[str]:
    expected = (problem.get("ctx") or {}).get("expected", "")
    return [bytes(v, "utf-8").decode("unicode_escape") for v in re.findall(r"'((?:[^'\\]|\\.)*)'", expected)]


def _close(value, candidates: list[str]) -> list[str]:
    if not isinstance(value, str) or not candidates:
        return []
    folded = {c.lower(): c for c in candidates}
    if value.lower() in folded:
        return [folded[value.lower()]]
    return difflib.get_close_matches(value, candidates, n=1, cutoff=0.6)


def _suggestion(value, candidates: list[str], otherwise: str) -> str:
    close = _close(value, candidates)
    return f"; did you mean {close[0]!r}? (spelling and case matter)" if close else otherwise


def _allowed_keys(root, path: tuple) -> list[str]:
    """The keys the model allows at ``path`` (list positions skipped), or [] where that is not a section."""
    model = root
    for part in path:
        if isinstance(part, int):
            continue
        field = model.model_fields.get(part) if model is not None else None
        model = None if field is None else _model_in(field.annotation)
    return [] if model is None else list(model.model_fields)


def _model_in(annotation):
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for arg in get_args(annotation):
        found = _model_in(arg)
        if found is not None:
            return found
    return None


def _shown(value) -> str:
    """The offending value as a message may show it: masked when it looks like an identifier."""
    hidden = looks_like_identifier(value) or free_text_category(str(value)) is not None
    return mask(value) if hidden else repr(value)


def _quote_hint(problem: dict) -> str:
    """YAML reads no, yes, on, off, true, false and bare numbers as non-text: say to quote a label."""
    value, kind = problem.get("input"), problem["type"]
    if kind == "string_type" and isinstance(value, (bool, int, float)):
        read = "a boolean" if isinstance(value, bool) else "a number"
        return f"; YAML read this as {read}: put the text in quotes, e.g. label: 'no'"
    if kind in ("int_type", "float_type", "value_error") and isinstance(value, bool):
        return "; write a number (YAML reads yes, no, true, false, on and off as booleans, not numbers)"
    if kind == "bool_type" and not isinstance(value, bool):
        return "; write true or false (numbers are not booleans)"
    return ""
