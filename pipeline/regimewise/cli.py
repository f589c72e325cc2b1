"""Command line: ``regimewise demo | run PROTOCOL | check PROTOCOL | selfcheck PROTOCOL | simulate | schema |
verify RESULTS_DIR | compare RUN_A RUN_B | bundle RESULTS_DIR``.

``demo`` and ``run`` drive the Snakemake workflow in a subprocess (``python -m snakemake``) with the results
folder as its working directory, printing one line per finished job from Snakemake's own log stream
(:mod:`regimewise.workflow.progress`); ``check`` validates a protocol and its records and writes only the error
list (``validation_errors.csv`` in ``--errors``, default the protocol's folder) when they fail, removing an old
one when they pass; ``selfcheck`` reruns the analysis on cohorts simulated to look like the records
(:mod:`regimewise.selfcheck`) in worker processes, without Snakemake; ``schema`` prints the protocol's JSON
Schema (or writes ``--out``). ``verify``, ``compare`` and ``bundle`` read a finished run's appendix
(:mod:`regimewise.appendix`); ``verify`` reruns the workflow into a temporary folder (or rerenders the report
only, or compares with another run) and compares every manifest entry.

``demo`` and ``run`` hand Snakemake the command line as typed (absolute paths shortened,
:func:`regimewise.appendix.records.shown_command`) and the command that reproduces the run, in the workflow config;
the report records the second, the appendix both.

A run recovers by itself from a hard kill: it holds an operating-system lock on ``.snakemake/regimewise.lock``
in the results folder (inherited by its Snakemake process, so it stays held while any part of the run lives);
when that lock is free but Snakemake's own directory lock is still there, the lock was left by a run that no
longer exists, and it is removed with Snakemake's ``--unlock`` before the workflow runs with
``--rerun-incomplete``. A second run on a results folder whose lock a live run holds is refused.

Errors a user can fix print one line (what, where, how to fix) and exit with status 1; ``--debug`` shows
the traceback or the full workflow log.
"""

from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import tempfile
import time
import traceback
from contextlib import contextmanager
from pathlib import Path

import yaml

from regimewise import __version__
from regimewise.appendix.bundle import bundle_bytes
from regimewise.appendix.compare import compare_runs, comparison_lines
from regimewise.appendix.environment import environment_record
from regimewise.appendix.reading import PROVENANCE, results_folder, run_json
from regimewise.appendix.records import reproduce_command, shown_command
from regimewise.appendix.verify import (
    VERIFICATION,
    changed_since_run,
    check_recorded_inputs,
    verdict_line,
    verification,
)
from regimewise.cautions import TERMINAL_CAUTION
from regimewise.data.validate import report_lines, validate_records, write_error_report
from regimewise.demo.files import write_cohort
from regimewise.errors import ERROR_PREFIX, OS_REASONS, DataValidationError, UserInputError, os_reason
from regimewise.io import require_file, write_bytes, write_json, write_text
from regimewise.protocol.loading import load_protocol, schema_text
from regimewise.workflow.progress import WORKFLOW_LOG, Progress, warning_line
from regimewise.workflow.resources import machine_memory_mb

try:  # POSIX advisory locks; where they are missing a run cannot tell a dead run's lock from a live one's
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None


REPOSITORY = Path(__file__).resolve().parents[2]


SNAKEFILE = REPOSITORY / "Snakefile"


DEMO_PROTOCOL = REPOSITORY / "config" / "protocol.yaml"


# The lock a live run holds, and Snakemake's own lock folder (its default "file" persistence backend), both
# relative to the results folder.
RUN_LOCK = Path(".snakemake") / "regimewise.lock"


SNAKEMAKE_LOCKS = Path(".snakemake") / "locks"


PURPOSE = (
    "regimewise: learn an adaptive treatment strategy (a dynamic treatment regime) from routine-care records "
    "under a written research protocol, evaluate it off-policy against usual care, test its sensitivity to "
    "hidden confounding and write an audit-ready report."
)


