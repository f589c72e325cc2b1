# ---- survival: clone, censor at deviation, weight; curves, contrasts and bootstrap intervals ------------
rule survival:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        episodes=results("validate/episodes.parquet"),
        proba=results(MAPPED_PROBABILITIES),
        table=results("regime/recommendations.parquet"),
        shards=bootstrap_shard_files(),
    output:
        survival=results("survival/survival.json"),
    log:
        logs("survival"),
    benchmark:
        benchmarks("survival")
    params:
        code=stage_code_hash("survival"),
    threads: 1
    priority: PRIORITY["survival"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("survival"),
        runtime=runtime("survival"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
