"""Error and warning classes.

A :class:`UserInputError` is something the user can fix (a malformed protocol, a bad table, a missing file).
The command-line interface prints its message as one line and exits non-zero, without a traceback unless
``--debug`` is given. Everything else is a bug and keeps its traceback.
"""

from __future__ import annotations


class UserInputError(Exception):
    """A problem the user can fix; the message says what, where and how to fix it."""


class ProtocolError(UserInputError):
    """The protocol file is malformed or inconsistent."""


class DataValidationError(UserInputError):
    """The records break the data contract; ``errors`` holds the row-level findings."""

    def __init__(self, message, errors=()):
        super().__init__(message)
        self.errors = tuple(errors)


class StatisticalWarning(UserWarning):
    """An estimate is computed but should be read with care (thin overlap, low effective sample size)."""


class ConvergenceWarning(UserWarning):
    """A model fit did not converge; the message says what was tried and how to help it."""