def build_parser() -> argparse.ArgumentParser:
    """The command line; every help has a purpose line, the research-use caution and each option's default."""
    debug = argparse.ArgumentParser(add_help=False)
    debug.add_argument(
        "--debug",
        action="store_true",
        default=argparse.SUPPRESS,
        help="show tracebacks and the full workflow log (before or after the command; default: off)",
    )
    parser = argparse.ArgumentParser(prog="regimewise", description=PURPOSE, epilog=TERMINAL_CAUTION)
    parser.add_argument("--version", action="version", version=f"regimewise {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks and the full workflow log (default: off)")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name, purpose):
        return commands.add_parser(name, help=purpose, description=purpose, epilog=TERMINAL_CAUTION, parents=[debug])

    demo = command("demo", "Run the whole analysis of the demo protocol on the invented Harbourline cohort.")
    _add_run_options(demo, "results/demo")
    run = command("run", "Run the whole analysis for your protocol: validation, models, evaluation, report.")
    run.add_argument("protocol", help="protocol YAML file (required)")
    _add_run_options(run, "results/<run_name of the protocol>")
    check = command(
        "check", "Validate a protocol and its records without running the analysis; on failure write the error list."
    )
    check.add_argument("protocol", help="protocol YAML file (required)")
    check.add_argument(
        "--errors",
        metavar="FOLDER",
        help=f"folder for the error list {ERROR_LIST} (default: the protocol's folder); a passing check removes an "
        "old list there",
    )
    selfcheck = command(
        "selfcheck",
        "Rerun the analysis on cohorts simulated to look like your records, with known truths: bias, interval "
        "coverage and power of the pipeline on records like yours.",
    )
    selfcheck.add_argument("protocol", help="protocol YAML file (required)")
    selfcheck.add_argument(
        "--cohorts", type=int, help="simulated cohorts (default: the protocol's selfcheck.cohorts, else 50)"
    )
    selfcheck.add_argument(
        "--replicates",
        type=int,
        help="bootstrap replicates per simulated cohort (default: the protocol's selfcheck.replicates, else 50)",
    )
    selfcheck.add_argument(
        "--truth-episodes",
        type=int,
        help="simulated episodes per policy for the truths (default: the protocol's selfcheck.truth_episodes, else "
        "100000)",
    )
    selfcheck.add_argument(
        "--reference-episodes",
        type=int,
        help="simulated episodes the reference rule for the learned regime's regret is learned from (default: the "
        "protocol's selfcheck.reference_episodes, else 100000)",
    )
    selfcheck.add_argument(
        "--confounder-gamma",
        metavar="GAMMA",
        help="strength Γ >= 1 of a hidden confounder built into the look-alike world, so the self-check also tests "
        "the sensitivity bounds at Γ (default: the protocol's selfcheck.confounder_gamma, else 1 = none)",
    )
    selfcheck.add_argument(
        "--out",
        help="folder for selfcheck.json and selfcheck.html (default: results/<run_name of the protocol>/selfcheck)",
    )
    selfcheck.add_argument("--cores", type=int, default=2, help="worker processes (default: %(default)s)")
    simulate = command("simulate", "Write an invented cohort from the demo scenario's simulator (demo use only).")
    simulate.add_argument("--out", required=True, help="folder for decisions.csv, episodes.csv, truth.json (required)")
    simulate.add_argument("--episodes", type=int, default=3000, help="episodes to simulate (default: %(default)s)")
    simulate.add_argument("--seed", type=int, default=20261201, help="random seed (default: %(default)s)")
    simulate.add_argument(
        "--strength", type=float, default=1.0, help="hidden-confounding strength, 0 = none (default: %(default)s)"
    )
    simulate.add_argument(
        "--force", action="store_true", help="write into a folder that is not empty (default: refuse)"
    )
    schema = command("schema", "Print the protocol's JSON Schema, or write it to a file.")
    schema.add_argument("--out", metavar="FILE", help="file to write (default: standard output)")
    _add_appendix_commands(command)
    return parser


