"""What a single piece of text or a single whole number looks like: a direct identifier or not.

These are the value shapes of the de-identification guard (:mod:`regimewise.data.deidentify`), kept here, below
the data room, because the protocol's own free text (title, question, labels, reasons) and the names of the
files it points to pass the same checks before anything is read or written. The categories follow the HIPAA
Privacy Rule's Safe Harbor method, 45 CFR 164.514(b)(2)(i) (from memory); see README "De-identification guard"
for every rule and its limits. A value found here is never shown: messages give only its length (:func:`mask`).
"""

from __future__ import annotations

import re
from datetime import date

# Value patterns, searched anywhere in a text (numbers cannot hold an '@', a dash or a dot-separated address).
ZIP_PLUS_4 = r"\b\d{5}-\d{4}\b"


UK_POSTCODE = r"\b(?:[A-Z]{1,2}\d{1,2}|[A-Z]{1,2}\d[A-Z]) ?\d[ABD-HJLNP-UW-Z]{2}\b"


CANADIAN_POSTCODE = r"\b[ABCEGHJ-NPRSTVXY]\d[ABCEGHJ-NPRSTV-Z][ -]?\d[ABCEGHJ-NPRSTV-Z]\d\b"


MONTH = (
    r"(?:jan(?:uary)?|feb(?:ruary)?|mar(?:ch)?|apr(?:il)?|may|june?|july?|aug(?:ust)?|sep(?:t(?:ember)?)?"
    r"|oct(?:ober)?|nov(?:ember)?|dec(?:ember)?)"
)


# "14 March 1950", "14th of Mar. 50", "March 14, 1950": a day, a month in words and a year.
WORD_DATE = (
    rf"(?i:\b\d{{1,2}}(?:st|nd|rd|th)?\s+(?:of\s+)?{MONTH}\.?,?\s+\d{{2,4}}\b"
    rf"|\b{MONTH}\.?\s+\d{{1,2}}(?:st|nd|rd|th)?,?\s+\d{{2,4}}\b)"
)


VALUE_PATTERNS = {
    "e-mail": r"[A-Za-z0-9._%+-]+@[A-Za-z0-9-]+(?:\.[A-Za-z0-9-]+)*\.[A-Za-z]{2,}",
    "URL or IP address": r"(?i:\bhttps?://|\bwww\.)\S+|\b(?:\d{1,3}\.){3}\d{1,3}\b",
    "social-security or record number": r"\b\d{3}[-\s.]\d{2}[-\s.]\d{4}\b"
    r"|(?i:\b(?:mrn|nhs|ssn|chart)(?:no|nr)?)[\s:#._-]*\d{4,}|\b\d{9,}\b",
    "telephone or fax": r"(?:\+\d{1,3}[\s.-]?)?\(?\b\d{2,4}\)?[\s.-]\d{3,4}[\s.-]\d{3,4}\b"
    r"|\(\d{2,5}\)\s*\d{3,4}[\s.-]?\d{3,4}\b",
    "full date": r"\b\d{4}[-/.]\d{1,2}[-/.]\d{1,2}\b|\b\d{1,2}[-/.]\d{1,2}[-/.]\d{4}\b|" + WORD_DATE,
    "postcode": f"{ZIP_PLUS_4}|{UK_POSTCODE}|{CANADIAN_POSTCODE}",
}


# Patterns that must fill the whole cell: five digits alone are a postcode, five digits inside text need not be.
EXACT_PATTERNS = {"postcode": r"^\s*\d{5}(?:-\d{4})?\s*$"}


# Only in id columns: a date with a two-digit year ("14.03.50", "14/03/50"), and an id without a single digit
# (a name or a word, in any case: "jane roe", "roe_jane"; study pseudonyms are codes such as P000123).
ID_PATTERNS = {
    "full date": r"\b\d{1,2}[-/.]\d{1,2}[-/.]\d{2}\b",
    "person name": r"^[^0-9]*[A-Za-zÀ-ÖØ-öø-ÿ]{2}[^0-9]*$",
}


COMPILED = [(c, re.compile(p)) for c, p in [*VALUE_PATTERNS.items(), *EXACT_PATTERNS.items()]]


ID_COMPILED = [(c, re.compile(p)) for c, p in ID_PATTERNS.items()]


ANY_VALUE = re.compile("|".join(f"(?:{p})" for p in VALUE_PATTERNS.values()))


