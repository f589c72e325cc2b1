# ---- combine: values.json, the bootstrap intervals and the sensitivity analysis, joined in one job --------
rule combine:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results("validate/decisions.parquet"),
        learned=results("evaluate/learned.json"),
        fixed=results("evaluate/fixed.json"),
        side=results("evaluate/side.json"),
        curves=results("sensitivity/curves.json"),
        shards=bootstrap_shard_files(),
    output:
        values=results("evaluate/values.json"),
        intervals=results("bootstrap/intervals.json"),
        sensitivity=results("sensitivity/sensitivity.json"),
    log:
        logs("combine"),
    benchmark:
        benchmarks("combine")
    params:
        code=stage_code_hash("combine"),
    threads: 1
    priority: PRIORITY["combine"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("combine"),
        runtime=runtime("combine"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