def _add_appendix_commands(command):
    verify = command(
        "verify",
        "Check a finished run: hash its protocol and inputs, rerun it into a temporary folder and compare every file "
        "of its manifest byte for byte; writes appendix/verification.json; exit 0 only when identical.",
    )
    verify.add_argument("results", metavar="RESULTS_DIR", help="results folder of a finished run (required)")
    verify.add_argument(
        "--protocol", help="the run's protocol file (default: the one the run was started with, if still there)"
    )
    how = verify.add_mutually_exclusive_group()
    how.add_argument(
        "--report-only",
        action="store_true",
        help="quick check: rerender only the report from the run's own stage outputs (default: rerun everything)",
    )
    how.add_argument(
        "--against",
        metavar="OTHER_DIR",
        help="compare with another finished run of the same protocol instead of rerunning (default: rerun)",
    )
    how.add_argument(
        "--rerun-into", metavar="FOLDER", help="keep the rerun in FOLDER (default: a temporary folder, removed)"
    )
    verify.add_argument("--cores", type=int, default=2, help="cores the rerun may use (default: %(default)s)")
    verify.add_argument("--memory", type=int, metavar="MB", help=MEMORY_HELP)
    verify.add_argument("--quiet", action="store_true", help="no line per finished stage of the rerun (default: off)")
    for name, (purpose, positionals, out_help) in READING_COMMANDS.items():
        reader = command(name, purpose)
        for dest, metavar, words in positionals:
            reader.add_argument(dest, metavar=metavar, help=f"{words} (required)")
        reader.add_argument("--out", metavar="FILE", help=out_help)


MEMORY_HELP = (
    "memory in MB the run's jobs may hold together on this machine: a stage starts only when its request (scaled "
    "from the number of decisions) fits beside those running, and a stage asking for more runs alone with this "
    "much; ignored with --profile (default: this machine's memory, or the limit of its container or batch job "
    "when lower)"
)


# The commands that only read finished runs: purpose, positional arguments (name, metavar, words), --out's help.
READING_COMMANDS = {
    "compare": (
        "Show what differs between two finished runs: protocol settings key by key, inputs, environment, headline.",
        [("run_a", "RUN_A", "results folder of the first run"), ("run_b", "RUN_B", "results folder of the second run")],
        "also write every difference as JSON (default: none)",
    ),
    "bundle": (
        "Write one deterministic zip of a finished run: report, summary, provenance and appendix (with the protocol).",
        [("results", "RESULTS_DIR", "results folder of a finished run")],
        "zip to write (default: RESULTS_DIR/<run_name>-bundle.zip)",
    ),
}


def _add_run_options(parser, default_out):
    parser.add_argument("--out", help=f"results folder (default: {default_out})")
    parser.add_argument("--cores", type=int, default=2, help="cores Snakemake may use (default: %(default)s)")
    parser.add_argument("--memory", type=int, metavar="MB", help=MEMORY_HELP)
    parser.add_argument(
        "--quiet",
        action="store_true",
        help="print no line per finished stage (the caution, the warning count and the report paths stay; "
        "default: off)",
    )
    parser.add_argument(
        "--profile",
        metavar="DIR",
        help="a Snakemake profile folder (holding profile.yaml) that sends the jobs elsewhere, e.g. "
        "config/profiles/slurm: every stage and bootstrap shard a SLURM job; the results are the same bytes "
        "(default: none, every job on this machine)",
    )


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    args.debug = getattr(args, "debug", False)
    args.argv = list(sys.argv[1:] if argv is None else argv)
    try:
        return COMMANDS[args.command](args)
    except UserInputError as err:
        if args.debug:
            traceback.print_exc()
        print(ERROR_PREFIX + " ".join(str(err).split()), file=sys.stderr)
        return 1


# ---------------------------------------------------------------------------------------------- commands
def cmd_demo(args) -> int:
    args.out = args.out or "results/demo"
    return _print_outputs(_run_workflow(DEMO_PROTOCOL, args, _command_record(args, demo=True)))