ANY_EXACT = re.compile("|".join(f"(?:{p})" for p in EXACT_PATTERNS.values()))


# A cell that looks like a personal name: two to four capitalised words (Latin letters incl. accented ones; a
# word may carry an O'/D' prefix, one inner capital as in McDonald, one hyphenated part), middle ones may be
# initials; or "Surname, Given". Written for both Python's re and pyarrow's RE2.
_UP, _LO = "A-ZÀ-ÖØ-Þ", "a-zß-öø-ÿ"


_WORD = f"(?:[{_UP}]['’])?[{_UP}][{_LO}]+(?:[{_UP}][{_LO}]+)?(?:-[{_UP}][{_LO}]+)?"


_MIDDLE = f"(?:{_WORD}|[{_UP}]\\.)"


PERSON_NAME = f"^\\s*(?:{_WORD}(?:\\s+{_MIDDLE}){{0,2}}\\s+{_WORD}|{_WORD},\\s*{_WORD}(?:\\s+{_MIDDLE})?)\\s*$"


PERSON_NAME_RE = re.compile(PERSON_NAME)


EIGHT_DIGITS = re.compile(r"^\s*(\d{8})(?:\.0+)?\s*$")


# Years an eight-digit number must fall in to be read as a date (births and visits of living people).
DATE_YEARS = (1900, 2099)


def mask(value) -> str:
    """A stand-in that shows only how long the value was."""
    return f"[masked, {len(str(value))} characters]"


def is_eight_digit_date(text) -> bool:
    """Whether text is eight digits that read as a calendar date: YYYYMMDD, DDMMYYYY or MMDDYYYY (1900-2099)."""
    found = EIGHT_DIGITS.match(str(text))
    if found is None:
        return False
    d = found.group(1)
    for year, month, day in ((d[:4], d[4:6], d[6:]), (d[4:], d[2:4], d[:2]), (d[4:], d[:2], d[2:4])):
        if DATE_YEARS[0] <= int(year) <= DATE_YEARS[1]:
            try:
                date(int(year), int(month), int(day))
            except ValueError:
                continue
            return True
    return False


def identifier_category(value, id_column: bool = False, names: bool = True) -> str | None:
    """The Safe Harbor category a single value looks like, or None.

    Every text: the :data:`VALUE_PATTERNS` anywhere in it, a whole cell of five digits (:data:`EXACT_PATTERNS`),
    eight digits that read as a date, and two to four capitalised words (:data:`PERSON_NAME`). In an id column
    also a date with a two-digit year and any id without a digit (:data:`ID_PATTERNS`). ``names=False`` skips
    the capitalised-words rule (a category label such as "Step Up" in a column of labels).
    """
    text = str(value)
    for category, rx in COMPILED:
        if rx.search(text):
            return category
    if is_eight_digit_date(text):
        return "full date"
    if names and PERSON_NAME_RE.match(text):
        return "person name"
    if id_column:
        for category, rx in ID_COMPILED:
            if rx.search(text):
                return category
    return None


def looks_like_identifier(value) -> bool:
    """True when a single value matches any identifier shape (outside id columns)."""
    return identifier_category(value) is not None


def scrub(text: str) -> str:
    """Free text with every identifier-like fragment replaced by ``[masked]`` (for parser messages).

    Fragments are found by :data:`VALUE_PATTERNS`; names inside running text cannot be told from ordinary
    capitalised words and are not scrubbed (parser messages quote at most a short piece of a record).
    """
    return " ".join(ANY_VALUE.sub("[masked]", str(text)).split())


def shown_value(value) -> str:
    """How a value may appear in a message: masked if it looks like an identifier, control characters escaped."""
    if looks_like_identifier(value):
        return mask(value)
    return "".join(ch if ch.isprintable() else ch.encode("unicode_escape").decode("ascii") for ch in str(value))


def free_text_category(text: str) -> str | None:
    """The category of the first identifier-like fragment in a piece of free text (protocol fields), or None.

    Running text is searched for :data:`VALUE_PATTERNS` and eight-digit dates; a name inside a sentence cannot
    be told from ordinary capitalised words and is not looked for (a limit, see README).
    """
    for category, rx in COMPILED[: len(VALUE_PATTERNS)]:
        if rx.search(text):
            return category
    if any(is_eight_digit_date(word) for word in re.findall(r"\b\d{8}\b", text)):
        return "full date"
    return None
