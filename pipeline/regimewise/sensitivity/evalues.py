"""E-values (VanderWeele & Ding 2017, Ann Intern Med 167:268): how strongly an unmeasured confounder would have
to be associated with both treatment and outcome, on the risk-ratio scale, to explain an estimate away.
"""

from __future__ import annotations

import math

from regimewise.errors import UserInputError


# ---------------------------------------------------------------------------------------------- E-values
def e_value(rr: float) -> float:
    """E-value of a risk ratio (VanderWeele & Ding 2017): RR + sqrt(RR(RR − 1)), using 1/RR when RR < 1.

    Examples
    --------
    >>> round(e_value(3.9), 2)
    7.26
    """
    if not (rr > 0 and math.isfinite(rr)):
        raise UserInputError(f"a risk ratio must be positive and finite, got {rr}")
    rr = 1.0 / rr if rr < 1 else rr
    return rr + math.sqrt(rr * (rr - 1.0))


def e_value_interval(lower: float, upper: float) -> float:
    """E-value of the confidence limit nearest 1; 1 when the interval includes 1 (VanderWeele & Ding 2017)."""
    if lower <= 1.0 <= upper:
        return 1.0
    return e_value(lower if lower > 1.0 else upper)


def mean_difference_to_risk_ratio(difference: float, sd: float) -> float:
    """Approximate risk ratio of a difference in means: exp(0.91 · d) with d = difference / sd.

    The conversion VanderWeele & Ding (2017) suggest for continuous outcomes, after Chinn (2000, Stat Med
    19:3127); the 0.91 factor is recalled from memory.
    """
    if not (sd > 0 and math.isfinite(sd)):
        raise UserInputError("the outcome's standard deviation must be positive to convert a mean difference")
    return math.exp(0.91 * difference / sd)


def odds_ratio_to_risk_ratio(odds_ratio: float) -> float:
    """Square-root conversion of an odds ratio for a common outcome (VanderWeele & Ding 2017)."""
    return math.sqrt(odds_ratio)


def hazard_ratio_to_risk_ratio(hazard_ratio: float) -> float:
    """(1 − 0.5^sqrt(HR)) / (1 − 0.5^sqrt(1/HR)) for a common outcome (VanderWeele 2017; formula from memory)."""
    return (1.0 - 0.5 ** math.sqrt(hazard_ratio)) / (1.0 - 0.5 ** math.sqrt(1.0 / hazard_ratio))
