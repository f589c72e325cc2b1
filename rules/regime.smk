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


# ---- regime_fit: the side-by-side regimes by constrained fitted-Q iteration, beside crossfit ----------------
rule regime_fit:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        proba=results("behaviour/behaviour_proba.parquet"),
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
    # Priorities, when jobs compete for a core (at 1M episodes x 12 the order decides about a minute of the run):
    # evaluate_learned 60, regime_fit 50, the regime join 40 (survival, the curves and describe wait for it),
    # survival 30 (the longest job after the join), evaluate_fixed 20, evaluate_side 15, sensitivity_curves 10,
    # the others 0 (behaviour_diagnostics and describe fill the gaps)
    priority: 50
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
        decisions=results("validate/decisions.parquet"),
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
    priority: 40
    resources:
        mem_mb=mem_mb("regime"),
        runtime=runtime("regime"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
