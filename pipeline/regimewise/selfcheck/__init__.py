"""Self-check: the pipeline rerun on simulated cohorts shaped like the user's own (plasmode simulation)."""