def cmd_run(args) -> int:
    return _print_outputs(_run_workflow(Path(args.protocol), args, _command_record(args, demo=False)))


def _command_record(args, demo: bool) -> dict:
    """The command line as typed and the one that reproduces the run (for the workflow config)."""
    protocol = DEMO_PROTOCOL if demo else Path(args.protocol)
    return {"command": shown_command(args.argv, Path.cwd()), "reproduce": reproduce_command(demo, protocol)}


def _print_outputs(out: Path) -> int:
    print(f"report:  {out / 'report' / 'report.html'}")
    print(f"summary: {out / 'report' / 'summary.json'}")
    print(f"appendix: {out / 'appendix'} (check a rerun with `regimewise verify {out}`)")
    return 0


def cmd_check(args) -> int:
    pf = load_protocol(args.protocol)
    errors = Path(args.errors) if args.errors else pf.path.parent
    report = errors / ERROR_LIST
    try:
        summary = validate_records(pf).summary
    except DataValidationError as err:
        try:
            write_error_report(report, err.errors)
        except UserInputError as unwritten:
            raise UserInputError(f"{err}; the error list was not written ({unwritten}); fix --errors") from None
        _print_error_report(report)
        raise
    _remove_stale(report)
    print(
        f"{pf.path.name}: protocol valid; {summary['rows_kept']} decisions in {summary['episodes']} episodes "
        f"({summary['patients']} patients) pass validation."
    )
    return 0


ERROR_LIST = "validation_errors.csv"


def _remove_stale(report: Path) -> None:
    """Remove an error list an earlier failing check left (a passing check must not leave one behind)."""
    if report.is_file():
        try:
            report.unlink()
        except OSError as err:
            raise UserInputError(f"the old error list {report} cannot be removed: {os_reason(err)}") from None
        print(f"removed the old error list {report}")


def cmd_selfcheck(args) -> int:
    from regimewise.selfcheck.run import run_selfcheck, settings  # heavy imports only for this command

    if args.cores < 1:
        raise UserInputError("--cores must be at least 1")
    pf = load_protocol(args.protocol)
    chosen = settings(
        pf,
        cohorts=args.cohorts,
        replicates=args.replicates,
        truth_episodes=args.truth_episodes,
        reference_episodes=args.reference_episodes,
        confounder_gamma=args.confounder_gamma,
    )
    out = output_folder(args.out or f"results/{pf.protocol.study.run_name}/selfcheck", "--out")
    gamma = chosen["confounder_gamma"]
    hidden = f", a hidden confounder of strength Γ = {gamma:g}" if gamma > 1 else ""
    print(
        f"regimewise {__version__}: self-check of {pf.path.name}: {chosen['cohorts']} look-alike cohorts, "
        f"{chosen['replicates']} replicates each{hidden}, {args.cores} worker(s), into {out}"
    )
    print(TERMINAL_CAUTION)
    started = time.perf_counter()

    def progress(done, total, result):
        outcome = f"failed: {result['failed']}" if "failed" in result else "done"
        elapsed = time.perf_counter() - started
        print(f"[{done}/{total}] look-alike cohort {result['cohort']} {outcome} ({elapsed:.0f} s)", flush=True)

    document = run_selfcheck(pf, out, chosen, cores=args.cores, progress=progress)
    minutes, seconds = divmod(round(time.perf_counter() - started), 60)
    uc = (document["summary"]["usual_care_value"] or {}).get("all") or {}
    if uc.get("coverage") is not None:
        print(
            f"usual care's value: {100 * uc['coverage']:.1f}% coverage (Monte Carlo SE "
            f"{100 * uc['coverage_mcse']:.1f} points) over {uc['n_used']} cohorts"
        )
    confounding = document["summary"].get("confounding")
    if confounding is not None and confounding["truth_within_interval"] is not None:
        print(
            f"hidden confounder Γ = {confounding['gamma']:g}: the bounds' intervals at Γ held the truth in "
            f"{100 * confounding['truth_within_interval']:.1f}% (Monte Carlo SE "
            f"{100 * confounding['truth_within_interval_mcse']:.1f} points) of "
            f"{confounding['cohorts_with_interval']} cohorts"
        )
    print(f"self-check done in {minutes} min {seconds} s")
    print(f"page:    {out / 'selfcheck.html'}")
    print(f"details: {out / 'selfcheck.json'}")
    return 0


