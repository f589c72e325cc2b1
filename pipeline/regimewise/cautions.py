"""The research-use cautions, in one place: every output that shows a number or a recommendation quotes one of
these. Research use only; not medical advice; decisions stay with licensed clinicians, under local law and with
ethics approval.
"""

from __future__ import annotations

READABLE_TREE_NOTE = (
    "The tree is a summary of the learned regime for discussion; the learned regime itself, not the tree, is "
    "what was evaluated. Research use only, not medical advice."
)


SWEEP_CAUTION = (
    "Research use only: the specification sweep shows how the estimated difference between a learned regime and "
    "usual care depends on analysis choices; it is not medical advice and recommends no treatment."
)


REPORT_CAUTIONS = (
    "Research use only. This report describes a statistical analysis of historical records; it is not medical "
    "advice and must not be used to treat any patient.",
    "Any strategy shown here is a hypothesis to be studied, not a recommendation. Treatment decisions stay with "
    "licensed clinicians, who know the patient, and follow local law, regulations and ethics approval.",
    "The estimates assume that every reason clinicians had for their choices is recorded in the data (no "
    "unmeasured confounding), that usual care gave every compared action a real chance, and that the models "
    "are adequate. None of these can be proven from the records alone.",
)


RECOMMENDATION_CAUTION = (
    "Research use only: recommendations of a regime learned from historical records are hypotheses for study, "
    "not medical advice; treatment decisions stay with licensed clinicians under local law and ethics approval."
)


STRATEGY_CAUTION = (
    "Research use only: strategies compared on historical records are hypotheses for study, not medical advice; "
    "treatment decisions stay with licensed clinicians under local law and ethics approval."
)


def stage_caution(protocol) -> str:
    """The caution a stage output carries: about a learned regime's recommendations, or, when the protocol learns
    no regime (``analysis.learn_regime: false``), about the strategies it compares."""
    return RECOMMENDATION_CAUTION if protocol.analysis.learn_regime else STRATEGY_CAUTION


SELFCHECK_CAUTION = (
    "Research use only: the self-check reruns the analysis on cohorts simulated from models fitted to these "
    "records; it shows how the pipeline behaves in a world like the fitted one, not that its models are right, and "
    "it is not medical advice. Treatment decisions stay with licensed clinicians under local law and ethics approval."
)


TERMINAL_CAUTION = (
    "Research use only: not medical advice. Treatment decisions stay with licensed clinicians, "
    "under local law and with ethics approval."
)
