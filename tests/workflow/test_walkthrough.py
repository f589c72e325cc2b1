"""The README's worked study ("Your own records") stays true.

Its step 1, `regimewise simulate --out ...` with the defaults, writes the committed demo cohort byte for byte
(tests/demo/test_simulate.py), so the walkthrough's prepare.py is run here on synthetic_cohort/ itself: the figures the
README quotes (the check's line, the decisions by band, the first prepared rows) are those of the records a user
makes. Then `regimewise check` accepts the prepared study with its categorical state, `better: lower` and the
comparator; the YAML the README quotes is the shipped protocol's; the comparator is the rule the README states in
words; and usual care's weighted values are minus the original records' mean return.
"""

from __future__ import annotations

import re
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import yaml
from support.cli import run_cli
from support.tiny import REPOSITORY

from regimewise.data.validate import validate_records
from regimewise.evaluation.values import LoggedDecisions, evaluate_regime
from regimewise.protocol import load_protocol
from regimewise.usual_care.fitting import fit_usual_care

WALKTHROUGH = REPOSITORY / "synthetic_cohort" / "walkthrough"
SIMULATED = REPOSITORY / "synthetic_cohort"  # what `regimewise simulate` writes with its defaults


def walkthrough_text() -> str:
    """The README's worked study: from its heading to the Reference that follows it."""
    readme = (REPOSITORY / "README.md").read_text(encoding="utf-8")
    start = readme.index("### A worked study")
    return readme[start : readme.index("### Reference", start)]


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """The study folder as step 2 of the walkthrough leaves it (prepare.py run as the README runs it)."""
    folder = tmp_path_factory.mktemp("walkthrough") / "my_study"
    command = [sys.executable, WALKTHROUGH / "prepare.py", SIMULATED, folder]
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr
    return folder


@pytest.fixture(scope="module")
def original():
    return pd.read_csv(SIMULATED / "decisions.csv")


@pytest.fixture(scope="module")
def validated(study):
    pf = load_protocol(study / "protocol.yaml")
    return pf, validate_records(pf)


def test_prepare_changes_only_the_band_and_the_penalty(study, original):
    prepared = pd.read_csv(study / "records" / "decisions.csv")
    kept = [c for c in original.columns if c not in ("adherence", "reward")]
    pd.testing.assert_frame_equal(prepared[kept], original[kept])
    # source: the README's cut points (below 0.60 low, 0.60 to below 0.80 medium, from 0.80 high), restated with
    # pandas.cut on the original shares, intervals closed on the left
    bands = pd.cut(original["adherence"], [0.0, 0.60, 0.80, np.inf], right=False, labels=["low", "medium", "high"])
    assert (prepared["adherence_band"] == bands.astype(str)).all()
    assert (prepared["penalty_points"] == -original["reward"]).all()  # minus the demo's score, exactly
    assert not np.signbit(prepared["penalty_points"][prepared["penalty_points"] == 0]).any()  # no "-0.0" written
    episodes = pd.read_csv(SIMULATED / "episodes.csv")
    pd.testing.assert_frame_equal(pd.read_csv(study / "records" / "episodes.csv"), episodes)
    assert (study / "protocol.yaml").read_bytes() == (WALKTHROUGH / "protocol.yaml").read_bytes()
    head = (study / "records" / "decisions.csv").read_text(encoding="utf-8").splitlines()[:3]
    assert "```\n" + "\n".join(head) + "\n```" in walkthrough_text()  # the rows the README shows


def test_prepare_refuses_to_overwrite_an_edited_protocol_in_one_line(study):
    command = [sys.executable, WALKTHROUGH / "prepare.py", SIMULATED, study]
    done = subprocess.run(command, capture_output=True, text=True, check=False)
    assert done.returncode == 1 and done.stderr.count("\n") == 1
    assert "exists" in done.stderr and "--force" in done.stderr


def test_check_accepts_the_study_and_prints_the_readmes_line(study):
    before = sorted(p.name for p in study.iterdir())
    result = run_cli("check", study / "protocol.yaml")
    assert result.returncode == 0, result.stderr
    line = result.stdout.strip()
    assert line == "protocol.yaml: protocol valid; 24000 decisions in 3000 episodes (2730 patients) pass validation."
    assert f"`{line}`" in walkthrough_text()
    assert sorted(p.name for p in study.iterdir()) == before  # a passing check writes nothing


