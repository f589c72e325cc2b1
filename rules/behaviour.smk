# ---- behaviour: the usual-care model and its probabilities ------------------------------------------------
rule behaviour:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
    output:
        proba=results("behaviour/behaviour_proba.parquet"),
        mapped=results(MAPPED_PROBABILITIES),  # the same table, memory-mapped by the later jobs; not an artifact
        model=temp(results("behaviour/model.json")),  # read by the behaviour_diagnostics rule only; not an artifact
    log:
        logs("behaviour"),
    benchmark:
        benchmarks("behaviour")
    params:
        code=stage_code_hash("behaviour"),
    threads: 1
    resources:
        mem_mb=mem_mb("behaviour"),
        runtime=runtime("behaviour"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


# ---- behaviour_diagnostics: behaviour.json (calibration, discrimination, weights), beside the later jobs ---------
rule behaviour_diagnostics:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        proba=results(MAPPED_PROBABILITIES),
        model=results("behaviour/model.json"),
    output:
        diagnostics=results("behaviour/behaviour.json"),
    log:
        logs("behaviour_diagnostics"),
    benchmark:
        benchmarks("behaviour_diagnostics")
    params:
        code=stage_code_hash("behaviour_diagnostics"),
    threads: 1
    priority: PRIORITY["behaviour_diagnostics"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("behaviour_diagnostics"),
        runtime=runtime("behaviour_diagnostics"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
