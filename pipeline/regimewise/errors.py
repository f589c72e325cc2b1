"""Error and warning classes.

A :class:`UserInputError` is something the user can fix (a malformed protocol, a bad table, a missing file).
The command-line interface prints its message as one line and exits non-zero, without a traceback unless
``--debug`` is given. Everything else is a bug and keeps its traceback.
"""

from __future__ import annotations

import errno

# How the command line and the workflow's stages begin the one line they print for a UserInputError.
ERROR_PREFIX = "regimewise error: "


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


OS_REASONS = {
    "ENOSPC": "the disk is full (no space left on device); free some space and run again",
    "EDQUOT": "the disk quota is exceeded; free some space and run again",
    "EACCES": "permission denied; choose a place you may read and write, or change its permissions",
    "EPERM": "operation not permitted; choose a place you may read and write",
    "EISDIR": "it is a directory; give a file name",
    "ENOTDIR": "a part of the path is a file, not a directory; choose another path",
    "EROFS": "the file system is read-only; choose a writable place",
    "ENOENT": "no such file or directory",
    "EEXIST": "a file is in the way (a part of the path is a file, not a folder)",
}


def os_reason(err: OSError) -> str:
    """The real cause of an operating-system error in words (disk full, permission denied, ...), one line."""
    name = errno.errorcode.get(err.errno or 0, "")
    return OS_REASONS.get(name) or (err.strerror or type(err).__name__)
