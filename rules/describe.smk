# ---- describe: cohort table, balance before and after weighting, overlap by decision point ---------------
rule describe:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        episodes=results("validate/episodes.parquet"),
        proba=results(MAPPED_PROBABILITIES),
        table=results("regime/recommendations.parquet"),
    output:
        cohort=results("describe/cohort.json"),
    log:
        logs("describe"),
    benchmark:
        benchmarks("describe")
    params:
        code=stage_code_hash("describe"),
    threads: 1
    priority: PRIORITY["describe"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("describe"),
        runtime=runtime("describe"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
