"""Specification sweeps: the protocol's sweep section, the grid, one specification's job and the sorted table.

Sources of truth: the Cartesian product written out by hand for a 3 × 2 grid; the main analysis's own stages
(behaviour → regime → evaluate) for the identity of the pre-specified specification; numpy.quantile for the
percentile interval (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 13, from memory); and
sorting by hand-made estimates for the combined table.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import yaml
from support.tiny import REPOSITORY, tiny_protocol_dict

from regimewise.bootstrap.sweep import analysis_protocol, combine_sweep
from regimewise.data.records import clean_decisions
from regimewise.demo.files import write_cohort
from regimewise.demo.simulate import simulate_cohort
from regimewise.errors import ProtocolError, UserInputError
from regimewise.io import read_json, write_parquet
from regimewise.protocol import load_protocol, sweep_specifications
from regimewise.sensitivity.analysis import sensitivity_target
from regimewise.workflow.settings import load_settings
from regimewise.workflow.stages import (
    behaviour_stage,
    evaluate_stage,
    regime_stage,
    sweep_spec_stage,
)


def _write(tmp_path, sweeps, **changes):
    protocol = tiny_protocol_dict()
    protocol.update(changes)
    protocol["sweeps"] = sweeps
    path = tmp_path / "protocol.yaml"
    path.write_text(yaml.safe_dump(protocol, sort_keys=False), encoding="utf-8")
    return path


# ---------------------------------------------------------------------------------------------- protocol
BAD_SWEEPS = {
    "unknown axis": ({"axes": {"q_model.colour": ["red"]}}, {}, "sweeps.axes: key 'q_model.colour' is not one of"),
    "diagnostics-only setting": (
        {"axes": {"behaviour_model.truncation_percentiles": [[1, 99]]}},
        {},
        "truncation_percentiles",
    ),
    "value out of range": (
        {"axes": {"constraints.support_threshold": [0.05, 2]}},
        {},
        "sweeps.axes.constraints.support_threshold: value 2 is not allowed",
    ),
    "value of the wrong kind": ({"axes": {"q_model.kind": ["forest"]}}, {}, "sweeps.axes.q_model.kind: value 'forest'"),
    "empty list": ({"axes": {"constraints.pessimism": []}}, {}, "pessimism: must have at least 1 item"),
    "no axes": ({"axes": {}}, {}, "sweeps.axes: must have at least 1 item"),
    "value repeated": ({"axes": {"constraints.support_threshold": [0.1, 0.10]}}, {}, "lists a value twice"),
    "value invalid with the protocol's other settings": (
        {"axes": {"behaviour_model.kind": ["gradient_boosting"]}},
        {"behaviour_model": {"folds": 1}},
        "gradient_boosting must be cross-fitted",
    ),
    "gamma beyond gamma_max": (
        {"axes": {"q_model.kind": ["linear"]}, "gammas": [1.0, 8.0]},
        {},
        "sweeps.gammas must not exceed",
    ),
    "too few replicates": ({"axes": {"q_model.kind": ["linear"]}, "replicates": 1}, {}, "sweeps.replicates"),
}


@pytest.mark.parametrize("case", sorted(BAD_SWEEPS))
def test_bad_sweep_section_fails_with_one_clear_line(tmp_path, case):
    sweeps, changes, expected = BAD_SWEEPS[case]
    path = _write(tmp_path, sweeps, **changes)
    with pytest.raises(ProtocolError) as info:
        load_protocol(path)
    message = str(info.value)
    assert "\n" not in message and str(path) in message
    assert expected in message


def test_without_sweeps_there_are_no_sweep_jobs(tiny):
    pf = load_protocol(tiny)
    assert sweep_specifications(pf.protocol) == ()
    settings = load_settings({"protocol": str(tiny), "results": "r", "logs": "l", "benchmarks": "b"})
    assert settings.sweep_specs == ()


def test_grid_is_the_product_with_the_prespecified_analysis_first(tmp_path):
    # Axes written in the reverse of the documented order: the grid follows SWEEP_AXES, not the file.
    axes = {"q_model.learning_mode": ["backward", "pooled"], "constraints.support_threshold": [0.02, 0.05, 0.1]}
    grid = sweep_specifications(load_protocol(_write(tmp_path, {"axes": axes})).protocol)
    # Written out by hand: the protocol's own (0.05, backward) first, then the product, last axis fastest.
    expected = [
        (0.05, "backward"),
        (0.02, "backward"),
        (0.02, "pooled"),
        (0.05, "pooled"),
        (0.1, "backward"),
        (0.1, "pooled"),
    ]
    assert [s.id for s in grid] == [f"spec_{i:02d}" for i in range(6)]
    assert [tuple(s.settings.values()) for s in grid] == expected
    assert list(grid[0].settings) == ["constraints.support_threshold", "q_model.learning_mode"]
    assert [s.prespecified for s in grid] == [True] + [False] * 5
    assert grid[0].in_grid
    for spec in grid:  # each specification is the protocol with exactly its settings changed
        assert spec.protocol.constraints.support_threshold == spec.settings["constraints.support_threshold"]
        assert spec.protocol.q_model.learning_mode == spec.settings["q_model.learning_mode"]
        assert spec.protocol.sweeps is None
        assert spec.protocol.model_dump(exclude={"constraints", "q_model", "sweeps"}) == grid[0].protocol.model_dump(
            exclude={"constraints", "q_model", "sweeps"}
        )


def test_prespecified_analysis_is_added_when_no_combination_equals_it(tmp_path):
    path = _write(tmp_path, {"axes": {"constraints.pessimism": [0.5, 1]}})
    grid = sweep_specifications(load_protocol(path).protocol)
    assert [s.settings["constraints.pessimism"] for s in grid] == [0.0, 0.5, 1.0]
    assert grid[0].prespecified and not grid[0].in_grid


# ---------------------------------------------------------------------------------------------- one specification
@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """The demo protocol (no pessimism, for speed; support threshold 0.1, so that every estimator is defined) on
    150 simulated episodes, with a 2-specification sweep."""
    folder = tmp_path_factory.mktemp("sweep")
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"] = {"decisions": str(REPOSITORY / "synthetic_cohort" / "decisions.csv"), "root": str(REPOSITORY)}
    raw.pop("survival", None)  # no episodes table here
    raw["constraints"].update(pessimism=0.0, support_threshold=0.1)
    raw["evaluation"].update({"replicates": 2, "shards": 1})
    raw["sweeps"] = {"axes": {"constraints.support_threshold": [0.1, 0.2]}, "replicates": 4}
    (folder / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    pf = load_protocol(folder / "protocol.yaml")
    write_parquet(folder / "decisions.parquet", clean_decisions(pf, simulate_cohort(150, seed=3).decisions))
    for spec in ("spec_00", "spec_01"):
        sweep_spec_stage(folder / "protocol.yaml", folder / "decisions.parquet", spec, folder / f"{spec}.json")
    return folder, pf.protocol


def test_prespecified_specification_reproduces_the_main_analysis(study):
    # Reference: the workflow's own stages on the same records and protocol.
    folder, _ = study
    protocol, decisions = folder / "protocol.yaml", folder / "decisions.parquet"
    behaviour_stage(protocol, decisions, folder / "proba.parquet", folder / "behaviour.json")
    regime_stage(protocol, decisions, folder / "proba.parquet", folder / "table.parquet", folder / "regime.json")
    evaluate_stage(protocol, decisions, folder / "proba.parquet", folder / "table.parquet", folder / "values.json")
    contrasts = read_json(folder / "values.json")["contrasts"]
    main = {c["estimator"]: c["difference"] for c in contrasts if c["regime"] == "learned"}
    spec = read_json(folder / "spec_00.json")
    assert spec["prespecified"]
    assert all(v is not None for v in main.values())
    assert {est: c["difference"] for est, c in spec["contrasts"].items()} == main


def test_a_specification_rerun_alone_gives_the_same_bytes(study, tmp_path):
    folder, _ = study
    sweep_spec_stage(folder / "protocol.yaml", folder / "decisions.parquet", "spec_01", tmp_path / "again.json")
    assert (tmp_path / "again.json").read_bytes() == (folder / "spec_01.json").read_bytes()


def test_specification_interval_is_the_percentile_interval_of_its_replicates(study):
    folder, protocol = study
    spec = read_json(folder / "spec_01.json")
    assert spec["settings"] == {"constraints.support_threshold": 0.2}
    assert spec["replicates_used"] + len(spec["replicates_failed"]) == 4
    level = protocol.evaluation.interval_level
    for est, contrast in spec["contrasts"].items():
        draws = [r[est] for r in spec["replicate_contrasts"] if r[est] is not None]
        if len(draws) < 2:
            continue
        # numpy as the reference, at the (R + 1)α positions of Davison & Hinkley (1997, §5.2)
        low, high = np.quantile(draws, [(1 - level) / 2, (1 + level) / 2], method="weibull")
        assert (contrast["low"], contrast["high"]) == pytest.approx((low, high), abs=1e-12)
    assert [row["gamma"] for row in spec["sensitivity"]["table"]] == [1.0, 1.25, 1.5, 2.0, 3.0]


def test_the_point_and_the_replicates_bound_the_same_regime(study):
    # The demo protocol's headline is a partial adoption, which the sensitivity stage bounds; the sweep's contrast
    # is the learned regime's, so its point bounds and its replicates' bounds must both be the learned regime's.
    _, protocol = study
    assert protocol.strategies is not None and protocol.strategies.headline.family == "partial_adoption"
    for spec in sweep_specifications(protocol):
        assert sensitivity_target(analysis_protocol(spec, protocol))["name"] == "learned"


def test_other_specification_ids_are_refused(study, tmp_path):
    folder, _ = study
    with pytest.raises(UserInputError, match="spec_07"):
        sweep_spec_stage(folder / "protocol.yaml", folder / "decisions.parquet", "spec_07", tmp_path / "x.json")


# ---------------------------------------------------------------------------------------------- combined table
def _result(spec, difference, low, high, low_ess=False):
    contrast = {
        "difference": difference,
        "low": low,
        "high": high,
        "bootstrap_se": None,
        "ess": 50.0,
        "low_ess": low_ess,
        "n_replicates": 4,
    }
    return {
        "id": spec.id,
        "prespecified": spec.prespecified,
        "settings": spec.settings,
        "replicates_used": 4,
        "replicates_failed": [],
        "contrasts": {"wdr": contrast},
        "sensitivity": {"tipping_point": None, "low_ess": False, "table": []},
    }


def test_combined_table_is_sorted_with_the_prespecified_analysis_flagged(tmp_path):
    path = _write(
        tmp_path,
        {"axes": {"constraints.support_threshold": [0.02, 0.1], "q_model.kind": ["linear"]}},
        evaluation={"estimators": ["wdr"]},
    )
    protocol = load_protocol(path).protocol
    grid = sweep_specifications(protocol)
    made_up = {"spec_00": (0.4, 0.1, 0.7, True), "spec_01": (None, None, None), "spec_02": (-0.2, -0.5, 0.1)}
    table = combine_sweep([_result(s, *made_up[s.id]) for s in reversed(grid)], protocol)
    assert [row["id"] for row in table["specifications"]] == ["spec_02", "spec_00", "spec_01"]  # undefined last
    assert [row["prespecified"] for row in table["specifications"]] == [False, True, False]
    assert table["intervals_showing_benefit"] == 1 and table["n_specifications"] == 3
    assert table["intervals_showing_benefit_low_ess"] == 1
    assert "(1 of them on too small an effective" in table["sentence"]
    assert table["sentence"].startswith("1 of the 3 specifications keeps the 95% bootstrap interval")
    assert "above zero" in table["sentence"] and "ranks 2 of 3" in table["sentence"]


def test_lower_is_better_counts_intervals_below_zero(tmp_path):
    path = _write(
        tmp_path,
        {"axes": {"constraints.support_threshold": [0.02, 0.1], "q_model.kind": ["linear"]}},
        evaluation={"estimators": ["wdr"]},
        reward={"description": "made-up cost", "better": "lower"},
    )
    protocol = load_protocol(path).protocol
    grid = sweep_specifications(protocol)
    # the same made-up intervals: only spec_02's (-0.5 to -0.1) lies wholly on the side of a benefit
    made_up = {"spec_00": (0.4, 0.1, 0.7), "spec_01": (None, None, None), "spec_02": (-0.3, -0.5, -0.1)}
    table = combine_sweep([_result(s, *made_up[s.id]) for s in grid], protocol)
    assert (table["better"], table["intervals_showing_benefit"]) == ("lower", 1)
    assert "below zero (lower is better)" in table["sentence"]


def test_combine_refuses_a_stale_specification(tmp_path):
    path = _write(tmp_path, {"axes": {"constraints.support_threshold": [0.02]}}, evaluation={"estimators": ["wdr"]})
    protocol = load_protocol(path).protocol
    grid = sweep_specifications(protocol)
    stale = _result(grid[1], 0.1, 0.0, 0.2) | {"settings": {"constraints.support_threshold": 0.2}}
    with pytest.raises(UserInputError, match="spec_01"):
        combine_sweep([_result(grid[0], 0.1, 0.0, 0.2), stale], protocol)


# ---------------------------------------------------------------------------------------------- workflow
def test_workflow_runs_a_two_specification_sweep_into_the_report(tmp_path):
    write_cohort(tmp_path / "data", n_episodes=400, seed=5, confounding_strength=1.0, n_truth=10)
    raw = yaml.safe_load((REPOSITORY / "config" / "protocol.yaml").read_text(encoding="utf-8"))
    raw["data"].update(root=".", decisions="data/decisions.csv", episodes="data/episodes.csv")
    raw["constraints"]["pessimism"] = 0.0
    raw["evaluation"].update(replicates=2, shards=1)
    raw["sweeps"] = {"axes": {"constraints.support_threshold": [0.05, 0.1]}, "replicates": 2}
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    out = tmp_path / "out"
    result = subprocess.run(
        [sys.executable, "-m", "regimewise.cli", "run", tmp_path / "protocol.yaml", "--out", out, "--cores", "2"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 0, result.stderr
    assert sorted(p.name for p in (out / "sweep" / "specs").iterdir()) == ["spec_00.json", "spec_01.json"]
    summary = json.loads((out / "report" / "summary.json").read_text(encoding="utf-8"))
    assert summary["sweep"]["n_specifications"] == 2
    rows = {row["id"]: row for row in summary["sweep"]["specifications"]}
    headline = {c["estimator"]: c["difference"] for c in summary["contrasts"] if c["regime"] == "learned"}["wdr"]
    assert rows["spec_00"]["prespecified"] and rows["spec_00"]["difference"] == headline
    html = (out / "report" / "report.html").read_text(encoding="utf-8")
    assert "Specification sweep" in html and summary["sweep"]["sentence"] in html
