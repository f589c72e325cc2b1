# ---- evaluate: off-policy values of the learned regime, usual care and fixed strategies -----------------
rule evaluate:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
        table=results("regime/recommendations.parquet"),
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
