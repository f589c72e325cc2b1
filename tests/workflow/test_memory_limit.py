"""A local run holds its jobs' memory requests to the machine's memory (``--memory``, ``--resources mem_mb=``).

Three parts: the machine's memory is read as the operating system reports it (checked against ``/proc/meminfo``
on Linux); the command handed to Snakemake carries the limit on this machine and none with a profile; and
Snakemake itself does what the limit relies on: jobs whose requests do not fit together run one after the other,
and a job asking for more than the whole runs alone instead of waiting for ever (checked on a three-rule
workflow, so a Snakemake release that changed this would fail here).
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from support.tiny import write_tiny

from regimewise import cli
from regimewise.workflow import resources


# ---------------------------------------------------------------------------------------------- the machine
@pytest.mark.skipif(not Path("/proc/meminfo").is_file(), reason="Linux's /proc/meminfo gives the reference")
def test_machine_memory_is_what_the_kernel_reports():
    total_kb = next(
        int(line.split()[1]) for line in Path("/proc/meminfo").read_text().splitlines() if line.startswith("MemTotal:")
    )
    assert resources.machine_memory_mb(limits=()) == total_kb * 1024 // 10**6


def test_a_lower_container_limit_wins_and_unlimited_or_unreadable_ones_are_ignored(tmp_path):
    physical = resources.machine_memory_mb(limits=())
    unlimited, garbage, low = tmp_path / "memory.max", tmp_path / "odd", tmp_path / "limit_in_bytes"
    unlimited.write_text("max\n")
    garbage.write_text("lots\n")
    low.write_text(f"{3 * 10**9}\n")
    assert resources.machine_memory_mb(limits=(unlimited, garbage, tmp_path / "absent")) == physical
    assert resources.machine_memory_mb(limits=(unlimited, low)) == min(physical, 3000)
    huge = tmp_path / "v1"  # a version-1 group without a limit reads a number far above the machine
    huge.write_text(f"{2**63 - 4096}\n")
    assert resources.machine_memory_mb(limits=(huge,)) == physical


def test_group_limits_are_found_from_the_process_groups_and_their_ancestors(tmp_path):
    # the layout of cgroup(7) (Linux manual): /proc/self/cgroup lines "ID:CONTROLLERS:PATH", version 2 with ID 0
    # and no controllers; a group's limit file sits in its folder under the hierarchy's mount point
    proc = tmp_path / "cgroup"
    proc.write_text("0::/slot/job1\n4:memory:/a/b\n2:cpu,cpuacct:/c\n")
    root = tmp_path / "fs"
    files = resources.cgroup_limit_files(proc, root)
    v2 = [root / g / "memory.max" for g in ("slot/job1", "slot", "")]
    v1 = [root / "memory" / g / "memory.limit_in_bytes" for g in ("a/b", "a", "")]
    assert set(v2 + [root / "unified" / g / "memory.max" for g in ("slot/job1", "slot", "")] + v1) == set(files)
    for path, text in ((v2[0], "max"), (v2[1], f"{2 * 10**9}"), (v1[1], f"{3 * 10**9}")):
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text + "\n")
    physical = resources.machine_memory_mb(limits=())
    assert resources.machine_memory_mb(limits=files) == min(physical, 2000)  # the job slot's parent binds
    assert resources.cgroup_limit_files(tmp_path / "absent", root) == []


# ---------------------------------------------------------------------------------------------- the command
def _command(tmp_path, monkeypatch, *options) -> list[str]:
    seen = []
    monkeypatch.setattr(cli, "_run_logged", lambda command, *rest: seen.append(command) or 0)
    monkeypatch.chdir(tmp_path)
    study = tmp_path / "s" / "protocol.yaml"
    if not study.is_file():
        write_tiny(tmp_path / "s")
    assert cli.main(["run", str(study), "--out", str(tmp_path / "out"), *options]) == 0
    (command,) = seen
    return command


def test_the_limit_reaches_snakemake_as_given_or_as_the_machine_has_it(tmp_path, monkeypatch, capsys):
    command = _command(tmp_path, monkeypatch, "--memory", "6000")
    assert command[command.index("--resources") + 1] == "mem_mb=6000"
    assert "with 2 core(s) and 6,000 MB of memory" in capsys.readouterr().out
    monkeypatch.setattr(cli, "machine_memory_mb", lambda: 777)
    command = _command(tmp_path, monkeypatch)
    assert command[command.index("--resources") + 1] == "mem_mb=777"
    monkeypatch.setattr(cli, "machine_memory_mb", lambda: None)  # the system does not say: no limit
    assert "--resources" not in _command(tmp_path, monkeypatch)


def test_no_limit_with_a_profile(tmp_path, monkeypatch):
    (tmp_path / "site").mkdir()
    (tmp_path / "site" / "profile.yaml").write_text("cores: 1\n", encoding="utf-8")
    # a cluster's scheduler places each job; a total over all submitted jobs would only throttle them
    assert "--resources" not in _command(tmp_path, monkeypatch, "--profile", "site", "--memory", "6000")


def test_a_memory_below_one_megabyte_is_refused_in_one_line(tmp_path, capsys):
    assert cli.main(["run", str(write_tiny(tmp_path / "s")), "--memory", "0"]) == 1
    err = capsys.readouterr().err
    assert err.strip() == "regimewise error: --memory must be at least 1 (MB)"


# ---------------------------------------------------------------------------------------------- Snakemake
SPAN = "import sys, time; start = time.time(); time.sleep(1); open(sys.argv[1], 'w').write(f'{start} {time.time()}')"

WORKFLOW = """
rule all:
    input: "a.txt", "b.txt", "big.txt"

rule a:
    output: "a.txt"
    resources: mem_mb=600
    shell: "'{python}' span.py {{output}}"

rule b:
    output: "b.txt"
    resources: mem_mb=lambda wildcards, attempt: 600
    shell: "'{python}' span.py {{output}}"

rule big:
    output: "big.txt"
    resources: mem_mb=5000
    shell: "'{python}' span.py {{output}}"
"""


def test_snakemake_runs_jobs_one_at_a_time_when_their_requests_do_not_fit_together(tmp_path):
    (tmp_path / "Snakefile").write_text(WORKFLOW.format(python=sys.executable), encoding="utf-8")
    (tmp_path / "span.py").write_text(SPAN, encoding="utf-8")  # writes its start and end time
    result = subprocess.run(
        [sys.executable, "-m", "snakemake", "--cores", "3", "--resources", "mem_mb=1000", "--quiet", "all"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 0, result.stdout + result.stderr  # 'big' (5000 > 1000) ran instead of waiting
    spans = sorted(tuple(map(float, (tmp_path / f"{name}.txt").read_text().split())) for name in ("a", "b", "big"))
    # three cores would run all three at once; 600 + 600 > 1000 and 'big' takes the whole, so none overlap
    assert all(earlier[1] <= later[0] for earlier, later in zip(spans, spans[1:])), spans
