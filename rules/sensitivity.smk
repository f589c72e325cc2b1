# ---- sensitivity_curves: the bounds curves over the Γ grid, from the records (beside the evaluate stage) -----
rule sensitivity_curves:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        proba=results(MAPPED_PROBABILITIES),
        table=results("regime/recommendations.parquet"),
    output:
        curves=temp(results("sensitivity/curves.json")),  # read by the combine rule only; not an artifact
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
