"""The classical F test of each effect, as a :class:`MethodResult`.

A thin wrapper over the exact two-way ANOVA of :mod:`audit.core`: the
interaction row is the same under SS Types I, II and III (METHODS.md
section 1), so the interaction result does not depend on a choice of SS type.
Main effects come from Type III (hypotheses on unweighted marginal means) when
every cell is filled and from Type II when some cells are empty (Type III
main-effect hypotheses are then not the usual ones; Searle 1987).

With one observation per cell (a randomised block layout) there is no
within-cell error: :func:`additive_f` gives the usual analysis of the additive
model, each main effect tested (Type II, i.e. adjusted for the other) against
the interaction mean square MS_AB = Q(A + B) / (m - rank(A + B)), which
estimates the error variance only if there is no interaction (Tukey's one-df
test in tukey.py looks for one form of it).
"""

from __future__ import annotations

from scipy import stats

from ..fit import Fit
from ..results import MethodResult
from .welch import EFFECTS, check_effect

__all__ = ["classical_f", "classical_f_all", "additive_f", "additive_f_all"]


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


ADDITIVE_NOTE = ("one observation per cell: main effects tested against the interaction mean square, "
                 "assuming no interaction (the additive model A + B); an interaction inflates that mean "
                 "square and makes these tests conservative - see Tukey's one-df test beside them")


def additive_f(fit: Fit, *, effect: str = "A") -> MethodResult:
    """Main effect F of the additive model, against the interaction mean square.

    For one observation per cell: F = (SS_eff / df_eff) / (SS_AB / df_AB),
    SS_eff the Type II sum of squares (the effect adjusted for the other main
    effect), SS_AB the additive model's residual SS on m - rank(A + B) df.  With
    replicated cells, or for effect 'AB', the result has p None and a reason.

    ``extra``: ss, df_interaction, ms_interaction.
    """
    check_effect(effect)
    mid = "additive-f"

    def none(reason, extra=None):
        return MethodResult(id=mid, effect=effect, statistic=None, statistic_name="F", p=None,
                            notes=(reason,), extra=extra or {})

    if effect == "AB":
        return none("the additive-model F tests main effects only; with one observation per cell the "
                    "interaction is looked at by Tukey's one-df test")
    if fit.anova.df_error > 0:
        return none("not applicable: the additive-model F is for one observation per cell; with replication "
                    "the main effects are tested against the within-cell error (classical-f)")
    row = fit.anova.tables["II"].row(effect)
    ab = fit.anova.tables["II"].row("AB")
    df_ab = ab.df
    if df_ab <= 0 or row.df <= 0:
        return none(f"not computed: the additive model leaves {df_ab} df for the interaction mean square "
                    f"(and {row.df} df for {effect}) in this layout; fix: more levels or replication")
    ss_ab = float(ab.ss or 0.0)
    ss = max(float(row.ss), 0.0)
    extra = {"ss": ss, "df_interaction": int(df_ab), "ms_interaction": ss_ab / df_ab}
    if ss_ab <= 1e-14 * max(ss + ss_ab, 1e-300):
        return none("not computed: the cell means are exactly additive (interaction mean square 0), so the "
                    "F ratio is undefined", extra)
    F = (ss / row.df) / (ss_ab / df_ab)
    p = float(stats.f.sf(F, row.df, df_ab))
    notes = (ADDITIVE_NOTE, f"main effect {effect} adjusted for the other main effect (Type II sums of squares)")
    return MethodResult(id=mid, effect=effect, statistic=float(F), statistic_name="F", df1=float(row.df),
                        df2=float(df_ab), p=p, notes=notes, extra=extra)


def additive_f_all(fit: Fit) -> tuple[MethodResult, ...]:
    """Additive-model F results for A and B (one observation per cell)."""
    return tuple(additive_f(fit, effect=e) for e in ("A", "B"))
