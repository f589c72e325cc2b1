"""Identifier-shaped whole numbers, found by a column's content whatever its type (numbers or digits as text).

Rules (README "De-identification guard" lists them with their limits; the thresholds are chosen here, common
practice for a guard, no source):

- every column, declared or not: a whole number of nine to fifteen digits (social-security, telephone, record or
  account number; a ten-digit phone number is one of them; an international number has at most 15 digits), and
  a whole number of eight digits that reads as a date (YYYYMMDD, DDMMYYYY or MMDDYYYY, year 1900-2099, month
  1-12, day 1-31; seven digits for DDMMYYYY and MMDDYYYY, whose leading zero a number loses);
- a column whose name says age (``age``, ``age_at_index``; not a derived ``age_sq``, see
  :func:`regimewise.data.deidentify.is_age_column`) or that a state declared as an age reads: when at least
  :data:`AGE_LIKE_SHARE` of its values lie in 0-130 (it holds ages, not a derived term), every value above 89;
- an undeclared column (not a state, not a data-contract column), by content only:
  - **ages**: all values whole numbers from 0 to :data:`AGE_CONTENT_MAX`: every value above 89;
  - **postcodes**: at least half of the values five-digit whole numbers, at least half of those not multiples of
    10 (doses and counts are round): every whole number of four or five digits (a ZIP code loses its leading 0);
  - **record or chart numbers**: at least half of the values whole numbers of six to eight digits, at least
    :data:`SERIAL_DISTINCT_SHARE` of those distinct and at least half of them not multiples of 10: each of them.

Declared columns are read by their declared meaning instead: their plausible ranges (states), the horizon
(step), 0-36525 (day, follow-up) or 0/1 (event) refuse out-of-range values, so only the first rule applies.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from regimewise.data.distinct import broadcast

AGE_LIMIT = 89


AGE_CONTENT_MAX = 120


AGE_NAMED_MAX = 130


AGE_LIKE_SHARE = 0.9


SERIAL_DISTINCT_SHARE = 0.9


def whole_numbers(values: pd.Series, distinct=None) -> tuple[np.ndarray, np.ndarray]:
    """The column as floats (NaN where not a number) and a mask of its finite whole numbers.

    ``distinct`` is the column's :func:`regimewise.data.distinct.distinct_text` when it is a text column: the
    text is then parsed once per distinct value (in a container of the column's own dtype, which decides how
    pandas parses it) instead of once per row.
    """
    if pd.api.types.is_bool_dtype(values):
        numbers = np.full(len(values), np.nan)
    elif distinct is not None:
        codes, uniques = distinct
        kind = values.dtype if isinstance(values.dtype, pd.StringDtype) else object
        parsed = np.full(len(uniques), np.nan)
        could = could_be_numbers(uniques)
        if could.any():
            found = pd.to_numeric(pd.Series(uniques[could], dtype=kind), errors="coerce")
            parsed[could] = found.to_numpy(dtype=float, na_value=np.nan)
        numbers = broadcast(parsed, codes, np.nan)
    else:
        numbers = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    with np.errstate(invalid="ignore"):
        whole = np.isfinite(numbers) & (np.floor(numbers) == numbers)
    return numbers, whole


# pandas parses a number from text only when a digit comes before any letter (``12``, ``-1.5e3``, `` .5``) or
# when the text spells infinity: no other text is handed to its parser (ids such as ``E0000123`` are not).
MAYBE_NUMBER = "^[^A-Za-z]*[0-9]"


MAYBE_INFINITY = "(?i)inf"


def could_be_numbers(uniques: np.ndarray) -> np.ndarray:
    """Mask of the ``str`` values pandas might parse as a number (the others are not numbers); all of them when
    pyarrow cannot hold one (a lone surrogate)."""
    try:
        text = pa.array(uniques, type=pa.string())
    except (pa.ArrowException, UnicodeError):
        return np.ones(len(uniques), dtype=bool)
    digits = np.asarray(pc.match_substring_regex(text, MAYBE_NUMBER), dtype=bool)
    return digits | np.asarray(pc.match_substring_regex(text, MAYBE_INFINITY), dtype=bool)


def eight_digit_dates(numbers: np.ndarray, whole: np.ndarray, absolute: np.ndarray | None = None) -> np.ndarray:
    """Mask of whole numbers of eight digits that read as YYYYMMDD, DDMMYYYY or MMDDYYYY (years 1900-2099); seven
    digits too, a DDMMYYYY or MMDDYYYY date stored as a number having lost its leading zero (1032000).
    ``absolute`` is ``np.abs(numbers)`` when the caller has it."""
    absolute = np.abs(numbers) if absolute is None else absolute
    with np.errstate(invalid="ignore"):
        rows = np.flatnonzero((absolute >= 1e6) & (absolute < 1e8))
    rows = rows[whole[rows]]  # only whole numbers of seven or eight digits can be dates
    n = absolute[rows].astype(np.int64)
    found = np.zeros(n.size, dtype=bool)
    eight = n >= 10_000_000
    for year, month, day in (
        (np.where(eight, n // 10_000, 0), n // 100 % 100, n % 100),
        (n % 10_000, n // 10_000 % 100, n // 1_000_000),
        (n % 10_000, n // 1_000_000, n // 10_000 % 100),
    ):
        found |= (year >= 1900) & (year <= 2099) & (month >= 1) & (month <= 12) & (day >= 1) & (day <= 31)
    dates = np.zeros(numbers.size, dtype=bool)
    dates[rows] = found
    return dates


def universal_hits(numbers: np.ndarray, whole: np.ndarray) -> list[tuple[np.ndarray, str]]:
    """Rows (mask, category) of the rules that hold in every column."""
    absolute = np.abs(numbers)
    return [
        (whole & (absolute >= 1e8) & (absolute < 1e15), "social-security, telephone or record number"),
        (eight_digit_dates(numbers, whole, absolute), "full date"),
    ]


def named_age_hits(numbers: np.ndarray) -> np.ndarray:
    """Values above 89 in a column named like an age whose values look like ages (else a derived column)."""
    filled = np.isfinite(numbers)
    if not filled.any():
        return np.zeros(numbers.size, dtype=bool)
    age_like = np.mean((numbers[filled] >= 0) & (numbers[filled] <= AGE_NAMED_MAX)) >= AGE_LIKE_SHARE
    return (np.nan_to_num(numbers, nan=0.0) > AGE_LIMIT) if age_like else np.zeros(numbers.size, dtype=bool)


def content_hits(numbers: np.ndarray, whole: np.ndarray) -> list[tuple[np.ndarray, str]]:
    """Rows (mask, category) of the content rules for an undeclared column (see the module docstring)."""
    filled = np.isfinite(numbers)
    total = int(filled.sum())
    if total == 0 or not np.array_equal(whole, filled):
        return []  # some value is not a whole number: a measurement, not a code
    absolute = np.abs(np.where(filled, numbers, 0.0))
    out = []
    if absolute.max() <= AGE_CONTENT_MAX and absolute.max() > AGE_LIMIT:
        out.append((absolute > AGE_LIMIT, "age over 89"))
    five = filled & (absolute >= 10_000) & (absolute < 100_000)
    if five.sum() >= 0.5 * total and _mostly_not_round(absolute[five]):
        out.append((filled & (absolute >= 1000) & (absolute < 100_000), "postcode"))
    serial = filled & (absolute >= 100_000) & (absolute < 1e8)
    if serial.sum() >= 0.5 * total and _mostly_not_round(absolute[serial]):
        if np.unique(absolute[serial]).size >= SERIAL_DISTINCT_SHARE * serial.sum():
            out.append((serial, "record or chart number"))
    return out


def _mostly_not_round(values: np.ndarray) -> bool:
    return bool(values.size) and np.mean(values % 10 != 0) >= 0.5