def cmd_simulate(args) -> int:
    if args.episodes < 1:
        raise UserInputError(f"--episodes must be at least 1 (got {args.episodes})")
    if not math.isfinite(args.strength) or args.strength < 0:
        raise UserInputError(f"--strength must be a finite number of at least 0 (got {args.strength:g}); 0 = none")
    folder = Path(args.out)
    if folder.is_dir() and any(folder.iterdir()) and not args.force:
        raise UserInputError(
            f"simulate --out {folder} is not empty; choose an empty or new folder, or add --force to overwrite"
        )
    out = output_folder(args.out, "simulate --out")
    write_cohort(out, n_episodes=args.episodes, seed=args.seed, confounding_strength=args.strength)
    print(f"wrote an invented cohort of {args.episodes} episodes to {args.out} (demo use only)")
    return 0


def cmd_schema(args) -> int:
    if args.out is None:
        sys.stdout.write(schema_text())
        return 0
    target = Path(args.out)
    if target.is_dir():
        raise UserInputError(f"schema --out {target} is a directory; give a file name")
    write_text(target, schema_text())
    print(f"wrote {target}", file=sys.stderr)
    return 0


def cmd_verify(args) -> int:
    root = results_folder(args.results, "verify")
    protocol = Path(args.protocol) if args.protocol else _recorded_protocol(root)
    pf = check_recorded_inputs(root, protocol.resolve())
    reproduce = run_json(root, PROVENANCE)["commands"][0]
    if args.against:
        other = results_folder(args.against, "verify --against")
        record = verification(root, "against", other, run_json(other, "appendix/environment.json"))
    elif args.report_only and changed_since_run(root):  # rerendering from edited stage outputs proves nothing
        record = verification(root, "report", None, environment_record())
    elif args.report_only:
        with tempfile.TemporaryDirectory(prefix="regimewise-verify-") as tmp:
            _rerender_report(root, pf, Path(tmp), reproduce)
            record = verification(root, "report", Path(tmp), environment_record())
    else:
        with _rerun_folder(args.rerun_into) as out:
            args.out = out
            command = {"command": shown_command(args.argv, Path.cwd()), "reproduce": reproduce}
            _run_workflow(pf.path, args, command)
            record = verification(root, "rerun", out, run_json(out, "appendix/environment.json"))
    write_json(root / "appendix" / VERIFICATION, record)
    print(verdict_line(record))
    return 0 if record["verdict"] == "identical" else 1


def _recorded_protocol(root: Path) -> Path:
    """The protocol a run was started with, from its workflow config, or one line asking for --protocol."""
    config = root / WORKFLOW_CONFIG
    try:
        return Path(yaml.safe_load(config.read_text(encoding="utf-8"))["protocol"])
    except (OSError, yaml.YAMLError, KeyError, TypeError):
        raise UserInputError(
            f"verify: cannot tell which protocol {root} was run with ({config} is missing or unreadable); "
            "give it with --protocol"
        ) from None


@contextmanager
def _rerun_folder(keep: str | None):
    if keep is not None:
        folder = Path(keep)
        if folder.is_dir() and any(folder.iterdir()):  # its old results would count as the rerun's
            raise UserInputError(f"verify --rerun-into {folder} is not empty; give an empty or new folder")
        yield output_folder(keep, "verify --rerun-into")
        return
    with tempfile.TemporaryDirectory(prefix="regimewise-verify-") as tmp:
        yield Path(tmp)


