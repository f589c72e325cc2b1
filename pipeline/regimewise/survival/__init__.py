"""Survival under a strategy: clone–censor–weight, loss-to-follow-up weights, weighted Kaplan–Meier and diagnostics.

Typical use, for each strategy (usual care is the natural course, ``strategy_proba=None``)::

    timeline = make_timeline(decisions, episodes, usual_proba, horizon)
    ipcw = DropoutModel().fit(timeline, states).weights(timeline, states)      # optional
    table = clone_censor_weight(timeline, strategy_proba, name="always step up", grace=0, censoring_weights=ipcw)
    curve = survival_curve(table, times, horizon)
    checks = follow_diagnostics(table, times, min_ess)
    versus_usual = contrast(curve, usual_care_curve, [horizon])

The estimates are for research use only, not medical advice; they defer to licensed clinicians, local law and
ethics approval.

References
----------
Cain et al. (2010), Int J Biostat 6(2):18; Hernán (2018), BMJ 360:k182; Maringe et al. (2020), Int J Epidemiol
49:1719; Hernán & Robins (2016), Am J Epidemiol 183:758.
"""

from regimewise.survival.clones import CloneTable, clone_censor_weight
from regimewise.survival.cox import CoxContrast, weighted_cox
from regimewise.survival.curves import Contrast, SurvivalCurve, contrast, kaplan_meier, product_limit, survival_curve
from regimewise.survival.diagnostics import FollowDiagnostics, follow_diagnostics
from regimewise.survival.dropout import DropoutModel
from regimewise.survival.timeline import Timeline, make_timeline

__all__ = [
    "CloneTable",
    "Contrast",
    "CoxContrast",
    "DropoutModel",
    "FollowDiagnostics",
    "SurvivalCurve",
    "Timeline",
    "clone_censor_weight",
    "contrast",
    "follow_diagnostics",
    "kaplan_meier",
    "make_timeline",
    "product_limit",
    "survival_curve",
    "weighted_cox",
]
