# ---- sensitivity: bounds under unmeasured confounding, tipping point, E-values ---------------------------
rule sensitivity:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
        table=results("regime/recommendations.parquet"),
        intervals=results("bootstrap/intervals.json"),
        shards=bootstrap_shard_files(),
    output:
        sensitivity=results("sensitivity/sensitivity.json"),
    log:
        logs("sensitivity"),
    benchmark:
        benchmarks("sensitivity")
    params:
        code=stage_code_hash("sensitivity"),
    threads: 1
    resources:
        mem_mb=mem_mb("sensitivity"),
        runtime=runtime("sensitivity"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
