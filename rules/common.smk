# ---- settings shared by every stage: validated once, at parse time -------------------------------------
from regimewise.appendix.assemble import appendix_outputs
from regimewise.appendix.environment import software_fingerprint
from regimewise.workflow.fingerprint import stage_code_hash
from regimewise.workflow.resources import recorded_decisions, stage_resources, stage_threads
from regimewise.workflow.settings import load_settings

SETTINGS = load_settings(config)


# Job priorities, for when jobs compete for a core: each rule's seconds of work on its longest path to the end of
# the run (its own time plus the longest chain of jobs that wait for it), measured at 1M episodes x 12 on 2 cores
# (bench/RESULTS.md, the run of 4532638). Longest path first keeps the cores busy to the end: the short jobs the
# report waits for come last, where a long one would leave the other core idle. The bootstrap shards, long with
# many replicates, come first among what is ready when they are.
PRIORITY = {
    "bootstrap_shard": 200,
    "regime_fit": 158,
    "evaluate_learned": 77,
    "regime": 69,
    "survival": 52,
    "evaluate_fixed": 45,
    "sensitivity_curves": 35,
    "evaluate_side": 34,
    "behaviour_diagnostics": 32,
    "describe": 23,
    "combine": 10,
}


# The validated decisions as every later job reads them: the validate rule writes the Parquet artifact and this
# uncompressed Arrow copy of the same table, which the jobs memory-map instead of decoding the Parquet again
# (regimewise.io.write_mapped_table). Hidden, so never an artifact of the manifest. The combine rule, which only
# counts the decisions, and the report, which only waits for them, keep the Parquet artifact as their input.
MAPPED_DECISIONS = "validate/.decisions.arrow"
# Likewise usual care's probabilities, written by the behaviour rule beside behaviour_proba.parquet.
MAPPED_PROBABILITIES = "behaviour/.behaviour_proba.arrow"


def results(path):
    return path if SETTINGS.results == "." else f"{SETTINGS.results}/{path}"


def logs(name):
    return f"{SETTINGS.logs}/{name}.log"


def benchmarks(name):
    return f"{SETTINGS.benchmarks}/{name}.tsv"


def record_inputs(wildcards):
    return SETTINGS.record_inputs


def bootstrap_shard_files():
    return [results(f"bootstrap/shards/shard_{k}.json") for k in range(SETTINGS.bootstrap_shards)]


def sweep_spec_files():
    return [results(f"sweep/specs/{spec}.json") for spec in SETTINGS.sweep_specs]


def sweep_inputs(wildcards):
    return {"sweep": results("sweep/sweep.json")} if SETTINGS.sweep_specs else {}


def selfcheck_cohort_files():
    return [results(f"selfcheck/cohorts/cohort_{c}.json") for c in range(SETTINGS.selfcheck_cohorts)]


def selfcheck_inputs(wildcards):
    return {"selfcheck": results("selfcheck/selfcheck.json")} if SETTINGS.selfcheck_cohorts else {}


def learned_regime_inputs(wildcards):
    table = SETTINGS.learned_regime_table
    return {} if table is None else {table: results(f"regime/{table}.parquet")}


def survival_inputs(wildcards):
    return {"survival": results("survival/survival.json")} if SETTINGS.survival else {}


# The command line of the run, handed to the report and appendix stages through callables: a string in `params`
# is read as a wildcard pattern, and a command line may hold braces.
def command_line(wildcards):
    return SETTINGS.command


def reproduce_line(wildcards):
    return SETTINGS.reproduce


def appendix_files():
    return {name: results(path) for name, path in appendix_outputs().items()}


def final_outputs():
    return [results("report/report.html"), results("report/summary.json"), *appendix_files().values()]


# ---- resource requests, scaled by the decisions validation kept (estimated from the records before it runs) ----


def decisions_recorded():
    return recorded_decisions(results("validate/validation.json"), SETTINGS.decisions_file)


def replicates_in_job(rule):
    return {
        "bootstrap_shard": SETTINGS.replicates_per_shard,
        "sweep_spec": SETTINGS.sweep_replicates,
        "selfcheck_cohort": SETTINGS.selfcheck_replicates,
    }.get(rule, 0)


def decisions_in_job(rule):
    # the self-check's summary job also learns the reference rule on its own simulated cohort
    extra = SETTINGS.selfcheck_reference_decisions if rule == "selfcheck" else 0
    return decisions_recorded() + extra


def mem_mb(rule):
    return lambda wildcards, attempt: stage_resources(rule, decisions_in_job(rule), replicates_in_job(rule), attempt)[
        "mem_mb"
    ]


def runtime(rule):
    return lambda wildcards, attempt: stage_resources(rule, decisions_in_job(rule), replicates_in_job(rule), attempt)[
        "runtime"
    ]
