"""The report stage's outputs: summary.json, the figures, report.html from its templates, and the provenance
appendix.
"""
