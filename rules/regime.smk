# ---- regime: constrained fitted-Q iteration --------------------------------------------------------------
rule regime:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
    output:
        table=results("regime/recommendations.parquet"),
        regime=results("regime/regime.json"),
    log:
        logs("regime"),
    benchmark:
        benchmarks("regime")
    params:
        code=stage_code_hash("regime"),
    threads: stage_threads("regime")
    resources:
        mem_mb=mem_mb("regime"),
        runtime=runtime("regime"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
