# ---- evaluate_fixed: usual care, fixed strategies and comparators (beside the regime stage) -----------------
rule evaluate_fixed:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
    output:
        fixed=temp(results("evaluate/fixed.json")),  # read by the evaluate rule only; not an artifact
    log:
        logs("evaluate_fixed"),
    benchmark:
        benchmarks("evaluate_fixed")
    params:
        code=stage_code_hash("evaluate_fixed"),
    threads: stage_threads("evaluate_fixed")
    priority: 1  # the evaluate job waits for it: after regime_fit (2), before behaviour_diagnostics (0)
    resources:
        mem_mb=mem_mb("evaluate_fixed"),
        runtime=runtime("evaluate_fixed"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


# ---- evaluate: off-policy values of the learned regime, usual care and fixed strategies -----------------
rule evaluate:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
        table=results("regime/recommendations.parquet"),
        fixed=results("evaluate/fixed.json"),
    output:
        values=results("evaluate/values.json"),
    log:
        logs("evaluate"),
    benchmark:
        benchmarks("evaluate")
    params:
        code=stage_code_hash("evaluate"),
    threads: stage_threads("evaluate")
    priority: 1  # on the critical path: before describe and survival when they compete for the cores
    resources:
        mem_mb=mem_mb("evaluate"),
        runtime=runtime("evaluate"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
