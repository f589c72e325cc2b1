"""The protocol model: the committed schema matches the model, and malformed protocols fail clearly."""

from __future__ import annotations

import json

import pytest
import yaml
from support.tiny import REPOSITORY, tiny_protocol_dict

from regimewise.errors import ProtocolError
from regimewise.protocol import load_protocol, protocol_schema


def test_committed_schema_equals_fresh_export():
    committed = json.loads((REPOSITORY / "config" / "protocol.schema.json").read_text(encoding="utf-8"))
    assert committed == protocol_schema(), "run `regimewise schema` to re-export config/protocol.schema.json"


def test_schema_has_the_key_snakemake_validation_needs():
    assert protocol_schema()["$schema"].startswith("https://json-schema.org/")


def test_demo_protocol_is_valid():
    pf = load_protocol(REPOSITORY / "config" / "protocol.yaml")
    assert pf.protocol.action_labels == ("hold", "step_down", "step_up", "add_agent")
    assert pf.decisions_path == (REPOSITORY / "synthetic_cohort" / "decisions.csv").resolve()
    assert len(pf.sha256) == 64


def _edit(change):
    d = tiny_protocol_dict()
    change(d)
    return d


BAD_PROTOCOLS = {
    "unknown top-level key": (_edit(lambda d: d.update(horizn=3)), "horizn: unknown key 'horizn'"),
    "unknown nested key": (_edit(lambda d: d["study"].update(colour="red")), "study.colour: unknown key 'colour'"),
    "threshold above one": (
        _edit(lambda d: d.update(constraints={"support_threshold": 1.5})),
        "constraints.support_threshold",
    ),
    "negative discount": (_edit(lambda d: d.update(discount=-0.1)), "discount"),
    "horizon not a number": (_edit(lambda d: d.update(horizon="eight")), "horizon"),
    "duplicate action label": (
        _edit(lambda d: d["actions"].append({"label": "hold", "description": "again"})),
        "action label 'hold' is declared twice",
    ),
    "state declared twice": (
        _edit(lambda d: d["states"].append(dict(d["states"][0]))),
        "state name 'bp' is declared twice",
    ),
    "reversed plausible range": (
        _edit(lambda d: d["states"][0].update(plausible_range=[250, 70])),
        "low < high",
    ),
    "one action only": (_edit(lambda d: d.update(actions=d["actions"][:1])), "actions"),
    "missing seed": (_edit(lambda d: d.pop("seed")), "seed: required key is missing"),
    "bad run name": (_edit(lambda d: d["study"].update(run_name="My Run!")), "study.run_name"),
    "unknown estimator": (_edit(lambda d: d.update(evaluation={"estimators": ["magic"]})), "evaluation.estimators"),
    "state column is a contract column": (
        _edit(lambda d: d["states"][0].update(column="reward")),
        "also a data-contract column",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD_PROTOCOLS))
def test_bad_protocol_gives_one_clear_line(tmp_path, case):
    content, expected = BAD_PROTOCOLS[case]
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(content), encoding="utf-8")
    with pytest.raises(ProtocolError) as info:
        load_protocol(path)
    message = str(info.value)
    assert "\n" not in message
    assert str(path) in message
    assert expected in message


def test_repeated_yaml_key_is_refused(tmp_path):
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(tiny_protocol_dict()) + "horizon: 4\n", encoding="utf-8")
    with pytest.raises(ProtocolError, match="key 'horizon' appears twice"):
        load_protocol(path)


def test_yaml_syntax_error(tmp_path):
    path = tmp_path / "protocol.yaml"
    path.write_text("study: [unclosed\n", encoding="utf-8")
    with pytest.raises(ProtocolError, match="not valid YAML"):
        load_protocol(path)


def test_missing_protocol_file(tmp_path):
    with pytest.raises(ProtocolError, match="not found"):
        load_protocol(tmp_path / "nope.yaml")


def test_paths_resolve_relative_to_the_protocol(tiny):
    pf = load_protocol(tiny)
    assert pf.decisions_path == tiny.parent / "decisions.csv"


def test_acknowledged_columns_are_recorded_in_the_provenance_appendix(tmp_path):
    from support.tiny import write_tiny

    from regimewise.report.provenance import build_provenance as provenance

    d = tiny_protocol_dict()
    d["data"]["acknowledged_columns"] = [
        {"column": "flag", "justification": "a study-assigned category code, not a record number"}
    ]
    pf = load_protocol(write_tiny(tmp_path, protocol=d))
    assert provenance(pf)["acknowledged_columns"] == [
        {"column": "flag", "justification": "a study-assigned category code, not a record number"}
    ]
