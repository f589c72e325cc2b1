# ---- appendix: manifest of every artifact, environment, resolved protocol, seeds, commands ---------------
rule appendix:
    input:
        unpack(record_inputs),
        html=results("report/report.html"),
        summary=results("report/summary.json"),
        provenance=results("report/appendix/provenance.json"),
    output:
        **appendix_files(),
    log:
        logs("appendix"),
    benchmark:
        benchmarks("appendix")
    params:
        code=stage_code_hash("appendix"),
        software=software_fingerprint(),  # any source file, workflow file or installed version: environment.json
        command=command_line,
        reproduce=reproduce_line,
    threads: 1
    resources:
        mem_mb=mem_mb("appendix"),
        runtime=runtime("appendix"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
