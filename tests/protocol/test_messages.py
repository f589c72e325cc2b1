"""Protocol errors in our words: one line, the key path as written in the file, what is wrong, how to fix, a
"did you mean" for a misspelt key or value, and never the validation library's internal names."""

from __future__ import annotations

import pandas as pd
import pytest
import yaml
from support.tiny import tiny_decisions, tiny_protocol_dict, write_tiny

from regimewise import cli
from regimewise.data.validate import validate_records
from regimewise.errors import DataValidationError, ProtocolError
from regimewise.protocol import load_protocol


def _edit(change):
    d = tiny_protocol_dict()
    change(d)
    return d


def _rename(d, old, new):
    d[new] = d.pop(old)


# name: (protocol, fragments the line must hold)
CASES = {
    "misspelt required key": (
        _edit(lambda d: _rename(d, "horizon", "horizn")),
        ["horizn: unknown key 'horizn'", "did you mean 'horizon'?"],
    ),
    "unknown key beside a missing one": (
        _edit(lambda d: _rename(d, "horizon", "steps")),
        ["steps: unknown key 'steps'", "required key 'horizon' is missing", "rename 'steps'"],
    ),
    "misspelt optional key in a list item": (
        _edit(lambda d: _rename(d["states"][1], "kind", "knd")),
        ["states[1].knd: unknown key 'knd'", "did you mean 'kind'?"],
    ),
    "unknown key with nothing close": (
        _edit(lambda d: d["study"].update(colour="red")),
        ["study.colour: unknown key 'colour'", "keys allowed here: title, question, version, run_name"],
    ),
    "ridge penalty in capitals": (
        _edit(lambda d: d.update(q_model={"ridge_alpha": "CV"})),
        ["q_model.ridge_alpha: 'CV' is not accepted", "a number, or 'cv'", "did you mean 'cv'?"],
    ),
    "negative ridge penalty": (
        _edit(lambda d: d.update(q_model={"ridge_alpha": -1})),
        ["q_model.ridge_alpha: -1 is not accepted", "a number at least 0", "or 'cv'"],
    ),
    "misspelt model kind": (
        _edit(lambda d: d.update(q_model={"kind": "linaer"})),
        ["q_model.kind: 'linaer' is not one of 'linear', 'gradient_boosting'", "did you mean 'linear'?"],
    ),
    "misspelt estimator": (
        _edit(lambda d: d.update(evaluation={"estimators": ["wdr", "pdwsi"]})),
        ["evaluation.estimators[1]: 'pdwsi'", "did you mean 'pdwis'?"],
    ),
    "misspelt word of a several-form setting": (
        _edit(lambda d: d.update(sensitivity={"confounded_decisions": "frist"})),
        ["sensitivity.confounded_decisions: 'frist' is not accepted", "'all' or 'first', or a list", "'first'?"],
    ),
    "misspelt sweep axis": (
        _edit(lambda d: d.update(sweeps={"axes": {"q_model.knd": ["linear"]}})),
        ["sweeps.axes: key 'q_model.knd' is not one of", "did you mean 'q_model.kind'?"],
    ),
    "misspelt missing-data policy": (
        _edit(lambda d: d["data"].update(missing={"bp": "dorp"})),
        ["data.missing.bp: 'dorp' is not one of", "did you mean 'drop'?"],
    ),
    "bad run name": (
        _edit(lambda d: d["study"].update(run_name="My Run!")),
        ["study.run_name: must be lower-case letters, digits and _, starting with a letter"],
    ),
    "cross-field rule inside a section": (
        _edit(lambda d: d.update(behaviour_model={"kind": "gradient_boosting", "folds": 1})),
        ["behaviour_model: gradient_boosting must be cross-fitted: set behaviour_model.folds to 2 or more"],
    ),
    "cross-field rule of the whole protocol": (
        _edit(lambda d: d["states"][0].update(column="reward")),
        ["protocol.yaml: state column 'reward' is also a data-contract column"],
    ),
}


INTERNALS = ("constrained-", "function-", "literal[", "[key]", "Value error", "(top level)", "Input should")


@pytest.mark.parametrize("case", sorted(CASES))
def test_each_protocol_error_is_one_line_with_the_key_as_written_and_a_fix(tmp_path, case):
    content, fragments = CASES[case]
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(content, sort_keys=False), encoding="utf-8")
    with pytest.raises(ProtocolError) as info:
        load_protocol(path)
    message = str(info.value)
    assert "\n" not in message
    for fragment in fragments:
        assert fragment in message, message
    for internal in INTERNALS:
        assert internal not in message, message
    assert "more problem" not in message, message  # each case has one problem; a folded missing key is no other


def test_a_second_independent_problem_is_counted(tmp_path):
    content = _edit(lambda d: (_rename(d, "horizon", "horizn"), d.update(discount=-0.1)))
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(content), encoding="utf-8")
    with pytest.raises(ProtocolError, match=r"did you mean 'horizon'\?.*\(and 1 more problem: fix this one"):
        load_protocol(path)


def test_validation_counts_every_failing_value_not_only_the_listed_ones(tmp_path):
    """555 out-of-range values: the list keeps at most 100 entries per rule, the message says the true total."""
    decisions = tiny_decisions(n_episodes=200)  # 600 rows
    decisions["bp"] = decisions["bp"].astype(float)
    decisions.loc[:554, "bp"] = 999.0
    protocol = write_tiny(tmp_path / "study", decisions=decisions)
    with pytest.raises(DataValidationError) as info:
        validate_records(load_protocol(protocol))
    assert "(555 problems in all" in str(info.value)
    unlisted = [f for f in info.value.errors if f.row is None]
    assert len(info.value.errors) == 100 and len(unlisted) == 1
    assert unlisted[0].message == "456 more row(s) fail this rule beyond the first 99 listed"
    errors = tmp_path / "errors"
    assert cli.main(["check", str(protocol), "--errors", str(errors)]) == 1
    table = pd.read_csv(errors / "validation_errors.csv", dtype=str, keep_default_na=False)
    assert table["problem"].str.contains("456 more row").sum() == 1


def test_negative_strength_names_the_option_as_typed(tmp_path, capsys):
    assert cli.main(["simulate", "--out", str(tmp_path / "c"), "--strength", "-1"]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("regimewise error: --strength") and "got -1" in err and "\n" not in err
    assert "confounding_strength" not in err
