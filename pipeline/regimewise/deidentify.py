"""De-identification guard: refuse columns and values that look like direct identifiers.

The categories follow the HIPAA Privacy Rule's Safe Harbor method, 45 CFR 164.514(b)(2)(i): names;
geographic subdivisions smaller than a state (street address, city, county, postcode); all elements of dates
except the year; telephone and fax numbers; e-mail addresses; social-security, medical-record, health-plan and
account numbers; certificate and licence numbers; vehicle and device identifiers and serial numbers; URLs and
IP addresses; biometric identifiers and full-face photographs; and ages over 89 unless aggregated into a single
category of 90 or older. Detection is by column name and by value pattern; it is a guard against accidents, not
a proof of de-identification (names, for example, are only caught by their column's name).

Values found here are never shown: messages give the row, the column, the category and a masked value.
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
        "socialsecurity", "medicalrecord", "recordnumber", "nhsnumber", "healthplan", "beneficiary",
        "accountnumber", "insurancenumber",
    ),
    "URL or IP address": ("ipaddress", "website", "homepage"),
    "full date": ("dateofbirth", "birthdate", "dateofdeath", "deathdate", "admissiondate", "dischargedate"),
    "device, licence or vehicle number": ("serialnumber", "deviceid", "licenseplate", "licenceplate", "licensenumber",
                                          "licencenumber", "certificatenumber"),
    "biometric or photo": ("fingerprint", "photograph"),
}  # fmt: skip

# Value patterns, applied to text cells only (numbers cannot hold an '@', a dash or a dot-separated address).
VALUE_PATTERNS = {
    "e-mail": r"[A-Za-z0-9._%+-]+@[A-Za-z0-9-]+(?:\.[A-Za-z0-9-]+)*\.[A-Za-z]{2,}",
    "URL or IP address": r"(?i:\bhttps?://|\bwww\.)\S+|\b(?:\d{1,3}\.){3}\d{1,3}\b",
    "social-security or record number": r"\b\d{3}-\d{2}-\d{4}\b|(?i:\b(?:mrn|nhs|ssn)\b)[\s:#-]*\d{4,}|\b\d{9,}\b",
    "telephone or fax": r"(?:\+\d{1,3}[\s.-]?)?\(?\b\d{2,4}\)?[\s.-]\d{3,4}[\s.-]\d{3,4}\b",
    "full date": r"\b\d{4}[-/.]\d{1,2}[-/.]\d{1,2}\b|\b\d{1,2}[-/.]\d{1,2}[-/.]\d{4}\b",
    "postcode": r"^\s*\d{5}(?:-\d{4})?\s*$",
}
_COMPILED = {category: re.compile(pattern) for category, pattern in VALUE_PATTERNS.items()}
_ANY = re.compile("|".join(f"(?:{p})" for p in VALUE_PATTERNS.values() if not p.startswith("^")))


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
    """True when a single value matches any identifier pattern."""
    text = str(value)
    return bool(_ANY.search(text) or _COMPILED["postcode"].match(text))


def scrub(text: str) -> str:
    """Free text with every identifier-like fragment replaced by ``[masked]`` (for parser messages)."""
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


# ---------------------------------------------------------------------------------------------- values
def value_hits(column: str, values: pd.Series) -> list[IdentifierHit]:
    """Identifier-like cells of one column (vectorised per pattern; text cells only)."""
    if pd.api.types.is_datetime64_any_dtype(values):
        rows = np.flatnonzero(values.notna().to_numpy())
        return [IdentifierHit(column, int(r), "full date", 10) for r in rows]
    if is_age_column(column):
        return _age_hits(column, values)
    if not (pd.api.types.is_object_dtype(values) or pd.api.types.is_string_dtype(values)):
        return []
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    text = pa.array([str(u) for u in uniques], type=pa.string())
    suspicious = np.asarray(pc.match_substring_regex(text, _ANY.pattern)) | np.asarray(
        pc.match_substring_regex(text, VALUE_PATTERNS["postcode"])
    )
    hits = []
    for code in np.flatnonzero(suspicious):
        category = next(c for c, rx in _COMPILED.items() if rx.search(str(uniques[code])))
        rows = np.flatnonzero(codes == code)
        hits += [IdentifierHit(column, int(r), category, len(str(uniques[code]))) for r in rows]
    return sorted(hits, key=lambda h: h.row)


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
