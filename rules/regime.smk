# ---- crossfit: the cross-fitted fold regimes, beside the behaviour stage (they fit their own usual care) ----
rule crossfit:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
    output:
        crossfit=temp(results("regime/crossfit.parquet")),  # read by the regime rule only; not an artifact
    log:
        logs("crossfit"),
    benchmark:
        benchmarks("crossfit")
    params:
        code=stage_code_hash("crossfit"),
    threads: stage_threads("crossfit")
    resources:
        mem_mb=mem_mb("crossfit"),
        runtime=runtime("crossfit"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


# ---- regime: constrained fitted-Q iteration --------------------------------------------------------------
rule regime:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
        crossfit=results("regime/crossfit.parquet"),
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