def _rerender_report(root: Path, pf, out: Path, reproduce: str) -> None:
    """Rerender report.html, summary.json and the provenance from the run's own stage outputs into ``out``."""
    from regimewise.workflow.stages import report_stage  # the report's machinery, only for this command

    p = pf.protocol
    report_stage(
        protocol=str(pf.path),
        validation=root / "validate" / "validation.json",
        behaviour=root / "behaviour" / "behaviour.json",
        regime=root / "regime" / "regime.json",
        values=root / "evaluate" / "values.json",
        html=out / "report" / "report.html",
        summary=out / "report" / "summary.json",
        provenance=out / PROVENANCE,
        intervals=root / "bootstrap" / "intervals.json",
        cohort=root / "describe" / "cohort.json",
        sensitivity=root / "sensitivity" / "sensitivity.json",
        sweep=root / "sweep" / "sweep.json" if p.sweeps is not None else None,
        survival=root / "survival" / "survival.json" if p.survival is not None else None,
        reproduce=reproduce,
    )


def cmd_compare(args) -> int:
    a, b = results_folder(args.run_a, "compare"), results_folder(args.run_b, "compare")
    result = compare_runs(a, b)
    print("\n".join(comparison_lines(result)))
    if args.out:
        write_json(args.out, result)
        print(f"wrote {args.out}")
    return 0


def cmd_bundle(args) -> int:
    root = results_folder(args.results, "bundle")
    data = bundle_bytes(root)
    target = (
        Path(args.out)
        if args.out
        else root / f"{run_json(root, 'report/summary.json')['study']['run_name']}-bundle.zip"
    )
    write_bytes(target, data)
    print(f"wrote {target} ({len(data)} bytes)")
    return 0


COMMANDS = {
    "demo": cmd_demo,
    "run": cmd_run,
    "check": cmd_check,
    "selfcheck": cmd_selfcheck,
    "simulate": cmd_simulate,
    "schema": cmd_schema,
    "verify": cmd_verify,
    "compare": cmd_compare,
    "bundle": cmd_bundle,
}


# ---------------------------------------------------------------------------------------------- workflow
def _run_workflow(protocol: Path, args, record: dict) -> Path:
    """Run the workflow for ``protocol`` into ``args.out``; ``record`` holds the command line and the command
    that reproduces the run (written to the workflow config). The results folder."""
    if not SNAKEFILE.is_file():
        raise UserInputError(
            f"workflow files not found beside the package ({SNAKEFILE}); install regimewise from a checkout "
            "with `pip install -e .`"
        )
    if args.cores < 1:
        raise UserInputError("--cores must be at least 1")
    memory = getattr(args, "memory", None)
    if memory is not None and memory < 1:
        raise UserInputError("--memory must be at least 1 (MB)")
    pf = load_protocol(protocol)
    require_file(pf.decisions_path, "decisions")
    if pf.episodes_path is not None:
        require_file(pf.episodes_path, "episodes")
    out = output_folder(args.out or f"results/{pf.protocol.study.run_name}", "--out")
    workflow_log = out / "logs" / WORKFLOW_LOG
    output_folder(workflow_log.parent, "the logs folder")
    snakemake = [
        sys.executable,
        "-m",
        "snakemake",
        "--snakefile",
        str(SNAKEFILE),
        "--directory",
        str(out),
    ]
    config = ["--configfile", str(_write_workflow_config(out, pf.path, record))]
    profile = _profile_folder(getattr(args, "profile", None))
    memory = None if profile else (memory if memory is not None else machine_memory_mb())
    limit = [] if memory is None else ["--resources", f"mem_mb={memory}"]
    command = [*snakemake, "--cores", str(args.cores), *limit, "--rerun-incomplete", *profile, *config]
    where = f"with {args.cores} core(s)" if not profile else f"through the profile {profile[1]}"
    where += f" and {memory:,} MB of memory" if memory is not None else ""
    with _exclusive_run(out) as lock:
        print(f"regimewise {__version__}: running {pf.path.name} into {out} {where}")
        print(TERMINAL_CAUTION)
        if lock is not None and _left_locked(out):
            _remove_stale_lock([*snakemake, "--unlock", *config], out)
        progress = None if args.quiet else Progress(shards=_planned_shards(pf))
        returncode = _run_logged(command, workflow_log, lock, progress)
    if returncode != 0:
        _print_error_report(out / "logs" / "validation_errors.csv")
        if args.debug:
            print(workflow_log.read_text(encoding="utf-8"), file=sys.stderr)
        raise UserInputError(
            _first_stage_error(workflow_log)
            or _lock_refusal(workflow_log, out)
            or _system_cause(workflow_log)
            or f"the workflow failed; see {workflow_log}"
        )
    print(warning_line(workflow_log.parent))
    return out


