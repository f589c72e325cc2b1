"""The protocol's reusable field types: finite numbers that are never booleans, true booleans, whole numbers,
free text that passes the de-identification guard's value checks, identifiers, and the strict base model.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AfterValidator, AllowInfNan, BaseModel, BeforeValidator, ConfigDict, Field
from pydantic import Strict as StrictType

from regimewise.estimators import ESTIMATOR_NAMES
from regimewise.protocol.identifiers import free_text_category, mask


# ---------------------------------------------------------------------------------------------- reusable types
def _no_identifier(text: str) -> str:
    """Free text of the protocol passes the guard's value checks (it reaches the report and the summary)."""
    category = free_text_category(text)
    if category is not None:
        raise ValueError(
            f"the text looks like it holds a direct identifier ({category}; {mask(text)}); remove it from the protocol"
        )
    return text


def _not_boolean(value):
    """YAML reads yes/no/true/false/on/off as booleans: they are not numbers."""
    if isinstance(value, bool):
        raise ValueError("a number is needed here, not a boolean (yes/no/true/false/on/off)")
    return value


FINITE, NOT_BOOLEAN = AllowInfNan(False), BeforeValidator(_not_boolean)


Number = Annotated[float, FINITE, NOT_BOOLEAN]


WholeNumber = Annotated[int, StrictType()]


Flag = Annotated[bool, StrictType()]


FreeText = Annotated[str, AfterValidator(_no_identifier)]


Identifier = Annotated[
    str,
    Field(pattern=r"^[a-z][a-z0-9_]{0,39}$", description="lower-case letters, digits and _, starting with a letter"),
]


ColumnName = Annotated[str, Field(min_length=1, max_length=128)]


def level_text(value) -> str:
    """A categorical level as text: a whole number without its decimals (``2``, ``2.0`` -> ``"2"``), other values
    as written, stripped. The protocol's levels and the records' values are compared in this form."""
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value).strip()


def _level_text_before(value):
    """YAML reads a level written as 1 or 2.0 as a number: take it as its text."""
    return level_text(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else value


LevelLabel = Annotated[
    FreeText,
    BeforeValidator(_level_text_before),
    Field(min_length=1, max_length=40, pattern=r"^\S(.*\S)?$", description="a level as written in the records"),
]


ShortText = Annotated[FreeText, Field(min_length=1, max_length=300)]


LongText = Annotated[FreeText, Field(min_length=1, max_length=4000)]


Probability = Annotated[float, Field(ge=0.0, le=1.0), FINITE, NOT_BOOLEAN]


Discount = Annotated[float, Field(gt=0.0, le=1.0), FINITE, NOT_BOOLEAN]


Seed = Annotated[WholeNumber, Field(ge=0, lt=2**63)]
EstimatorName = Literal[ESTIMATOR_NAMES]  # the registry's names, in its order


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


# ---------------------------------------------------------------------------------------------- sections
