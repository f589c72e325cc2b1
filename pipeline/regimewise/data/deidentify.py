"""De-identification guard: refuse columns and values that look like direct identifiers.

The categories follow the HIPAA Privacy Rule's Safe Harbor method, 45 CFR 164.514(b)(2)(i): names;
geographic subdivisions smaller than a state (street address, city, county, postcode); all elements of dates
except the year; telephone and fax numbers; e-mail addresses; social-security, medical-record, health-plan and
account numbers; certificate and licence numbers; vehicle and device identifiers and serial numbers; URLs and
IP addresses; biometric identifiers and full-face photographs; and ages over 89 unless aggregated into a single
category of 90 or older. Detection is by column name and by value pattern; it is a guard against accidents, not
a proof of de-identification.

Postcodes (Safe Harbor (B), geographic subdivisions smaller than a state):

- a text cell that is exactly five digits (``02139``) or a US ZIP+4 (``02139-4307``), and a ZIP+4 anywhere in a
  text cell;
- a UK postcode anywhere in a text cell, upper case, with or without the space: outward code ``A9``, ``A99``,
  ``AA9``, ``AA99``, ``A9A`` or ``AA9A``, then the inward code ``9AA`` whose letters are never C, I, K, M, O or V
  (``SW1A 1AA``, ``M1 1AE``; the format of BS 7666, recalled from memory);
- a Canadian postcode anywhere in a text cell, upper case: ``A9A 9A9`` with an optional space or hyphen, without
  the letters D, F, I, O, Q, U (and W, Z in the first place) that Canada Post does not use (``K1A 0B1``; from
  memory);
- in a column whose name suggests a postcode without being refused by it (``zip5``, ``homezip``, ``postal``,
  ``plz``; :data:`POSTCODE_NAME_HINTS`), any whole number from 1000 up, numeric or text: a five-digit ZIP code
  stored as an integer (its leading zero lost: 02139 becomes 2139) or a ZIP+4 without its dash. Numbers up to 999
  pass: Safe Harbor allows the first three digits of a ZIP code for areas of more than 20,000 people (whether a
  prefix is one of the restricted small areas is not checked).

Person names (Safe Harbor (A)) are caught by the column's name and, in text columns, by :func:`name_column_hits`:
a column is refused when most of its cells look like a personal name (two to four capitalised words such as
``Jane Roe``, ``Mary-Ann O'Neil``, ``Jane A. Roe`` or ``Roe, Jane``) and those cells take many different values
(see :func:`name_column_hits` for the thresholds and what the heuristic misses).

Beyond these: value shapes (e-mail, phone, social-security and MRN-prefixed numbers, dates in digits or words,
postcodes; the id-column rules) live in :mod:`regimewise.protocol.identifiers`, shared with the protocol's free
text; identifier-shaped whole numbers and the content rules of undeclared columns (ages, postcodes, record or
chart numbers) in :mod:`regimewise.data.numbers`. README "Your own records" lists every rule and its limits.

Values found here are never shown: messages give the row, the column, the category and a masked value; a single
value that looks like a personal name is masked in messages too (:func:`shown_value`).
Integer day offsets (``day``) and ages up to 89 pass.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from regimewise.data.distinct import FIND, broadcast, distinct_text
from regimewise.data.numbers import content_hits, named_age_hits, universal_hits, whole_numbers
from regimewise.protocol.identifiers import (
    ANY_EXACT,
    ANY_VALUE,
    EIGHT_DIGITS,
    ID_PATTERNS,
    PERSON_NAME,
    identifier_category,
    looks_like_identifier,
    mask,
    scrub,
    shown_value,
)
from regimewise.protocol.types import level_text

__all__ = [
    "IdentifierHit",
    "column_name_category",
    "find_identifiers",
    "header_category",
    "is_age_column",
    "looks_like_identifier",
    "mask",
    "scrub",
    "shown_value",
    "value_hits",
]

ID, DECLARED, OTHER = "id", "declared", "other"  # how a column is read (see value_hits)


AGE_GROUP_LABEL = "90+"


# Column-name rules: whole tokens (name split at non-alphanumerics) and substrings of the name without separators.
NAME_TOKENS = {
    "person name": {"name", "names", "forename", "surname", "initials"},
    "street address or place": {"street", "city", "county", "town", "zip", "zipcode", "postcode"},
    "e-mail": {"email", "mail"},
    "telephone or fax": {"phone", "tel", "telephone", "mobile", "fax"},
    "social-security or record number": {"ssn", "mrn", "nhs", "insurance", "account", "iban", "passport"},
    "URL or IP address": {"url", "uri", "ip", "website"},
    "full date": {"date", "datetime", "timestamp", "dob", "birthday"},
    "device, licence or vehicle number": {"serial", "vin", "plate", "imei", "licence", "license", "certificate"},
    "biometric or photo": {"photo", "fingerprint", "biometric", "voiceprint", "retina"},
}


NAME_SUBSTRINGS = {
    "person name": ("firstname", "lastname", "givenname", "fullname", "familyname", "patientname", "maidenname"),
    "street address or place": ("address", "streetname", "postalcode", "postcode", "zipcode"),
    "e-mail": ("email",),
    "telephone or fax": ("telephone", "phonenumber", "faxnumber", "mobilenumber"),
    "social-security or record number": (
        "socialsecurity",
        "medicalrecord",
        "recordnumber",
        "nhsnumber",
        "healthplan",
        "beneficiary",
        "accountnumber",
        "insurancenumber",
    ),
    "URL or IP address": ("ipaddress", "website", "homepage"),
    "full date": ("dateofbirth", "birthdate", "dateofdeath", "deathdate", "admissiondate", "dischargedate"),
    "device, licence or vehicle number": (
        "serialnumber",
        "deviceid",
        "licenseplate",
        "licenceplate",
        "licensenumber",
        "licencenumber",
        "certificatenumber",
    ),
    "biometric or photo": ("fingerprint", "photograph"),
}


# Column names that suggest a postcode (substrings of the name without separators); see the module docstring.
POSTCODE_NAME_HINTS = ("zip", "postal", "postcode", "plz")


POSTCODE_MIN_NUMBER = 1000


# A text column is refused as holding names when at least this share of its filled cells look like names ...
NAME_COLUMN_SHARE = 0.5


# ... and those cells take at least this many distinct values, and at least this share of them are distinct.
NAME_MIN_DISTINCT = 10


NAME_MIN_DISTINCT_SHARE = 0.05


@dataclass(frozen=True)
class IdentifierHit:
    """Where an identifier-like column or value was found (row is 0-based; None for a column name)."""

    column: str
    row: int | None
    category: str
    length: int = 0


# ---------------------------------------------------------------------------------------------- column names
def _tokens(name: str) -> list[str]:
    spaced = re.sub(r"([a-z])([A-Z])", r"\1_\2", str(name))
    return [t for t in re.split(r"[^a-z0-9]+", spaced.lower()) if t]


def column_name_category(name: str) -> str | None:
    """The Safe Harbor category a column name suggests, or None (``day``, ``age``, ``patient_id`` pass)."""
    tokens = set(_tokens(name))
    compact = "".join(_tokens(name))
    for category, words in NAME_TOKENS.items():
        if tokens & words:
            return category
    for category, parts in NAME_SUBSTRINGS.items():
        if any(part in compact for part in parts):
            return category
    return None


# Words that, beside "age" in a column name, say the column is derived from an age rather than an age itself
# (age_sq, age_squared, age_log, age_x_bp, age_centred, age_z): such a column is not read as an age by its name.
DERIVED_AGE_WORDS = {
    "sq", "sqr", "squared", "cube", "cubed", "pow", "power", "poly", "spline", "log", "ln", "sqrt", "exp", "inv",
    "z", "zscore", "std", "standardised", "standardized", "scaled", "centred", "centered", "ctr", "x", "by",
    "times", "product", "interaction", "ratio", "rank", "diff", "delta",
}  # fmt: skip


def is_age_column(name: str) -> bool:
    """Whether a column name says it holds ages: the word ``age`` (``age``, ``age_at_index``, ``AgeYears``) and no
    word of :data:`DERIVED_AGE_WORDS` (``age_sq``, ``age_x_bp`` are derived terms, read by content or by their
    declaration instead). ``stage`` and ``usage_days`` do not say age (the word, not the letters)."""
    tokens = set(_tokens(name))
    return "age" in tokens and not tokens & DERIVED_AGE_WORDS


def suggests_postcode(name: str) -> bool:
    """Whether a column name hints at a postcode (:data:`POSTCODE_NAME_HINTS`, e.g. ``zip5``, ``postal``)."""
    compact = "".join(_tokens(name))
    return any(hint in compact for hint in POSTCODE_NAME_HINTS)


# ---------------------------------------------------------------------------------------------- values
def value_hits(
    column: str, values: pd.Series, role: str = OTHER, age: bool | None = None, distinct=FIND
) -> list[IdentifierHit]:
    """Identifier-like cells of one column, by content whatever its type (one hit per row, sorted by row).

    ``role`` is :data:`ID` for the episode and patient id columns, :data:`DECLARED` for the other columns the
    protocol declares (states and contract columns, read by their declared meaning) and :data:`OTHER` for the
    rest, which are also read by the content rules of :mod:`regimewise.data.numbers`. ``age`` says whether the
    column holds ages (a state declared as an age); None reads it from the column's name (:func:`is_age_column`).

    A row's category is that of the first rule it breaks (number rules, then text rules). Text columns are read
    once per distinct value (:func:`regimewise.data.distinct.distinct_text`; ``distinct``, when given, is its
    result for ``values``, already found).
    """
    if pd.api.types.is_datetime64_any_dtype(values):
        rows = np.flatnonzero(values.notna().to_numpy())
        return [IdentifierHit(column, int(r), "full date", 10) for r in rows]
    age = is_age_column(column) if age is None else age
    text_column = pd.api.types.is_object_dtype(values) or pd.api.types.is_string_dtype(values)
    if not text_column:
        distinct = None
    elif distinct is FIND:
        distinct = distinct_text(values)
    categories: list[str] = []
    # per row, the index in categories of the first rule it breaks (-1: none); there are a few dozen categories
    first = np.full(len(values), -1, dtype=np.int8)
    for mask_, category in _number_rules(column, values, role, age, distinct):
        _mark(first, categories, mask_, category)
    if text_column:
        codes, uniques = _text_codes(values, distinct)
        text = _arrow_text(uniques, all_text=distinct is not None and uniques is distinct[1])
        by_code = np.full(len(uniques), -1, dtype=np.int8)  # per distinct value, its category's index
        for code, category in _text_categories(uniques, text, role == ID):
            if category not in categories:
                categories.append(category)
            by_code[code] = categories.index(category)
        text_rows = broadcast(by_code, codes, -1)
        unmarked = first < 0
        first[unmarked] = text_rows[unmarked]
        if not (first >= 0).any() and role == OTHER:
            return name_column_hits(column, codes, uniques, text)
    return [
        IdentifierHit(column, int(r), categories[first[r]], len(str(values.iat[r]))) for r in np.flatnonzero(first >= 0)
    ]


def _mark(first: np.ndarray, categories: list[str], mask_: np.ndarray, category: str) -> None:
    """Give the rows of ``mask_`` that no earlier rule marked the index of ``category``."""
    new = mask_ & (first < 0)
    if new.any():
        if category not in categories:
            categories.append(category)
        first[new] = categories.index(category)


def _hashable(value):
    return value if isinstance(value, (str, int, float, bool)) or value is None else repr(value)


def _text_codes(values: pd.Series, distinct) -> tuple[np.ndarray, np.ndarray]:
    """``pandas.factorize`` of the cells as the text rules read them: each cell as itself when it is a ``str``,
    number, bool or None, else as its ``repr`` (lists and dicts cannot be hashed; pd.NA becomes ``'<NA>'``).

    For a text column (``distinct``, see :func:`regimewise.data.distinct.distinct_text`) every cell but the
    missing ones already reads as itself: its factorization is reused, unless a missing cell is neither None
    nor NaN (pd.NA, NaT); then only those cells are replaced by their ``repr`` before factorizing again.
    """
    if distinct is None:
        return pd.factorize(values.astype(object).map(_hashable), use_na_sentinel=True)
    codes, uniques = distinct
    missing = np.flatnonzero(codes < 0)
    cells = values.iloc[missing].astype(object).to_numpy()
    odd = [i for i, cell in enumerate(cells) if not (cell is None or isinstance(cell, float))]
    if not odd:
        return codes, uniques
    mapped = values.astype(object).to_numpy(copy=True)
    mapped[missing[odd]] = [repr(cells[i]) for i in odd]
    return pd.factorize(mapped, use_na_sentinel=True)


def _arrow_text(uniques, all_text: bool) -> pa.Array:
    """The distinct values as a pyarrow string array (each one's ``str``)."""
    if all_text:
        return pa.array(uniques, type=pa.string())
    return pa.array([str(u) for u in uniques], type=pa.string())


def _number_rules(column: str, values: pd.Series, role: str, age: bool, distinct=None) -> list[tuple[np.ndarray, str]]:
    numbers, whole = whole_numbers(values, distinct)
    rules = universal_hits(numbers, whole)
    if role != ID and age:
        named = named_age_hits(numbers)
        if named.any():  # the '90+' label can only clear rows the age rule marks
            grouped = values.astype("string").str.strip().eq(AGE_GROUP_LABEL).fillna(False).to_numpy(dtype=bool)
            named &= ~grouped
        rules.append((named, "age over 89"))
    elif role == OTHER:
        rules += content_hits(numbers, whole)
    if role == OTHER and suggests_postcode(column):
        rules.append((whole & (np.abs(numbers) >= POSTCODE_MIN_NUMBER), "postcode"))
    return rules


def _text_categories(uniques, text: pa.Array, id_column: bool) -> list[tuple[int, str]]:
    """(code, category) of the distinct text values that look like identifiers (RE2 prefilter, then Python)."""
    patterns = [ANY_VALUE.pattern, ANY_EXACT.pattern, EIGHT_DIGITS.pattern]
    if id_column:
        patterns += [PERSON_NAME, *ID_PATTERNS.values()]
    suspicious = np.zeros(len(uniques), dtype=bool)
    for pattern in patterns:
        suspicious |= np.asarray(pc.match_substring_regex(text, pattern), dtype=bool)
    out = []
    for code in np.flatnonzero(suspicious):
        category = identifier_category(uniques[code], id_column=id_column, names=id_column)
        if category is not None:
            out.append((int(code), category))
    return out


def name_column_hits(column: str, codes: np.ndarray, uniques, text: pa.Array) -> list[IdentifierHit]:
    """Cells of a text column that holds personal names (Safe Harbor (A)); empty if the column does not.

    A cell looks like a name when it is two to four capitalised words (:data:`PERSON_NAME`). The column is taken
    to hold names when at least :data:`NAME_COLUMN_SHARE` of its filled cells look like names and those cells
    take at least :data:`NAME_MIN_DISTINCT` distinct values, which are at least :data:`NAME_MIN_DISTINCT_SHARE` of
    the name-like cells. Then every name-like cell is a hit.

    The distinct-value conditions keep category labels out: an action or diagnosis column holds a few labels,
    each repeated many times, even when they are capitalised ("Step Up", "Add Agent"); labels in snake case or
    with a lower-case second word ("step_up", "Add agent") never look like names. Limits (common practice for a
    guard, no source; thresholds chosen here): a name in a column of other text, a single-word name, and names
    in lower or upper case are not caught; a column of many capitalised multi-word labels that vary a lot
    (clinic or brand names in a small table) is refused and must be acknowledged in ``data.acknowledged_columns``.

    Parameters
    ----------
    column : str
    codes, uniques : the column's ``pandas.factorize`` result (missing cells coded -1)
    text : pyarrow string array of ``uniques``
    """
    if len(uniques) < NAME_MIN_DISTINCT:
        return []
    name_like = np.asarray(pc.match_substring_regex(text, PERSON_NAME), dtype=bool)
    counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
    cells, distinct = int(counts[name_like].sum()), int(name_like.sum())
    mostly_names = cells >= NAME_COLUMN_SHARE * counts.sum()
    if not (mostly_names and distinct >= max(NAME_MIN_DISTINCT, NAME_MIN_DISTINCT_SHARE * cells)):
        return []
    return [
        IdentifierHit(column, int(r), "person name", len(str(uniques[codes[r]])))
        for r in np.flatnonzero(name_like[np.maximum(codes, 0)] & (codes >= 0))
    ]


def header_category(name: str) -> str | None:
    """The category a column header suggests by its words (:func:`column_name_category`) or by its shape (an
    e-mail, a number, a date written as the header), or None."""
    return column_name_category(name) or identifier_category(name, names=False)


def find_identifiers(
    frame: pd.DataFrame, acknowledged=(), id_columns=(), declared=(), ages=(), levels=None, text=None
) -> list[IdentifierHit]:
    """Every identifier-like column header and value in a table, skipping acknowledged columns.

    Header hits come first (one per column, ``row`` None); a refused column's values are not scanned. Columns in
    ``id_columns`` are read as id columns, those in ``declared`` by their declared meaning, the rest also by the
    content rules (see :func:`value_hits`). Columns in ``ages`` (states declared as ages, whatever the column's
    name) hold ages; any other column holds ages when its name says so (:func:`is_age_column`). ``levels`` maps
    the column of each categorical state to its declared levels: a cell holding one of them is a label the
    protocol's author listed one by one (and the protocol's own guard checked), so it is not read by value
    shape (a declared site code ``10001`` is not a postcode); the column's other cells are read as above
    (validation also reports them as undeclared levels). The levels of a state declared as an age (in ``ages``)
    are still read as ages: a level above 89 is refused. ``text``, if given, is the frame's
    :class:`regimewise.data.distinct.TableText` (used for the columns read as they are).
    """
    acknowledged, id_columns, declared, ages = set(acknowledged), set(id_columns), set(declared), set(ages)
    levels = dict(levels or {})
    hits = []
    for column in frame.columns:
        name = str(column)
        if name in acknowledged:
            continue
        category = header_category(name)
        if category is not None:
            hits.append(IdentifierHit(name, None, category))
            continue
        role = ID if name in id_columns else DECLARED if name in declared else OTHER
        labels = name in levels and name not in ages  # an age state's levels are still ages
        values = _undeclared_levels(frame[column], levels[name]) if labels else frame[column]
        distinct = FIND if labels or text is None else text(column)
        hits += value_hits(name, values, role, age=True if name in ages else None, distinct=distinct)
    return hits


def _undeclared_levels(values: pd.Series, levels) -> pd.Series:
    """The column with every cell holding a declared level blanked (missing), the others as they are."""
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    declared = np.isin(np.asarray([level_text(u) for u in uniques], dtype=object), np.asarray(list(levels), object))
    blank = np.append(declared, False)[codes]
    if blank.all():  # the usual case: every cell a declared level (no need to copy the cells as objects)
        return pd.Series(np.nan, index=values.index, dtype=object, name=values.name)
    return values.astype(object).mask(blank) if blank.any() else values
