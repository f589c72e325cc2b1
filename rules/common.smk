# ---- settings shared by every stage: validated once, at parse time -------------------------------------
from regimewise.workflow.fingerprint import stage_code_hash
from regimewise.workflow.settings import load_settings

SETTINGS = load_settings(config)


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


def survival_inputs(wildcards):
    return {"survival": results("survival/survival.json")} if SETTINGS.survival else {}


def final_outputs():
    return [results("report/report.html"), results("report/summary.json")]
