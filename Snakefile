from pathlib import Path

from snakemake.utils import min_version

min_version("9.0")


configfile: str(Path(workflow.basedir) / "config" / "workflow.yaml")


include: "rules/common.smk"
include: "rules/validate.smk"
include: "rules/behaviour.smk"
include: "rules/regime.smk"
include: "rules/evaluate.smk"
include: "rules/describe.smk"
include: "rules/bootstrap.smk"
include: "rules/sensitivity.smk"
include: "rules/combine.smk"
include: "rules/survival.smk"
include: "rules/sweep.smk"
include: "rules/selfcheck.smk"
include: "rules/report.smk"
include: "rules/appendix.smk"


rule all:
    input:
        final_outputs(),
