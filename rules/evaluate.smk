# ---- evaluate_fixed: usual care, fixed strategies and comparators (beside the regime stage) -----------------
rule evaluate_fixed:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        proba=results(MAPPED_PROBABILITIES),
    output:
        fixed=temp(results("evaluate/fixed.json")),  # read by the combine rule only; not an artifact
    log:
        logs("evaluate_fixed"),
    benchmark:
        benchmarks("evaluate_fixed")
    params:
        code=stage_code_hash("evaluate_fixed"),
    threads: stage_threads("evaluate_fixed")
    priority: PRIORITY["evaluate_fixed"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("evaluate_fixed"),
        runtime=runtime("evaluate_fixed"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


# ---- evaluate_learned: the learned regime as evaluated and its strategies, as soon as the fold regimes are learned
rule evaluate_learned:
    input:
        unpack(learned_regime_inputs),  # crossfit.parquet; with one fold, regime_fit's table
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        proba=results(MAPPED_PROBABILITIES),
    output:
        learned=temp(results("evaluate/learned.json")),  # read by the combine rule only; not an artifact
    log:
        logs("evaluate_learned"),
    benchmark:
        benchmarks("evaluate_learned")
    params:
        code=stage_code_hash("evaluate_learned"),
    threads: stage_threads("evaluate_learned")
    priority: PRIORITY["evaluate_learned"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("evaluate_learned"),
        runtime=runtime("evaluate_learned"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"


# ---- evaluate_side: the side-by-side regimes' values, as soon as regime_fit has learned them ----------------
rule evaluate_side:
    input:
        protocol=SETTINGS.protocol_input,
        decisions=results(MAPPED_DECISIONS),
        proba=results(MAPPED_PROBABILITIES),
        fitted=results("regime/fitted.parquet"),
    output:
        side=temp(results("evaluate/side.json")),  # read by the combine rule only; not an artifact
    log:
        logs("evaluate_side"),
    benchmark:
        benchmarks("evaluate_side")
    params:
        code=stage_code_hash("evaluate_side"),
    threads: stage_threads("evaluate_side")
    priority: PRIORITY["evaluate_side"]  # longest path to the end first (rules/common.smk)
    resources:
        mem_mb=mem_mb("evaluate_side"),
        runtime=runtime("evaluate_side"),
    conda:
        "envs/regimewise.yaml"
    script:
        "scripts/run_stage.py"
