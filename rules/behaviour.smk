# ---- behaviour: the usual-care model, its probabilities and diagnostics ---------------------------------
rule behaviour:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
    output:
        proba=results("behaviour/behaviour_proba.parquet"),
        diagnostics=results("behaviour/behaviour.json"),
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
