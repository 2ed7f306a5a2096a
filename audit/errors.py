"""Typed errors raised at the edge of the auditor.

Every error names the column or option at fault, what was expected, what was
found and how to fix it, in one sentence.  The command-line interface prints
``str(error)`` on one line and exits with status 2; library users can catch
:class:`AuditInputError` (or one of its subclasses) to handle bad input.
"""

from __future__ import annotations

__all__ = [
    "AuditInputError",
    "DataFileError",
    "ColumnError",
    "ResponseError",
    "FactorError",
    "OptionError",
    "OutputError",
]


class AuditInputError(ValueError):
    """Base class: the input (data or options) cannot be audited as given."""


class DataFileError(AuditInputError):
    """The data file is missing, unreadable or of an unsupported format."""


class ColumnError(AuditInputError):
    """A named column does not exist, or columns were named inconsistently."""


class ResponseError(AuditInputError):
    """The response column is unusable (non-numeric, infinite, constant, ...)."""


class FactorError(AuditInputError):
    """A factor column is unusable (one level, too few observations, ...)."""


class OptionError(AuditInputError):
    """An option has a value outside its allowed range."""


class OutputError(AuditInputError):
    """An output path cannot be written safely (it is an input, a folder that is
    not ours, a symbolic link leading elsewhere, or the disk is full)."""
