# Adapter: every rule calls the package stage of the same name; no statistics here.
from regimewise.workflow.stages import run_snakemake_job

run_snakemake_job(snakemake)  # noqa: F821 - injected by Snakemake
