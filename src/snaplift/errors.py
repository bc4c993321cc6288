"""One error hierarchy for everything a user can get wrong.

Every message gives the requirement, the value found and, where there is one, the fix:
``archive field 'p' not found in wake.h5; fields present: u, v, w``.
The command line prints ``str(error)`` on one line and exits non-zero, never a traceback.
"""

from __future__ import annotations

__all__ = [
    "SnapliftError",
    "ArchiveError",
    "ArchiveFormatError",
    "FieldNotFoundError",
    "NonFiniteError",
    "TimeSpacingError",
    "ConfigError",
    "ResultStoreError",
    "FitError",
    "one_line",
]

#: longest error message printed (characters); longer ones are cut with a note
MESSAGE_LIMIT = 2000


def one_line(message: object, limit: int = MESSAGE_LIMIT) -> str:
    """``message`` as one line of at most ``limit`` characters (what the command line prints).

    Example
    -------
    >>> one_line("two\nlines")
    'two lines'
    """
    text = " ".join(str(message).split())
    return text if len(text) <= limit else f"{text[:limit]}... ({len(text) - limit} more characters)"


class SnapliftError(ValueError):
    """Base class of all errors caused by user input (files, configuration, options)."""


class ArchiveError(SnapliftError):
    """An archive cannot be read as requested."""


class ArchiveFormatError(ArchiveError):
    """No reader can open a path, or its content is not what a reader expects."""


class FieldNotFoundError(ArchiveError, KeyError):
    """A requested field or dataset is not in the archive."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


class NonFiniteError(ArchiveError):
    """NaN or Inf found in data that is not masked."""


class ArchiveChangedError(ArchiveError):
    """A block of the archive read again differs from an earlier read of it (checksum)."""


class TimeSpacingError(ArchiveError):
    """Snapshot times are not uniformly spaced where the method needs them to be."""


class ConfigError(SnapliftError):
    """A workflow file or option is invalid."""


class ResultStoreError(SnapliftError):
    """A result store is missing, incomplete, or belongs to another workflow."""


class FitError(SnapliftError):
    """A fit cannot be done with the data and settings given."""
