"""The registry of off-policy estimators: every fact about an estimator, in one place.

The protocol's allowed ``evaluation.estimators``, the labels of the computed estimates, which estimators need
a fitted Q-model, how the bootstrap explains two disagreeing estimators, and the report's plot markers and words
all read :data:`ESTIMATORS`. The computation of each estimator lives in :mod:`regimewise.evaluation`, registered
there under the same name (:func:`regimewise.evaluation.ope.computes`). This module imports nothing, so the
protocol (the lowest layer that needs the names) can read it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

Family = Literal["weights", "model", "both"]


@dataclass(frozen=True)
class Estimator:
    """One off-policy estimator.

    ``family`` says what it rests on: ``weights`` (the usual-care model's importance weights only), ``model`` (a
    fitted Q-model only) or ``both`` (doubly robust). ``label`` is the spelling of its estimates
    (:class:`regimewise.evaluation.ope.OffPolicyEstimate`), ``marker`` its matplotlib marker in the report.
    """

    name: str
    label: str
    family: Family
    marker: str
    words: str

    @property
    def needs_q_model(self) -> bool:
        return self.family != "weights"


ESTIMATORS: dict[str, Estimator] = {
    e.name: e
    for e in (
        Estimator("is", "IS", "weights", "v", "trajectory-wise importance sampling (Precup, Sutton & Singh 2000)"),
        Estimator("wis", "WIS", "weights", "^", "weighted (self-normalised) trajectory-wise importance sampling"),
        Estimator("pdis", "PDIS", "weights", "<", "per-decision importance sampling (Precup, Sutton & Singh 2000)"),
        Estimator("pdwis", "PDWIS", "weights", "o", "weighted per-decision importance sampling"),
        Estimator("dr", "DR", "both", ">", "doubly robust (Jiang & Li 2016)"),
        Estimator("wdr", "WDR", "both", "s", "weighted doubly robust (Thomas & Brunskill 2016)"),
        Estimator("fqe", "FQE", "model", "D", "fitted-Q evaluation (Le, Voloshin & Yue 2019)"),
    )
}

ESTIMATOR_NAMES = tuple(ESTIMATORS)