def test_the_categorical_state_lower_is_better_and_the_comparator_are_accepted(validated, original):
    pf, result = validated
    p = pf.protocol
    band = next(s for s in p.states if s.name == "adherence_band")
    assert (band.kind, band.levels, band.reference_level, band.rare_levels) == (
        "categorical",
        ["low", "medium", "high"],
        "medium",
        "refuse",
    )
    assert p.reward.better == "lower" and p.data.columns.reward == "penalty_points"
    assert [c.name for c in p.comparators] == ["adherence_first"] and p.evaluation.reference == "adherence_first"
    counts = result.summary["categorical_levels"]["adherence_band"]
    # source: the bands counted with pandas on the original shares, independently of the validation
    expected = pd.cut(original["adherence"], [0.0, 0.60, 0.80, np.inf], right=False).value_counts(sort=False)
    assert counts["decisions"] == dict(zip(["low", "medium", "high"], expected.tolist()))
    assert (counts["reference"], counts["merged"], counts["absent"]) == ("medium", [], [])
    quoted = "; ".join(f"{level} {n:,}" for level, n in counts["decisions"].items() if level in band.levels)
    assert quoted in walkthrough_text().replace("\n  ", " ")  # "low 2,872; medium 14,289; high 6,839"


def test_the_comparator_is_the_rule_the_readme_states(validated):
    # source: the README's words, written out in numpy on the clean records: step up above 140 mmHg when adherence is
    # medium or high, potassium at most 5.5 and eGFR at least 30; else step down below 110 mmHg from level 1; else hold
    pf, result = validated
    p, d = pf.protocol, result.decisions
    up = (d["sbp"] > 140) & d["adherence_band"].isin(["medium", "high"]) & (d["potassium"] <= 5.5) & (d["egfr"] >= 30)
    down = (d["sbp"] < 110) & (d["therapy_level"] >= 1)
    expected = np.where(up, "step_up", np.where(down, "step_down", "hold"))
    columns = {s.name: d[s.name].to_numpy(dtype=object if s.kind == "categorical" else float) for s in p.states}
    codes = p.comparators[0].action_codes(columns, len(d), p.action_labels)
    np.testing.assert_array_equal(np.asarray(p.action_labels)[codes], expected)
    assert up.any() and down.any() and ((d["adherence_band"] == "low") & (d["sbp"] > 140)).any()


def test_usual_cares_weighted_values_are_minus_the_original_mean_return(validated, original):
    # Identity: usual care's importance weights are 1 (its target is the usual-care model itself), so each weighted
    # estimator of its value is the mean episode return; the penalty is minus the demo's score, so with
    # better: lower the value stays in points and is minus the original records' mean return (pandas, below).
    pf, result = validated
    spec = pf.protocol.evaluation.model_copy(update={"estimators": ["is", "wis", "pdis", "pdwis"]})
    protocol = pf.protocol.model_copy(update={"evaluation": spec})
    proba = fit_usual_care(result.decisions, protocol).record_proba
    logged = LoggedDecisions.from_frame(result.decisions, proba, protocol)
    values = evaluate_regime(logged, proba, protocol, deterministic=False, records_regime=True)
    mean_return = original.groupby("episode_id")["reward"].sum().mean()
    for name, estimate in values.items():
        assert estimate["value"] == pytest.approx(-mean_return, abs=1e-9), name


def quoted_yaml() -> list[dict]:
    blocks = re.findall(r"```yaml\n(.*?)```", walkthrough_text(), flags=re.S)
    return [yaml.safe_load(block) for block in blocks]


def assert_part_of(quoted, shipped, where):
    """Every key the README quotes has the shipped protocol's value; a quoted list of named items (states,
    comparators) matches the shipped items of the same names in full."""
    if isinstance(quoted, dict):
        assert isinstance(shipped, dict), where
        for key, value in quoted.items():
            assert key in shipped, f"the README quotes {where}.{key}, which the protocol lacks"
            assert_part_of(value, shipped[key], f"{where}.{key}")
    elif isinstance(quoted, list) and quoted and all(isinstance(x, dict) and "name" in x for x in quoted):
        by_name = {x["name"]: x for x in shipped}
        for item in quoted:
            assert item == by_name.get(item["name"]), f"{where}: {item['name']}"
    else:
        assert quoted == shipped, where


def test_the_yaml_the_readme_quotes_is_the_shipped_protocols():
    shipped = yaml.safe_load((WALKTHROUGH / "protocol.yaml").read_text(encoding="utf-8"))
    blocks = quoted_yaml()
    assert {key for block in blocks for key in block} >= {"data", "states", "reward", "comparators", "evaluation"}
    for block in blocks:
        assert_part_of(block, shipped, "protocol")
