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

AGE_LIMIT = 89


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


# Value patterns, searched anywhere in text cells (numbers cannot hold an '@', a dash or a dot-separated address).
ZIP_PLUS_4 = r"\b\d{5}-\d{4}\b"


UK_POSTCODE = r"\b(?:[A-Z]{1,2}\d{1,2}|[A-Z]{1,2}\d[A-Z]) ?\d[ABD-HJLNP-UW-Z]{2}\b"


CANADIAN_POSTCODE = r"\b[ABCEGHJ-NPRSTVXY]\d[ABCEGHJ-NPRSTV-Z][ -]?\d[ABCEGHJ-NPRSTV-Z]\d\b"


VALUE_PATTERNS = {
    "e-mail": r"[A-Za-z0-9._%+-]+@[A-Za-z0-9-]+(?:\.[A-Za-z0-9-]+)*\.[A-Za-z]{2,}",
    "URL or IP address": r"(?i:\bhttps?://|\bwww\.)\S+|\b(?:\d{1,3}\.){3}\d{1,3}\b",
    "social-security or record number": r"\b\d{3}-\d{2}-\d{4}\b|(?i:\b(?:mrn|nhs|ssn)\b)[\s:#-]*\d{4,}|\b\d{9,}\b",
    "telephone or fax": r"(?:\+\d{1,3}[\s.-]?)?\(?\b\d{2,4}\)?[\s.-]\d{3,4}[\s.-]\d{3,4}\b",
    "full date": r"\b\d{4}[-/.]\d{1,2}[-/.]\d{1,2}\b|\b\d{1,2}[-/.]\d{1,2}[-/.]\d{4}\b",
    "postcode": f"{ZIP_PLUS_4}|{UK_POSTCODE}|{CANADIAN_POSTCODE}",
}


# Patterns that must fill the whole cell: five digits alone are a postcode, five digits inside text need not be.
EXACT_PATTERNS = {"postcode": r"^\s*\d{5}(?:-\d{4})?\s*$"}


_COMPILED = [(c, re.compile(p)) for c, p in [*VALUE_PATTERNS.items(), *EXACT_PATTERNS.items()]]


_ANY = re.compile("|".join(f"(?:{p})" for p in VALUE_PATTERNS.values()))


_EXACT = re.compile("|".join(f"(?:{p})" for p in EXACT_PATTERNS.values()))


# Column names that suggest a postcode (substrings of the name without separators); see the module docstring.
POSTCODE_NAME_HINTS = ("zip", "postal", "postcode", "plz")


POSTCODE_MIN_NUMBER = 1000


# A cell that looks like a personal name: two to four capitalised words (Latin letters incl. accented ones; a
# word may carry an O'/D' prefix, one inner capital as in McDonald, one hyphenated part), middle ones may be
# initials; or "Surname, Given". Written for both Python's re and pyarrow's RE2.
_UP, _LO = "A-ZÀ-ÖØ-Þ", "a-zß-öø-ÿ"


_WORD = f"(?:[{_UP}]['’])?[{_UP}][{_LO}]+(?:[{_UP}][{_LO}]+)?(?:-[{_UP}][{_LO}]+)?"


_MIDDLE = f"(?:{_WORD}|[{_UP}]\\.)"


PERSON_NAME = f"^\\s*(?:{_WORD}(?:\\s+{_MIDDLE}){{0,2}}\\s+{_WORD}|{_WORD},\\s*{_WORD}(?:\\s+{_MIDDLE})?)\\s*$"


_PERSON_NAME = re.compile(PERSON_NAME)


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


# ---------------------------------------------------------------------------------------------- masking
def mask(value) -> str:
    """A stand-in that shows only how long the value was."""
    return f"[masked, {len(str(value))} characters]"


def looks_like_identifier(value) -> bool:
    """True when a single value matches any identifier pattern, or looks like a personal name on its own."""
    text = str(value)
    return bool(_ANY.search(text) or _EXACT.match(text) or _PERSON_NAME.match(text))


