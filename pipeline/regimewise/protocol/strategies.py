"""The protocol's ``strategies`` section: strategies derived from the learned regime, each family's grid and the
pre-specified headline strategy (:mod:`regimewise.evaluation.strategies` builds and evaluates them).

A tuning parameter picked on the same records after looking at the results is a selection, so the grid and the
headline are fixed here, before the analysis; the default headline is the grid's pre-specified value, never the
best-looking one.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from regimewise.protocol.types import FINITE, NOT_BOOLEAN

# finite numbers, never booleans (as every numeric setting of the protocol)
Share = Annotated[float, Field(gt=0.0, lt=1.0), FINITE, NOT_BOOLEAN]
Gain = Annotated[float, Field(ge=0.0, le=1e6), FINITE, NOT_BOOLEAN]
OddsRatio = Annotated[float, Field(gt=0.0, le=1e3), FINITE, NOT_BOOLEAN]


class HeadlineStrategy(BaseModel):
    """The strategy the report's headline names: a family and one value of its grid."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    family: Literal["partial_adoption", "override_gain", "incremental_odds"]
    value: Annotated[float, FINITE, NOT_BOOLEAN]


class StrategiesSpec(BaseModel):
    """Strategies derived from the learned regime, evaluated beside it by every estimator and bootstrap replicate."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    partial_adoption: Annotated[list[Share], Field(max_length=20)] = Field(
        [0.1, 0.3, 0.5],
        description="shares ε of decisions at which the learned regime is followed (usual care at the others)",
    )
    override_gain: Annotated[list[Gain], Field(max_length=20)] = Field(
        [],
        description="thresholds c (reward units): keep the clinician's action unless the learned regime's "
        "cross-fitted estimated gain over it exceeds c, then switch to the learned regime's action",
    )
    incremental_odds: Annotated[list[OddsRatio], Field(max_length=20)] = Field(
        [], description="factors δ multiplying the odds of the learned regime's action under usual care"
    )
    headline: HeadlineStrategy = Field(
        HeadlineStrategy(family="partial_adoption", value=0.3),
        description="the pre-specified strategy the report's headline names; it must be in its family's grid",
    )

    @model_validator(mode="after")
    def _grids_valid(self) -> StrategiesSpec:
        for family in ("partial_adoption", "override_gain", "incremental_odds"):
            grid = getattr(self, family)
            if len(set(grid)) != len(grid):
                raise ValueError(f"strategies.{family} lists a value twice; keep each value once")
        if self.headline.value not in getattr(self, self.headline.family):
            raise ValueError(
                f"strategies.headline ({self.headline.family} {self.headline.value:g}) is not in "
                f"strategies.{self.headline.family}; add it to that grid or name another strategy"
            )
        return self
