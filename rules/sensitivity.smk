# ---- sensitivity_curves: the bounds curves over the Γ grid, from the records (beside the evaluate stage) -----
rule sensitivity_curves:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
        table=results("regime/recommendations.parquet"),
    output:
        curves=temp(results("sensitivity/curves.json")),  # read by the sensitivity rule only; not an artifact
    log:
        logs("sensitivity_curves"),
    benchmark:
        benchmarks("sensitivity_curves")
    params:
        code=stage_code_hash("sensitivity_curves"),
    threads: 1
    priority: PRIORITY["sensitivity_curves"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("sensitivity_curves"),
        runtime=runtime("sensitivity_curves"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


# ---- sensitivity: bounds under unmeasured confounding, tipping point, E-values ---------------------------
rule sensitivity:
    input:
        protocol=SETTINGS.protocol_input,
        curves=results("sensitivity/curves.json"),
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
    priority: PRIORITY["sensitivity"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("sensitivity"),
        runtime=runtime("sensitivity"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
