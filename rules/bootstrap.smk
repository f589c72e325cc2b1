# ---- bootstrap_shard: replicates in shards (separate jobs, one thread each; the combine rule joins them) --
rule bootstrap_shard:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        episodes=results("validate/episodes.parquet"),
        table=results("regime/recommendations.parquet"),
    output:
        replicates=results("bootstrap/shards/shard_{shard}.json"),
    log:
        logs("bootstrap_shard_{shard}"),
    benchmark:
        benchmarks("bootstrap_shard_{shard}")
    wildcard_constraints:
        shard=r"\d+",
    params:
        code=stage_code_hash("bootstrap_shard"),
    threads: 1
    priority: PRIORITY["bootstrap_shard"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("bootstrap_shard"),
        runtime=runtime("bootstrap_shard"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
