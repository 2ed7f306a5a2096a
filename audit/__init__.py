"""twoway-audit: check whether a two-way ANOVA interaction conclusion holds up.

Public API
----------
check(data, response=..., factors=(a, b), alpha=0.05) -> Findings
check_summary(table, factors=(a, b), mean=, sd=, n=) -> Findings
Findings : the findings type (``to_dict()``, ``to_json()``)
AuditInputError : base of the typed input errors
"""

__version__ = "0.1.0"

from .api import check, check_summary  # noqa: E402
from .errors import AuditInputError  # noqa: E402
from .findings import Findings  # noqa: E402

__all__ = ["check", "check_summary", "Findings", "AuditInputError", "__version__"]
