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
    "ConfigError",
    "ClaimError",
    "DesignTooLargeError",
    "shorten",
    "SHOWN_TEXT",
]

#: longest piece of user text (a claim, a name, a value) echoed in an error,
#: a reason or a report, in characters; longer text is cut by :func:`shorten`
SHOWN_TEXT = 100


def shorten(text, limit: int = SHOWN_TEXT) -> str:
    """User text made safe to echo: ``repr``-free, cut to ``limit`` characters
    with an ellipsis and the total length ("abc... (123,456 characters)").

    Every place that puts text from the user (claims, column names, level
    names, cell values) into an error, a reason or a report goes through this,
    so a megabyte claim or value never turns into a megabyte message."""
    s = text if isinstance(text, str) else str(text)
    if len(s) <= limit:
        return s
    return f"{s[:max(limit - 3, 1)]}... ({len(s):,} characters)"


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


class ClaimError(OptionError):
    """A reported claim (e.g. "F(2, 54) = 4.21, p = .020") cannot be read: too long,
    malformed, or a number outside what a test can report (a p with more than 20
    significant digits, an exponent or value beyond the float range, a
    non-finite F or df)."""


class DesignTooLargeError(AuditInputError):
    """A stage would allocate more memory than its budget for this design (a
    dense matrix in the number of cells where no structured form exists).  The
    message names the design size, the stage and the option that skips it."""


class OutputError(AuditInputError):
    """An output path cannot be written safely (it is an input, a folder that is
    not ours, a symbolic link leading elsewhere, or the disk is full)."""


class ConfigError(AuditInputError):
    """A declared-audits file (``[tool.twoway-audit]`` in pyproject.toml, or a
    standalone TOML file) is malformed.  The message names the file, the audit
    and the key; the same are kept as attributes.

    Attributes
    ----------
    file : str
        The configuration file, as shown to the user.
    audit : str or None
        The audit's name (None for a problem outside every audit).
    key : str or None
        The key at fault (None when no key applies).
    """

    def __init__(self, message: str, *, file: str, audit: str | None = None, key: str | None = None):
        where = [f"{file}"]
        if audit is not None:
            where.append(f"audit {audit!r}")
        if key is not None:
            where.append(f"key {key!r}")
        super().__init__(": ".join(where) + ": " + message)
        self.file = file
        self.audit = audit
        self.key = key