def scrub(text: str) -> str:
    """Free text with every identifier-like fragment replaced by ``[masked]`` (for parser messages).

    Fragments are found by :data:`VALUE_PATTERNS`; names inside running text cannot be told from ordinary
    capitalised words and are not scrubbed (parser messages quote at most a short piece of a record).
    """
    return " ".join(_ANY.sub("[masked]", str(text)).split())


def shown_value(value) -> str:
    """How a value may appear in a message: masked if it looks like an identifier."""
    return mask(value) if looks_like_identifier(value) else str(value)


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


def is_age_column(name: str) -> bool:
    return "age" in _tokens(name)


def suggests_postcode(name: str) -> bool:
    """Whether a column name hints at a postcode (:data:`POSTCODE_NAME_HINTS`, e.g. ``zip5``, ``postal``)."""
    compact = "".join(_tokens(name))
    return any(hint in compact for hint in POSTCODE_NAME_HINTS)


# ---------------------------------------------------------------------------------------------- values
def value_hits(column: str, values: pd.Series) -> list[IdentifierHit]:
    """Identifier-like cells of one column (vectorised per pattern; text cells only)."""
    if pd.api.types.is_datetime64_any_dtype(values):
        rows = np.flatnonzero(values.notna().to_numpy())
        return [IdentifierHit(column, int(r), "full date", 10) for r in rows]
    if is_age_column(column):
        return _age_hits(column, values)
    hits = _number_postcode_hits(column, values) if suggests_postcode(column) else []
    if not (pd.api.types.is_object_dtype(values) or pd.api.types.is_string_dtype(values)):
        return hits
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    text = pa.array([str(u) for u in uniques], type=pa.string())
    suspicious = np.asarray(pc.match_substring_regex(text, _ANY.pattern)) | np.asarray(
        pc.match_substring_regex(text, _EXACT.pattern)
    )
    seen = {h.row for h in hits}
    for code in np.flatnonzero(suspicious):
        category = next(c for c, rx in _COMPILED if rx.search(str(uniques[code])))
        rows = np.flatnonzero(codes == code)
        hits += [IdentifierHit(column, int(r), category, len(str(uniques[code]))) for r in rows if r not in seen]
    if not hits:
        hits = name_column_hits(column, codes, uniques, text)
    return sorted(hits, key=lambda h: h.row)


def _number_postcode_hits(column: str, values: pd.Series) -> list[IdentifierHit]:
    """Whole numbers from :data:`POSTCODE_MIN_NUMBER` up in a column whose name suggests a postcode."""
    numbers = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    finite = np.nan_to_num(numbers, nan=0.0, posinf=0.0, neginf=0.0)
    rows = np.flatnonzero((finite >= POSTCODE_MIN_NUMBER) & (finite == np.round(finite)))
    return [IdentifierHit(column, int(r), "postcode", len(str(values.iat[r]))) for r in rows]


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


def _age_hits(column: str, values: pd.Series) -> list[IdentifierHit]:
    """Ages above 89 are refused; the single grouped label '90+' is accepted (Safe Harbor)."""
    grouped = values.astype("string").str.strip().eq(AGE_GROUP_LABEL).fillna(False).to_numpy(dtype=bool)
    numbers = pd.to_numeric(values.where(~grouped), errors="coerce").to_numpy(dtype=float)
    over = np.flatnonzero(np.nan_to_num(numbers, nan=0.0, posinf=AGE_LIMIT + 1) > AGE_LIMIT)
    return [IdentifierHit(column, int(r), "age over 89", len(str(values.iat[r]))) for r in over]


def find_identifiers(frame: pd.DataFrame, acknowledged=()) -> list[IdentifierHit]:
    """Every identifier-like column name and value in a table, skipping acknowledged columns.

    Column-name hits come first (one per column, ``row`` None); a refused column's values are not scanned.
    """
    acknowledged = set(acknowledged)
    hits = []
    for column in frame.columns:
        name = str(column)
        if name in acknowledged:
            continue
        category = column_name_category(name)
        if category is not None:
            hits.append(IdentifierHit(name, None, category))
            continue
        hits += value_hits(name, frame[column])
    return hits
