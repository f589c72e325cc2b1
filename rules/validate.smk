# ---- validate: records against the data contract and the protocol ---------------------------------------
rule validate:
    input:
        unpack(record_inputs),
    output:
        decisions=results("validate/decisions.parquet"),
        episodes=results("validate/episodes.parquet"),
        summary=results("validate/validation.json"),
        mapped=results(MAPPED_DECISIONS),  # the same decisions, memory-mapped by the later jobs; not an artifact
    log:
        main=logs("validate"),
        errors=f"{SETTINGS.logs}/validation_errors.csv",
    benchmark:
        benchmarks("validate")
    params:
        code=stage_code_hash("validate"),
    threads: 1
    resources:
        mem_mb=mem_mb("validate"),
        runtime=runtime("validate"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
