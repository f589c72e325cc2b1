"""Progress lines from Snakemake's own job events, and the closing count of statistical warnings."""

from __future__ import annotations

from pathlib import Path

from regimewise.workflow.progress import Progress, warning_line

# An excerpt of a real Snakemake 9.27.1 log stream (a two-shard run of the small study; paths shortened and the
# "reason" lines dropped): two jobs announced together, finishing in the other order, a warning in between.
STREAM = """\
[Thu Dec  3 01:52:25 2026]
Finished jobid: 8 (Rule: regime)
6 of 14 steps (43%) done
Select jobs to execute...
Execute 2 jobs...

[Thu Dec  3 01:52:25 2026]
localrule bootstrap_shard:
    input: protocol.yaml, validate/decisions.parquet, validate/episodes.parquet, regime/recommendations.parquet
    output: bootstrap/shards/shard_1.json
    log: logs/bootstrap_shard_1.log
    jobid: 9
    benchmark: benchmarks/bootstrap_shard_1.tsv
    wildcards: shard=1
    resources: tmpdir=/tmp, runtime=5, mem_mb=700, mem=700 MB, mem_mib=668
[Thu Dec  3 01:52:25 2026]
localrule evaluate_fixed:
    input: protocol.yaml, validate/decisions.parquet, behaviour/behaviour_proba.parquet
    output: evaluate/fixed.json
    log: logs/evaluate_fixed.log
    jobid: 10
    benchmark: benchmarks/evaluate_fixed.tsv
    resources: tmpdir=/tmp, runtime=5, mem_mb=700, mem=700 MB, mem_mib=668
Select jobs to execute...
pipeline/regimewise/evaluation/ope.py:395: StatisticalWarning: no episode has a positive importance weight
  results.append(estimate(weights, gamma))
[Thu Dec  3 01:52:34 2026]
Finished jobid: 10 (Rule: evaluate_fixed)
7 of 14 steps (50%) done
Execute 1 jobs...

[Thu Dec  3 01:52:36 2026]
Finished jobid: 9 (Rule: bootstrap_shard)
8 of 14 steps (57%) done
"""


class FakeClock:
    """Seconds advanced by hand: 0 when the jobs are announced, then as the test says."""

    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_one_line_per_finished_job_in_the_order_snakemake_reports_them():
    clock = FakeClock()
    progress = Progress(shards=2, clock=clock)
    shown = []
    for line in STREAM.splitlines(keepends=True):
        if line.startswith("Finished jobid: 10"):
            clock.now = 9.2
        elif line.startswith("Finished jobid: 9"):
            clock.now = 11.0
        out = progress.feed(line)
        if out:
            shown.append(out)
    # the regime job finished before this excerpt began (never announced in it), so it gets no line
    assert shown == [
        "[7/14] off-policy evaluation of usual care and the fixed strategies done (9 s)",
        "[8/14] bootstrap shard 2 of 2 done (11 s)",
    ]


def test_the_closing_line_counts_the_warnings_in_the_stage_logs_and_names_them(tmp_path):
    logs = tmp_path / "logs"
    logs.mkdir()
    # Snakemake's log holds only this invocation's jobs (here: a rerun of the report alone): not counted
    (logs / "workflow.log").write_text(STREAM + "Finished jobid: 1 (Rule: report)\n", encoding="utf-8")
    (logs / "evaluate_fixed.log").write_text(
        "WARNING StatisticalWarning: no episode has a positive importance weight\n"
        "WARNING StatisticalWarning: no episode agrees with always_add_agent\n"
        "INFO resource use: wall 1.93 s, cpu 4.04 s, system 0.31 s, peak rss 368.6 MB\n",
        encoding="utf-8",
    )
    (logs / "survival.log").write_text("WARNING StatisticalWarning: few clones follow always_step_up\n", "utf-8")
    (logs / "report.log").write_text(
        "INFO resource use: wall 1.00 s, cpu 1.00 s, system 0.08 s, peak rss 300.0 MB\n", "utf-8"
    )
    assert warning_line(logs) == (
        "3 statistical warnings (read them before the estimates); listed in "
        f"{logs / 'evaluate_fixed.log'}, {logs / 'survival.log'}"
    )
    for name in ("evaluate_fixed.log", "survival.log"):
        (logs / name).unlink()
    assert warning_line(logs) == "no statistical warnings"
    (logs / "regime.log").write_text("WARNING StatisticalWarning: one\n", encoding="utf-8")
    assert (
        warning_line(logs) == f"1 statistical warning (read them before the estimates); listed in {logs / 'regime.log'}"
    )


def test_a_stage_writes_its_statistical_warnings_to_its_own_log(tmp_path, monkeypatch):
    import types
    import warnings

    from regimewise.errors import StatisticalWarning
    from regimewise.workflow import stages

    def noisy_stage(out):
        warnings.warn("few episodes\n  follow this regime", StatisticalWarning, stacklevel=1)
        warnings.warn("an unrelated library notice", UserWarning, stacklevel=1)
        Path(out).write_text("done", encoding="utf-8")

    monkeypatch.setitem(stages.STAGES, "noisy", noisy_stage)
    monkeypatch.setitem(stages.STAGE_ARGUMENTS, "noisy", {"out"})
    log = tmp_path / "logs" / "noisy.log"
    smk = types.SimpleNamespace(
        rule="noisy",
        log=_Named(log=str(log)),
        input=_Named(),
        output=_Named(out=str(tmp_path / "out.txt")),
        wildcards=_Named(),
        params=_Named(),
        threads=1,
    )
    passed_on = []
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        warnings.showwarning = lambda message, category, *rest: passed_on.append(category.__name__)
        shown = warnings.showwarning
        stages.run_snakemake_job(smk)
        assert warnings.showwarning is shown  # the hook is removed afterwards
    lines = log.read_text(encoding="utf-8").splitlines()
    assert lines[0] == "WARNING StatisticalWarning: few episodes follow this regime"
    assert not any("unrelated" in line for line in lines)
    assert passed_on == ["StatisticalWarning", "UserWarning"]  # every warning still reaches standard error
    assert warning_line(log.parent).startswith("1 statistical warning ")


class _Named(dict):
    """What Snakemake passes as ``snakemake.log`` and friends: named items that also index by position."""

    def __getitem__(self, key):
        return list(self.values())[key] if isinstance(key, int) else super().__getitem__(key)
