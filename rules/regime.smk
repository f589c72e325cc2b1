# ---- crossfit: the cross-fitted fold regimes, beside the behaviour stage (they fit their own usual care) ----
rule crossfit:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
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


# ---- regime_fit: the side-by-side regimes by constrained fitted-Q iteration, beside crossfit ----------------
rule regime_fit:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        proba=results(MAPPED_PROBABILITIES),
    output:
        # read by the regime rule only; not artifacts
        fitted=temp(results("regime/fitted.parquet")),
        fitted_summary=temp(results("regime/fitted.json")),
    log:
        logs("regime_fit"),
    benchmark:
        benchmarks("regime_fit")
    params:
        code=stage_code_hash("regime_fit"),
    threads: stage_threads("regime_fit")
    priority: PRIORITY["regime_fit"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("regime_fit"),
        runtime=runtime("regime_fit"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


# ---- regime: the side-by-side and cross-fitted regimes joined into the recommendations and regime.json -------
rule regime:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        fitted=results("regime/fitted.parquet"),
        fitted_summary=results("regime/fitted.json"),
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
    priority: PRIORITY["regime"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("regime"),
        runtime=runtime("regime"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
