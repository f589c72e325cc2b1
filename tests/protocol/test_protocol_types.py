"""Types mean what they say: booleans are not numbers, numbers are finite, labels are text, free text and file
names carry no identifier, parse errors never quote the source line; each refusal is one line naming the setting.
"""

from __future__ import annotations

import pytest
import yaml
from support.tiny import tiny_decisions, tiny_protocol_dict

from regimewise.errors import ProtocolError
from regimewise.protocol import load_protocol


def _write(folder, change=None, text=None):
    folder.mkdir(parents=True, exist_ok=True)
    tiny_decisions().to_csv(folder / "decisions.csv", index=False)
    p = tiny_protocol_dict()
    if change is not None:
        change(p)
    path = folder / "protocol.yaml"
    path.write_text(text if text is not None else yaml.safe_dump(p, sort_keys=False), encoding="utf-8")
    return path


def _rule(value):
    return {"name": "r", "forbid": ["up"], "when": [{"state": "bp", "comparison": "above", "value": value}]}


CASES = {
    "replicates yes": (lambda p: p.update(evaluation={"replicates": True}), ("evaluation.replicates", "booleans")),
    "horizon true": (lambda p: p.update(horizon=True), ("horizon", "not numbers")),
    "seed true": (lambda p: p.update(seed=True), ("seed",)),
    "include_step 1": (lambda p: p.update(behaviour_model={"include_step": 1}), ("include_step", "true or false")),
    "rule value nan": (
        lambda p: p.update(constraints={"clinical_rules": [_rule(float("nan"))]}),
        ("clinical_rules[0].when[0].value", "finite number"),
    ),
    "rule value true": (lambda p: p.update(constraints={"clinical_rules": [_rule(True)]}), ("when[0].value",)),
    "plausible range infinite": (
        lambda p: p["states"][0].update(plausible_range=[float("-inf"), float("inf")]),
        ("states[0].plausible_range[0]", "finite number"),
    ),
    "support threshold nan": (
        lambda p: p.update(constraints={"support_threshold": float("nan")}),
        ("support_threshold", "finite number"),
    ),
    "minimum ess infinite": (lambda p: p.update(evaluation={"minimum_ess": float("inf")}), ("minimum_ess",)),
    "action label no": (lambda p: p["actions"][0].update(label=False), ("actions[0].label", "put the text in quotes")),
    "action label 1": (lambda p: p["actions"][1].update(label=1), ("actions[1].label", "quotes")),
    "misspelt lable": (
        lambda p: p["actions"][0].update(lable=p["actions"][0].pop("label")),
        ("actions[0].lable", "did you mean 'label'?"),
    ),
    "e-mail in the title": (
        lambda p: p["study"].update(title="Asked by jane.roe@example.org"),
        ("study.title", "e-mail"),
    ),
    "phone in the question": (lambda p: p["study"].update(question="Call (555) 201-9876"), ("study.question",)),
    "date in a state label": (lambda p: p["states"][0].update(label="BP on 14 March 1950"), ("states[0].label",)),
    "ssn in a rule reason": (
        lambda p: p.update(constraints={"clinical_rules": [{**_rule(5.0), "reason": "see 078-05-1120"}]}),
        ("reason", "direct identifier"),
    ),
    "record number in an action description": (
        lambda p: p["actions"][0].update(description="as MRN 4471203 had"),
        ("actions[0].description",),
    ),
}


SECRETS = ("jane.roe", "201-9876", "1950", "078-05-1120", "4471203")


@pytest.mark.parametrize("name", sorted(CASES))
def test_wrongly_typed_or_identifying_setting_is_refused_in_one_line(tmp_path, name):
    change, expected = CASES[name]
    with pytest.raises(ProtocolError) as err:
        load_protocol(_write(tmp_path, change))
    message = str(err.value)
    assert "\n" not in message
    for text in expected:
        assert text in message, message
    for secret in SECRETS:
        assert secret not in message


def test_yaml_syntax_error_names_the_line_but_never_quotes_it(tmp_path):
    path = _write(tmp_path, text="study:\n  title: 078-05-1120 jane.roe@example.org\n   bad: [\n")
    with pytest.raises(ProtocolError, match=r"not valid YAML \(line 3, column \d+: ") as err:
        load_protocol(path)
    assert "078-05-1120" not in str(err.value) and "jane.roe" not in str(err.value)


def test_absolute_record_path_outside_data_root_is_refused(tmp_path):
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    tiny_decisions().to_csv(outside / "decisions.csv", index=False)
    change = lambda p: p["data"].update(decisions=str(outside / "decisions.csv"), root="inside")  # noqa: E731
    (tmp_path / "study" / "inside").mkdir(parents=True)
    with pytest.raises(ProtocolError, match="leads outside data.root 'inside'"):
        load_protocol(_write(tmp_path / "study", change))


def test_absolute_record_path_inside_data_root_is_accepted(tmp_path):
    folder = tmp_path / "study"
    change = lambda p: p["data"].update(decisions=str(folder / "decisions.csv"))  # noqa: E731
    assert load_protocol(_write(folder, change)).decisions_path == folder / "decisions.csv"


@pytest.mark.parametrize("name", ["jane.roe@example.org.csv", "078-05-1120.csv", "MRN4471203.csv"])
def test_records_file_named_like_an_identifier_is_refused_without_its_name(tmp_path, name):
    with pytest.raises(ProtocolError, match="the file name looks like a direct identifier") as err:
        load_protocol(_write(tmp_path, lambda p: p["data"].update(decisions=name)))
    assert name not in str(err.value) and name.split(".")[0] not in str(err.value)


def test_records_file_named_with_an_extract_date_is_accepted(tmp_path):
    folder = tmp_path / "study"
    folder.mkdir()
    tiny_decisions().to_csv(folder / "decisions_2024-06-30.csv", index=False)
    path = _write(folder, lambda p: p["data"].update(decisions="decisions_2024-06-30.csv"))
    assert load_protocol(path).decisions_path.name == "decisions_2024-06-30.csv"


def test_protocol_file_that_is_a_directory_or_unreadable(tmp_path, monkeypatch):
    with pytest.raises(ProtocolError, match="is a directory"):
        load_protocol(tmp_path)
    path = _write(tmp_path / "study")

    def refuse(self):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(type(path), "read_bytes", refuse)  # root may read any file, so the refusal is simulated
    with pytest.raises(ProtocolError, match="cannot be read: permission denied"):
        load_protocol(path)