def _planned_shards(pf) -> int:
    """Bootstrap shard jobs of a whole run (none without replicates)."""
    evaluation = pf.protocol.evaluation
    return evaluation.shards if evaluation.replicates else 0


def output_folder(path, option: str) -> Path:
    """The folder (created if needed), or one line naming what is in the way: a file, or the system's cause."""
    folder = Path(path).resolve()
    if folder.exists() and not folder.is_dir():
        raise UserInputError(f"{option} {folder} is an existing file, not a folder; give a folder")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise UserInputError(f"{option} {folder} cannot be created: {os_reason(err)}") from None
    if not os.access(folder, os.W_OK | os.X_OK):
        raise UserInputError(f"{option} {folder} cannot be written: {OS_REASONS['EACCES']}")
    return folder


WORKFLOW_CONFIG = Path(".snakemake") / "regimewise" / "config.yaml"


def _profile_folder(folder: str | None) -> list[str]:
    """Snakemake's ``--profile`` arguments for ``folder`` (none without one); a folder without a profile file is
    one line. The path is made absolute: Snakemake runs in the results folder."""
    if folder is None:
        return []
    path = Path(folder).expanduser().resolve()
    if not path.is_dir():
        raise UserInputError(f"--profile {folder}: no such folder; give the folder that holds profile.yaml")
    if not any((path / name).is_file() for name in ("profile.yaml", "config.yaml")):
        raise UserInputError(
            f"--profile {folder}: the folder has no profile.yaml (nor config.yaml); see config/profiles/slurm "
            "for an example"
        )
    return ["--profile", str(path)]


def _write_workflow_config(out: Path, protocol: Path, record: dict | None = None) -> Path:
    """The run's workflow config as a YAML file in the results folder, read with ``--configfile``.

    Paths given on Snakemake's ``--config`` are parsed as YAML values, so a folder named ``a: b`` or ``{x}``
    would be misread; a file written by a YAML writer keeps every path as the string it is.
    """
    path = out / WORKFLOW_CONFIG
    settings = {"protocol": str(protocol), "results": ".", "logs": "logs", "benchmarks": "benchmarks", **(record or {})}
    write_text(path, yaml.safe_dump(settings, sort_keys=True, allow_unicode=True))
    return path


def _run_logged(command: list[str], workflow_log: Path, lock, progress: Progress | None) -> int:
    """Run Snakemake with its output in the workflow log, printing a line per finished job unless ``progress`` is
    None (a log that cannot be opened is one line, with the cause); its exit status.

    Snakemake writes the log file itself, as it would without regimewise, so a workflow whose command line was
    killed still logs in full; this process reads the log as it grows, line by line, for the job events.
    """
    try:
        handle = open(workflow_log, "w", encoding="utf-8")
    except OSError as err:
        raise UserInputError(f"cannot write the workflow log {workflow_log}: {os_reason(err)}") from None
    with handle, open(workflow_log, encoding="utf-8", errors="replace") as stream:
        process = subprocess.Popen(
            command,
            stdout=handle,
            stderr=subprocess.STDOUT,
            env=_workflow_env(),
            pass_fds=() if lock is None else (lock.fileno(),),
        )
        partial = ""
        while True:
            running = process.poll() is None
            partial += stream.read()
            *lines, partial = partial.split("\n")
            for line in lines if progress is not None else ():
                shown = progress.feed(line)
                if shown:
                    print(shown, flush=True)
            if not running:
                return process.returncode
            time.sleep(0.2)


