"""The stylesheet every HTML page of a run shares (``templates/report.css``).

A module of its own, without the figures: the appendix's checklist page reads the stylesheet in a short job, which
would otherwise import matplotlib with the report's figures for nothing.
"""

from __future__ import annotations

from importlib import resources


def report_stylesheet() -> str:
    """The report's stylesheet (``templates/report.css``), shared by every HTML page a run writes."""
    return resources.files("regimewise.report").joinpath("templates", "report.css").read_text(encoding="utf-8")
