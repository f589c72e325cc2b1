"""The run's appendix: manifest, environment, reporting checklist, verification."""
