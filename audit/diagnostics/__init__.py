"""Stage 4a of the flow: assumption and design diagnostics (graded findings).

Each diagnostic is a pure function of a :class:`~audit.fit.Fit` returning one
:class:`~audit.results.Diagnostic` (``id``, ``severity``, ``summary``,
``values``).  Severity is graded by size as well as by p-value; the grading
rules are written in each module's docstring and in DEVELOPERS.md.

=============  =====================  =====================================
id             module                 what it looks at
=============  =====================  =====================================
normality      assumptions.py         full-model residuals
homogeneity    assumptions.py         spread across cells, pairing with n
balance        design_checks.py       cell counts, empty and small cells
missingness    design_checks.py       rows dropped per cell
outliers       influence.py           studentized deleted residuals, Cook's D
influence      influence.py           interaction p with each row left out
fragility      influence.py           deletions that flip the decision
shape          scale.py               ordinal or crossover interaction
scale          scale.py               log and Box-Cox re-tests
independence   design_checks.py       run order, repeated units, duplicates
=============  =====================  =====================================
"""

from __future__ import annotations

from ..fit import Fit
from ..results import Diagnostic

__all__ = ["run_diagnostics", "DIAGNOSTIC_IDS"]

DIAGNOSTIC_IDS = ("normality", "homogeneity", "balance", "missingness", "outliers", "influence",
                  "fragility", "shape", "scale", "independence")


def run_diagnostics(fit: Fit) -> tuple[Diagnostic, ...]:
    """Run every diagnostic on ``fit``, in the order of :data:`DIAGNOSTIC_IDS`."""
    from .assumptions import homogeneity, normality
    from .design_checks import balance, independence, missingness
    from .influence import fragility, influence, outliers
    from .scale import scale, shape

    return tuple(fn(fit) for fn in (normality, homogeneity, balance, missingness, outliers, influence,
                                    fragility, shape, scale, independence))
