"""The one exception hierarchy of rankfold.

Every error raised on purpose by rankfold derives from :class:`RankfoldError` and from the
built-in exception a caller would naturally catch, so ``except ValueError`` keeps working::

    RankfoldError
    +-- InvalidInputError (ValueError)          bad source, option or argument
    |   +-- EmptySourceError                    the source has no rows
    |   +-- NoNumericColumnsError               nothing to factor
    |   +-- RankTooLargeError                   rank or sample sizes exceed the table
    |   +-- UnknownOptionError (TypeError too)  a misspelled or unsupported option
    |   +-- ConditionRefusedError               a row condition that is not one plain expression
    |   +-- SizeTargetMissedError               no archive within target_bytes (carries the size)
    +-- UnknownColumnError (LookupError)        a column name the archive does not hold
    +-- RowOutOfRangeError (IndexError)         a row position or key the archive does not hold
    +-- ArchiveExistsError (FileExistsError)    refusing to replace an existing archive
    +-- ArchiveBusyError (BlockingIOError)      another write to the same archive path runs
    +-- ArchiveNotFoundError (FileNotFoundError)
    +-- CorruptArchiveError (ValueError)        manifest or checksum does not match the files
    |   +-- UnsupportedVersionError             written by an incompatible format version
    +-- SourceChangedError (RuntimeError)       the source changed between compress passes

Messages say what was wrong, with which input, and what to do about it.
"""

from __future__ import annotations

__all__ = [
    "RankfoldError",
    "InvalidInputError",
    "EmptySourceError",
    "NoNumericColumnsError",
    "RankTooLargeError",
    "UnknownOptionError",
    "ConditionRefusedError",
    "SizeTargetMissedError",
    "UnknownColumnError",
    "RowOutOfRangeError",
    "ArchiveExistsError",
    "ArchiveBusyError",
    "ArchiveNotFoundError",
    "CorruptArchiveError",
    "UnsupportedVersionError",
    "SourceChangedError",
]


class RankfoldError(Exception):
    """Root of every error that rankfold raises on purpose."""


class InvalidInputError(RankfoldError, ValueError):
    """A source, option or argument that rankfold cannot use as given."""


class EmptySourceError(InvalidInputError):
    """The source has no rows."""


class NoNumericColumnsError(InvalidInputError):
    """The source has no numeric column to factor."""


class RankTooLargeError(InvalidInputError):
    """The requested rank or sample size does not fit the table."""


class UnknownOptionError(InvalidInputError, TypeError):
    """An option name or option value that rankfold does not know."""


class ConditionRefusedError(InvalidInputError):
    """A row condition (``--where``, ``predicate :=``, ``where=``) that is not one expression
    over the allowed columns: a second statement, a subquery, a table or window function, a
    function outside the allow-list, or a column it may not use."""


class SizeTargetMissedError(InvalidInputError):
    """The archive cannot be written within ``target_bytes``. ``total`` is the size in bytes,
    every file and the manifest counted, of the smallest archive that was written (None when
    none was: the refusal came from the size model before any write)."""

    def __init__(self, message: str, total: int | None = None):
        super().__init__(message)
        self.total = total


class UnknownColumnError(RankfoldError, LookupError):
    """A column name that the archive does not hold."""

    def __str__(self) -> str:  # LookupError/KeyError would quote the message
        return str(self.args[0]) if self.args else ""


class RowOutOfRangeError(RankfoldError, IndexError):
    """A row position or key value that the archive does not hold."""


class ArchiveExistsError(RankfoldError, FileExistsError):
    """The target path exists and replacing it was not asked for."""


class ArchiveBusyError(RankfoldError, BlockingIOError):
    """Another compress, overwrite or append to the same archive path holds its write lock."""


class ArchiveNotFoundError(RankfoldError, FileNotFoundError):
    """No archive at the given path."""


class CorruptArchiveError(RankfoldError, ValueError):
    """The archive's files do not match its manifest."""


class UnsupportedVersionError(CorruptArchiveError):
    """The archive was written in a format version this rankfold cannot read."""


class SourceChangedError(RankfoldError, RuntimeError):
    """The source gave different rows in two passes of one compress run."""
