"""Progress lines from Snakemake's own job events, and the closing count of statistical warnings."""

from __future__ import annotations

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
localrule evaluate:
    input: protocol.yaml, validate/decisions.parquet, behaviour/behaviour_proba.parquet, regime/recommendations.parquet
    output: evaluate/values.json
    log: logs/evaluate.log
    jobid: 10
    benchmark: benchmarks/evaluate.tsv
    resources: tmpdir=/tmp, runtime=5, mem_mb=700, mem=700 MB, mem_mib=668
Select jobs to execute...
pipeline/regimewise/evaluation/ope.py:395: StatisticalWarning: no episode has a positive importance weight
  results.append(estimate(weights, gamma))
[Thu Dec  3 01:52:34 2026]
Finished jobid: 10 (Rule: evaluate)
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
        "[7/14] off-policy evaluation done (9 s)",
        "[8/14] bootstrap shard 2 of 2 done (11 s)",
    ]


def test_the_closing_line_counts_the_statistical_warnings_and_names_the_log(tmp_path):
    log = tmp_path / "workflow.log"
    log.write_text(STREAM + STREAM.replace("ope.py:395", "ope.py:397"), encoding="utf-8")
    assert warning_line(log) == f"2 statistical warnings (read them before the estimates); they are listed in {log}"
    log.write_text("Finished jobid: 1 (Rule: validate)\n", encoding="utf-8")
    assert warning_line(log) == "no statistical warnings"
