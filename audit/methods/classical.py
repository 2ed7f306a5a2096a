"""The classical F test of each effect, as a :class:`MethodResult`.

A thin wrapper over the exact two-way ANOVA of :mod:`audit.core`: the
interaction row is the same under SS Types I, II and III (METHODS.md
section 1), so the interaction result does not depend on a choice of SS type.
Main effects come from Type III (hypotheses on unweighted marginal means) when
every cell is filled and from Type II when some cells are empty (Type III
main-effect hypotheses are then not the usual ones; Searle 1987).
"""

from __future__ import annotations

from ..fit import Fit
from ..results import MethodResult
from .welch import EFFECTS, check_effect

__all__ = ["classical_f", "classical_f_all"]


def classical_f(fit: Fit, *, effect: str = "AB") -> MethodResult:
    """Classical F of one effect (pooled within-cell error).

    ``extra``: ss_type ('III' or 'II'), ss, ms, ms_error, partial_eta_sq,
    partial_eta_sq_ci, partial_omega_sq.
    """
    check_effect(effect)
    cells = fit.cells
    all_filled = cells.m == cells.J * cells.K
    ss_type = "III" if all_filled else "II"
    row = fit.anova.tables[ss_type].row(effect)
    notes = []
    if effect == "AB":
        notes.append("the interaction sum of squares is the same under SS Types I, II and III"
                     + ("" if all_filled else " (empty cells: tested on m - J - K + 1 df)"))
    elif all_filled:
        notes.append("main effect from Type III sums of squares (unweighted marginal means)")
    else:
        notes.append("main effect from Type II sums of squares: with empty cells the Type III "
                     "hypotheses on unweighted marginal means are not estimable")
    notes.append("assumes normal errors with equal variances in every cell; with unequal variances "
                 "in unequal cells the F test can be liberal or conservative (Box 1954)")
    if row.note:
        notes.append(row.note)
    extra = {
        "ss_type": ss_type,
        "ss": row.ss,
        "ms": row.ms,
        "ms_error": fit.anova.ms_error,
        "partial_eta_sq": row.partial_eta_sq,
        "partial_eta_sq_ci": list(row.partial_eta_sq_ci) if row.partial_eta_sq_ci else None,
        "partial_omega_sq": row.partial_omega_sq,
    }
    df2 = float(fit.anova.df_error) if fit.anova.df_error > 0 else None
    return MethodResult(
        id="classical-f", effect=effect, statistic=row.F, statistic_name="F",
        df1=float(row.df) if row.df > 0 else None, df2=df2 if row.F is not None else None,
        p=row.p, notes=tuple(notes), extra=extra,
    )


def classical_f_all(fit: Fit) -> tuple[MethodResult, ...]:
    """Classical F results for A, B and AB."""
    return tuple(classical_f(fit, effect=e) for e in EFFECTS)
