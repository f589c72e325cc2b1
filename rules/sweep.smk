# ---- sweep: the contrast under alternative analysis choices, one job per specification, then sorted ------
rule sweep_spec:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
    output:
        result=results("sweep/specs/{spec}.json"),
    log:
        logs("sweep_spec_{spec}"),
    benchmark:
        benchmarks("sweep_spec_{spec}")
    wildcard_constraints:
        spec=r"spec_\d+",
    params:
        code=stage_code_hash("sweep_spec"),
    threads: 1
    resources:
        mem_mb=mem_mb("sweep_spec"),
        runtime=runtime("sweep_spec"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


rule sweep:
    input:
        protocol=SETTINGS.protocol_input,
        specs=sweep_spec_files(),
    output:
        sweep=results("sweep/sweep.json"),
    log:
        logs("sweep"),
    benchmark:
        benchmarks("sweep")
    params:
        code=stage_code_hash("sweep"),
    threads: 1
    resources:
        mem_mb=mem_mb("sweep"),
        runtime=runtime("sweep"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
