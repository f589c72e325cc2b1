"""``regimewise compare RUN_A RUN_B``: what differs between two runs of a protocol (a rerun, an amendment, new
records): protocol settings key by key, inputs (hashes, sizes, row counts), environment and headline numbers.

It reads only each run's records: appendix/protocol.resolved.yaml (checked against its SHA-256),
appendix/environment.json, report/appendix/provenance.json, validate/validation.json and report/summary.json.
"""

from __future__ import annotations

from pathlib import Path

from regimewise.appendix.reading import PROVENANCE, differences, flatten, resolved_protocol, run_json

ROW_COUNTS = ("rows_read", "rows_kept", "episodes", "patients")
HEADLINE_KEYS = ("strategy", "estimator", "difference", "low", "high", "ess", "verdict")


def run_record(root: Path) -> dict:
    provenance = run_json(root, PROVENANCE)
    validation = run_json(root, "validate/validation.json")
    summary = run_json(root, "report/summary.json")
    return {
        "protocol": resolved_protocol(root),
        "protocol_sha256": provenance["protocol"]["sha256"],
        "inputs": provenance["inputs"],
        "rows": {key: validation.get(key) for key in ROW_COUNTS},
        "environment": run_json(root, "appendix/environment.json"),
        "headline": {
            **{key: summary["headline"].get(key) for key in HEADLINE_KEYS},
            **{f"cohort_{key}": value for key, value in summary["cohort"].items()},
        },
    }


def compare_runs(a: Path, b: Path) -> dict:
    """The differences between runs ``a`` and ``b``; every list holds ``{"key", "a", "b"}``."""
    ra, rb = run_record(a), run_record(b)
    inputs = []
    for name in sorted(set(ra["inputs"]) | set(rb["inputs"])):
        ia, ib = ra["inputs"].get(name), rb["inputs"].get(name)
        inputs.append({"input": name, "a": ia, "b": ib, "same": ia is not None and ib is not None and ia == ib})
    return {
        "protocol_same_file": ra["protocol_sha256"] == rb["protocol_sha256"],
        "protocol": differences(ra["protocol"], rb["protocol"]),
        "inputs": inputs,
        "rows": [{"key": k, "a": ra["rows"][k], "b": rb["rows"][k]} for k in ROW_COUNTS],
        "environment": differences(ra["environment"], rb["environment"]),
        "headline": [{"key": k, "a": v, "b": rb["headline"].get(k)} for k, v in flatten(ra["headline"]).items()],
    }


def _shown(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return "-" if value is None else str(value)


def comparison_lines(result: dict, limit: int = 12) -> list[str]:
    """The short terminal table: each part's differences (at most ``limit`` lines each), headline numbers side by
    side."""
    lines = [f"{'':34} {'A':>20} {'B':>20}"]

    def block(title, rows, marked=False):
        lines.append(f"{title}: {len(rows)}" if not marked else f"{title}:")
        for row in rows[:limit]:
            mark = " *" if marked and row["a"] != row["b"] else ""
            lines.append(f"  {row['key']:<32} {_shown(row['a']):>20} {_shown(row['b']):>20}{mark}")
        if len(rows) > limit:
            lines.append(f"  ... {len(rows) - limit} more in the JSON file (--out)")

    block("protocol settings changed", result["protocol"])
    for item in result["inputs"]:
        a, b = item["a"] or {}, item["b"] or {}
        state = "same file" if item["same"] else "DIFFERENT"
        lines.append(
            f"input {item['input']}: {state} ({a.get('file', '-')} {a.get('sha256', '-')[:12]}, "
            f"{b.get('file', '-')} {b.get('sha256', '-')[:12]})"
        )
    block("row counts", result["rows"], marked=True)
    block("environment differences", result["environment"])
    block("headline (* differs)", result["headline"], marked=True)
    return lines
