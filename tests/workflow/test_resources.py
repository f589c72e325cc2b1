"""Resource requests of the rules: scaled by the decisions validation kept, estimated from the records before."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
from support.tiny import tiny_protocol_dict

from regimewise.workflow.resources import (
    BYTES_PER_DECISION,
    CSV_BYTES_PER_DECISION,
    SAFETY,
    STAGE_COSTS,
    recorded_decisions,
    stage_resources,
)
from regimewise.workflow.settings import Settings, load_settings


def test_decisions_come_from_validation_when_present(tmp_path):
    # exact computation: rows_kept of validation.json wins over the records' size
    records = tmp_path / "decisions.csv"
    records.write_bytes(b"x" * 4000)
    summary = tmp_path / "validation.json"
    assert recorded_decisions(summary, records) == int(4000 / CSV_BYTES_PER_DECISION)
    summary.write_text(json.dumps({"rows_kept": 1234}), encoding="utf-8")
    assert recorded_decisions(summary, records) == 1234
    summary.write_text("{not json", encoding="utf-8")
    assert recorded_decisions(summary, records) == int(4000 / CSV_BYTES_PER_DECISION)


def test_parquet_size_estimate_and_missing_files(tmp_path):
    records = tmp_path / "decisions.parquet"
    records.write_bytes(b"x" * 600)
    assert recorded_decisions(tmp_path / "none.json", records) == int(600 / BYTES_PER_DECISION[".parquet"])
    assert recorded_decisions(tmp_path / "none.json", tmp_path / "absent.csv") == 0


def test_requests_grow_linearly_and_double_on_retry():
    # exact computation of the documented formula: (base + slope x millions) x safety, rounded up to 100 MB
    cost = STAGE_COSTS["regime"]
    one = stage_resources("regime", 2_000_000)
    assert one["mem_mb"] == math.ceil((cost.base_mb + 2 * cost.mb_per_million) * SAFETY / 100) * 100
    assert one["runtime"] == max(5, math.ceil(2 * cost.minutes_per_million * SAFETY))
    retry = stage_resources("regime", 2_000_000, attempt=2)
    assert retry["mem_mb"] == math.ceil((cost.base_mb + 2 * cost.mb_per_million) * SAFETY * 2 / 100) * 100
    assert stage_resources("regime", 20_000_000)["mem_mb"] > one["mem_mb"]


def test_shards_ask_for_time_per_replicate():
    without = stage_resources("bootstrap_shard", 10_000_000, replicates=0)["runtime"]
    with_reps = stage_resources("bootstrap_shard", 10_000_000, replicates=10)["runtime"]
    assert with_reps > without


@pytest.mark.parametrize(("replicates", "shards", "most"), [(200, 4, 50), (10, 4, 3), (0, 1, 0)])
def test_replicates_per_shard(replicates, shards, most):
    settings = Settings("p", ".", "logs", "bench", "d.csv", None, shards, (), replicates)
    assert settings.replicates_per_shard == most


def test_every_rule_has_a_cost():
    rules = Path(__file__).resolve().parents[2] / "rules"
    names = {
        line.split()[1].rstrip(":")
        for path in rules.glob("*.smk")
        for line in path.read_text(encoding="utf-8").splitlines()
        if line.startswith("rule ")
    }
    assert names - {"all"} == set(STAGE_COSTS)


def test_the_selfcheck_summary_asks_for_its_reference_cohort(tmp_path):
    # The summary job learns the regret's reference rule on reference_episodes simulated episodes of at most
    # `horizon` decisions each, whatever the records' size: its requests count those decisions too. Measured: the
    # demo protocol's self-check (24,000 decisions, reference from 100,000 episodes × 8) peaked at 964 MB in its
    # largest process (bench/RESULTS.md, 2026-12-04), above the 620 MB the records alone would ask for.
    config = {"protocol": str(tmp_path / "protocol.yaml"), "results": "r", "logs": "l", "benchmarks": "b"}
    raw = tiny_protocol_dict()
    raw["selfcheck"] = {"reference_episodes": 100_000}
    (tmp_path / "protocol.yaml").write_text(json.dumps(raw), encoding="utf-8")
    settings = load_settings(config)
    assert settings.selfcheck_reference_decisions == 100_000 * raw["horizon"]
    demo = stage_resources("selfcheck", 24_000 + 100_000 * 8)
    assert demo["mem_mb"] >= 964 and stage_resources("selfcheck", 24_000)["mem_mb"] < 964
    raw.pop("selfcheck")
    (tmp_path / "protocol.yaml").write_text(json.dumps(raw), encoding="utf-8")
    settings = load_settings(config)
    assert settings.selfcheck_reference_decisions == 0
