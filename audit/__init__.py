"""twoway-audit: check whether a two-way ANOVA interaction conclusion holds up.

Public API
----------
check(data, response=..., factors=(a, b), alpha=0.05) -> Findings
check_summary(table, factors=(a, b), mean=, sd=, n=) -> Findings
Findings : the findings type (``to_dict()``, ``to_json()``)
AuditInputError : base of the typed input errors
"""

__version__ = "0.1.0"

from .errors import AuditInputError  # noqa: E402

__all__ = ["check", "check_summary", "Findings", "AuditInputError", "__version__"]

# The numerical modules load on first use, so the command line starts quickly
# and installs its interrupt handling before any heavy import.
_LAZY = {"check": "api", "check_summary": "api", "Findings": "findings"}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
