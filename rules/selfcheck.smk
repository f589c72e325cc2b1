# ---- self-check: the analysis rerun on look-alike cohorts of the records, one job per cohort, then summarised ----
rule selfcheck_cohort:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        episodes=results("validate/episodes.parquet"),
    output:
        result=results("selfcheck/cohorts/cohort_{cohort}.json"),
    log:
        logs("selfcheck_cohort_{cohort}"),
    benchmark:
        benchmarks("selfcheck_cohort_{cohort}")
    wildcard_constraints:
        cohort=r"\d+",
    params:
        code=stage_code_hash("selfcheck_cohort"),
    threads: 1
    resources:
        mem_mb=mem_mb("selfcheck_cohort"),
        runtime=runtime("selfcheck_cohort"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


rule selfcheck:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        episodes=results("validate/episodes.parquet"),
        cohorts=selfcheck_cohort_files(),
    output:
        selfcheck=results("selfcheck/selfcheck.json"),
        page=results("selfcheck/selfcheck.html"),
    log:
        logs("selfcheck"),
    benchmark:
        benchmarks("selfcheck")
    params:
        code=stage_code_hash("selfcheck"),
    threads: 1
    resources:
        mem_mb=mem_mb("selfcheck"),
        runtime=runtime("selfcheck"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