SYSTEM_CAUSES = {
    "No space left on device": "ENOSPC",
    "Disk quota exceeded": "EDQUOT",
    "Permission denied": "EACCES",
    "Read-only file system": "EROFS",
}


def _system_cause(workflow_log: Path) -> str | None:
    """One line naming the operating system's cause (disk full, permission denied) found in the workflow log."""
    text = workflow_log.read_text(encoding="utf-8", errors="replace")
    for marker, name in SYSTEM_CAUSES.items():
        if marker in text:
            return f"the workflow stopped: {OS_REASONS[name]} (details in {workflow_log})"
    return None


@contextmanager
def _exclusive_run(out: Path):
    """Hold the results folder's run lock (an ``flock`` on :data:`RUN_LOCK`) for the run; yield its file.

    The operating system releases the lock when the last process holding it ends, however it ends (``kill -9``
    included); the Snakemake process inherits it, so a run whose command line was killed but whose workflow
    still runs keeps it. Raises :class:`UserInputError` when a live run holds it. Yields ``None`` where POSIX
    locks are missing (Windows): a dead run cannot then be told from a live one, so no stale lock is removed
    and Snakemake refuses a locked folder itself.
    """
    if fcntl is None:  # pragma: no cover - Windows
        yield None
        return
    path = out / RUN_LOCK
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a+b") as handle:
        try:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise UserInputError(
                f"another regimewise run is writing into {out}; wait for it to finish, or pass a different --out"
            ) from None
        try:
            yield handle
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


def _left_locked(out: Path) -> bool:
    """Whether Snakemake's directory lock is present (checked while this run holds the run lock).

    Holding the run lock proves no other regimewise run on this folder is alive, so a lock Snakemake still has
    was left by a run that was killed before it could remove it. A Snakemake started by hand (not through
    regimewise) in the same folder does not take the run lock and cannot be told apart; do not do that.
    """
    locks = out / SNAKEMAKE_LOCKS
    return locks.is_dir() and any(locks.glob("*.lock"))


def _remove_stale_lock(command: list[str], out: Path) -> None:
    """Remove a dead run's Snakemake lock with Snakemake's own ``--unlock``; the run then resumes."""
    print(f"removing the lock a stopped run left in {out}; resuming (incomplete outputs are recomputed)")
    finished = subprocess.run(command, capture_output=True, text=True, env=_workflow_env(), check=False)
    if finished.returncode != 0 or _left_locked(out):
        raise UserInputError(
            f"could not remove the lock a stopped run left in {out / SNAKEMAKE_LOCKS}; make sure no workflow runs "
            "there, delete that folder, and run again"
        )


def _print_error_report(path: Path) -> None:
    """The first lines of validation_errors.csv, sorted by rule, on standard output (values already masked)."""

    lines = report_lines(path)
    if lines:
        print(f"validation found problems; the full list is in {path}:")
        print("\n".join(f"  {line}" for line in lines))


def _workflow_env() -> dict:
    env = dict(os.environ)
    env.setdefault("PYTHONHASHSEED", "0")
    return env


def _lock_refusal(workflow_log: Path, out: Path) -> str | None:
    """One line when Snakemake refused a folder whose lock regimewise could not judge (e.g. a hand-started run)."""
    if "Directory cannot be locked" not in workflow_log.read_text(encoding="utf-8", errors="replace"):
        return None
    return (
        f"Snakemake found {out} locked by another process; wait for it to finish or pass a different --out "
        f"(if none runs, delete {out / SNAKEMAKE_LOCKS} and run again)"
    )


def _first_stage_error(workflow_log: Path) -> str | None:
    """The first one-line error a stage printed, without the prefix."""
    for line in workflow_log.read_text(encoding="utf-8", errors="replace").splitlines():
        if line.startswith(ERROR_PREFIX):
            return line[len(ERROR_PREFIX) :]
    return None


if __name__ == "__main__":
    sys.exit(main())
