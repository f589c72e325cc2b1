# ---- report: one self-contained HTML file, summary.json and the provenance appendix ---------------------
rule report:
    input:
        unpack(record_inputs),
        unpack(sweep_inputs),
        unpack(selfcheck_inputs),
        unpack(survival_inputs),
        validation=results("validate/validation.json"),
        decisions=results("validate/decisions.parquet"),
        behaviour=results("behaviour/behaviour.json"),
        regime=results("regime/regime.json"),
        table=results("regime/recommendations.parquet"),
        values=results("evaluate/values.json"),
        cohort=results("describe/cohort.json"),
        intervals=results("bootstrap/intervals.json"),
        sensitivity=results("sensitivity/sensitivity.json"),
    output:
        html=results("report/report.html"),
        summary=results("report/summary.json"),
        provenance=results("report/appendix/provenance.json"),
    log:
        logs("report"),
    benchmark:
        benchmarks("report")
    params:
        code=stage_code_hash("report"),
        reproduce=reproduce_line,
    threads: stage_threads("report")
    resources:
        mem_mb=mem_mb("report"),
        runtime=runtime("report"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
