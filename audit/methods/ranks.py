"""Rank-based tests of the two-way effects: rank transform and aligned rank transform.

Rank transform (RT; Conover & Iman 1981): replace y by its mid-ranks and run
the classical ANOVA.  It is reported for completeness and always marked as not
valid for the interaction: with main effects present its interaction test has
inflated Type I error (Blair, Sawilowsky & Higgins 1987; Sawilowsky 1990).

Aligned rank transform (ART; Higgins & Tashtoush 1994; Wobbrock, Findlater,
Gergle & Higgins 2011): for each effect separately, aligned response = residual
from the cell mean + that effect's estimate; mid-rank; run the full factorial
ANOVA on the ranks (Type III) and read only the aligned effect.  By default the
effects are estimated as published, from marginal means of the observations
(a_j = ybar_j. - ybar, ab_jk = ybar_jk - ybar_j. - ybar_.k + ybar); the option
``alignment='cell-means'`` uses unweighted means of the cell means (the
sum-to-zero estimates), which held size better in unbalanced designs in our
simulation (DEVELOPERS.md).  The method's self-check, run every time: an ANOVA
of the aligned (unranked) responses gives F = 0, to rounding, for every effect
the alignment removes exactly (all of them in balanced designs and with the
cell-means alignment; with the published alignment in unbalanced designs the
interaction alignment keeps part of the main effects, and the check is that
the interaction SS is preserved).

Both need the raw observations (ranks are not in a summary table).  One
O(N log N) ranking per effect plus bincounts; no model refit over observations.

References
----------
.. [1] Conover, W. J. & Iman, R. L. (1981). Rank transformations as a bridge
       between parametric and nonparametric statistics. The American
       Statistician 35, 124-129.
.. [2] Blair, R. C., Sawilowsky, S. S. & Higgins, J. J. (1987). Limitations of
       the rank transform statistic in tests for interactions. Communications
       in Statistics - Simulation and Computation 16, 1133-1145.
.. [3] Higgins, J. J. & Tashtoush, S. (1994). An aligned rank transform test
       for interaction. Nonlinear World 1, 201-211.
.. [4] Wobbrock, J. O., Findlater, L., Gergle, D. & Higgins, J. J. (2011). The
       aligned rank transform for nonparametric factorial analyses using only
       ANOVA procedures. Proc. CHI 2011, 143-146.
.. [5] Leys, C. & Schumann, S. (2010). A nonparametric method to analyze
       interactions: the adjusted rank transform test. Journal of Experimental
       Social Psychology 46, 684-688.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..core import additive_cell_fit, anova_two_way, type3_main_wald
from ..design import CellStats, cells_from_observations
from ..errors import OptionError
from ..fit import Fit
from ..results import MethodResult
from .welch import EFFECTS, check_effect

__all__ = [
    "mid_ranks",
    "aligned_response",
    "aligned_mid_ranks",
    "type3_f",
    "rank_transform",
    "rank_transform_all",
    "aligned_rank_transform",
    "aligned_rank_transform_all",
]

#: self-check tolerance on the F of a non-aligned effect (rounding only)
SELF_CHECK_TOL = 1e-6

RT_REASON = ("not valid for the interaction: with main effects present the rank-transform interaction "
             "test has inflated Type I error, because ranking is a non-linear transformation that "
             "creates interaction out of main effects (Blair, Sawilowsky & Higgins 1987); reported for "
             "completeness only")

ART_CAUTIONS = (
    "ART is liberal when variances differ across cells (Leys & Schumann 2010): do not rely on it "
    "under heteroscedasticity",
    "post-hoc contrasts after ART need the ART-C procedure (Elkin et al. 2021), not contrasts on these ranks",
)


def mid_ranks(y) -> np.ndarray:
    """Mid-ranks (ties get the average rank), 1..N."""
    return stats.rankdata(np.asarray(y, dtype=float), method="average")


def aligned_mid_ranks(aligned) -> np.ndarray:
    """Mid-ranks of aligned responses, with ties restored.

    Aligned values that are equal in exact arithmetic (y - cell mean + effect,
    from different cells) can differ in the last bits of floating point, which
    would break their tie arbitrarily.  Values are snapped to a grid of
    1e-10 times the largest absolute aligned value before ranking, so such
    values tie again; genuinely distinct values closer than that are treated
    as tied (common practice for ranking computed values).
    """
    al = np.asarray(aligned, dtype=float)
    scale = float(np.max(np.abs(al))) if al.size else 0.0
    if scale == 0.0:
        return mid_ranks(al)
    return mid_ranks(np.round(al / (scale * 1e-10)))


def _cells_of(values, fit: Fit) -> CellStats:
    o = fit.obs
    return cells_from_observations(values, o.a, o.b, levels_a=o.levels_a, levels_b=o.levels_b,
                                   factors=o.factors, response=o.response)


#: the core's wording for a test without within-cell variation (audit.core)
NO_WITHIN_NOTE = ("no variation within cells (every observation equals its cell mean): the F ratio is undefined")


def type3_f(cells: CellStats) -> dict:
    """Type III F, df and p of A, B and AB (every cell filled, N > m).

    SS_A, SS_B by the Wald form on cell means with D = diag(1/n) (its O(JK)
    form, :func:`audit.core.type3_main_wald`); SS_AB from the additive model's
    between-cell residual SS (METHODS.md section 1; the core's structured solver).
    Without within-cell variation (or df) F and p are None and ``note`` says
    why, as in the core ANOVA (never an infinite F or a p of 0).
    """
    n = cells.counts.ravel().astype(float)
    ybar = cells.means.ravel()
    ybar = ybar - np.sum(n * ybar) / n.sum()
    J, K = cells.J, cells.K
    ss = {e: float(type3_main_wald(ybar, 1.0 / n, J, K, e)) for e in ("A", "B")}
    dfs = {"A": J - 1, "B": K - 1, "AB": (J - 1) * (K - 1)}
    ss["AB"] = additive_cell_fit(cells)[1]
    df_e = cells.df_within
    mse = cells.sse_within / df_e if df_e > 0 else 0.0
    # no variation: zero within-cell SS (the core's rule), or rounding next to the effects' SS
    tiny = mse <= 0 or cells.sse_within <= 1e-14 * (cells.sse_within + sum(ss.values()))
    out = {}
    for e in EFFECTS:
        df1 = dfs[e]
        if df_e <= 0 or tiny:
            out[e] = {"ss": ss[e], "df1": df1, "df2": df_e, "F": None, "p": None,
                      "note": NO_WITHIN_NOTE if df_e > 0 else
                      "no within-cell error term (one observation per cell): F and p cannot be formed"}
            continue
        F = (ss[e] / df1) / mse
        out[e] = {"ss": ss[e], "df1": df1, "df2": df_e, "F": float(F), "p": float(stats.f.sf(F, df1, df_e)),
                  "note": None}
    return out


def _no_data(mid, effect, valid=True):
    return MethodResult(id=mid, effect=effect, statistic=None, statistic_name="F", p=None,
                        valid_for_interaction=valid,
                        notes=("not computed: rank methods need the raw observations "
                               "(only cell summaries were given)",))


def rank_transform_all(fit: Fit) -> tuple[MethodResult, ...]:
    """Rank-transform F for A, B and AB (one ranking, one ANOVA).

    Type III main effects with every cell filled, Type II otherwise; every
    result has ``valid_for_interaction=False`` with the reason in ``notes``.
    """
    if fit.obs is None:
        return tuple(_no_data("rank-transform", e, valid=False) for e in EFFECTS)
    cells = _cells_of(mid_ranks(fit.obs.y), fit)
    full = cells.m == cells.J * cells.K
    ss_type = "III" if full else "II"
    if full and cells.df_within > 0:
        # fast path: Type III F from the rank cell statistics, no effect-size intervals
        rows = {e: (v["F"], v["p"], v["df1"], v["note"]) for e, v in type3_f(cells).items()}
        df_e = cells.df_within
    else:
        an = anova_two_way(cells)
        rows = {e: (an.tables[ss_type].row(e).F, an.tables[ss_type].row(e).p,
                    an.tables[ss_type].row(e).df, an.tables[ss_type].row(e).note) for e in EFFECTS}
        df_e = an.df_error
    out = []
    for e in EFFECTS:
        F, p, df1, note = rows[e]
        notes = [RT_REASON, "classical ANOVA on the mid-ranks of the response (Conover & Iman 1981), "
                            f"Type {ss_type} sums of squares"]
        if note:
            notes.insert(0, f"not computed: {note}") if F is None else notes.append(note)
        out.append(MethodResult(
            id="rank-transform", effect=e, statistic=F, statistic_name="F",
            df1=float(df1) if F is not None else None,
            df2=float(df_e) if F is not None else None, p=p,
            valid_for_interaction=False, notes=tuple(notes), extra={"ss_type": ss_type},
        ))
    return tuple(out)


def rank_transform(fit: Fit, *, effect: str = "AB") -> MethodResult:
    """Rank-transform F of one effect (always ``valid_for_interaction=False``)."""
    check_effect(effect)
    return rank_transform_all(fit)[EFFECTS.index(effect)]


#: cautions for the published alignment with unequal cell sizes [interaction, main effect]; figures
#: from benchmarks/sim_art_alignment.py (seeded, unbalanced 3 x 3, normal equal-variance errors)
UNBALANCED_ART_NOTE = (
    "unequal cell sizes: the published alignment (marginal means of the observations) leaves part of the "
    "main effects in the interaction-aligned responses; in our size simulation with main effects present "
    "its interaction test rejected a true null somewhat more often than alpha (see DEVELOPERS.md); "
    "alignment='cell-means' removes them exactly",
    "unequal cell sizes: the published alignment estimates this main effect from marginal means of the "
    "observations, which mix in the other factor's effect; in our size simulation (unbalanced 3 x 3, the "
    "other factor with an effect) this test rejected 63-72% of true nulls at alpha = 0.05, against 5% with "
    "alignment='cell-means' - do not rely on it here",
)

#: alignment estimates: the published one (marginal means of the observations) and the
#: unweighted one (marginal means of the cell means, sum-to-zero coding)
ALIGNMENTS = ("observation-means", "cell-means")


def _check_alignment(alignment: str) -> str:
    if alignment not in ALIGNMENTS:
        raise OptionError(f"alignment: expected one of {ALIGNMENTS}, found {alignment!r}; "
                          "use 'observation-means' (the published procedure)")
    return alignment


def aligned_response(fit: Fit, effect: str, *, alignment: str = "observation-means") -> np.ndarray:
    """Aligned responses for ``effect``: y - cell mean + the effect's estimate.

    ``alignment='observation-means'`` (default; Wobbrock, Findlater, Gergle &
    Higgins 2011): with ybar the grand mean of the observations, ybar_j. and
    ybar_.k the means of the observations at level j of A and level k of B,
    a_j = ybar_j. - ybar, b_k = ybar_.k - ybar,
    ab_jk = ybar_jk - ybar_j. - ybar_.k + ybar.

    ``alignment='cell-means'``: the same with unweighted means of the cell means
    (sum-to-zero coding), the estimates of the Type III hypotheses.  The two
    agree in balanced designs.  Needs every cell filled.
    """
    check_effect(effect)
    _check_alignment(alignment)
    cells = fit.cells
    cm = cells.means
    if alignment == "cell-means":
        mu = cm.mean()
        row = cm.mean(axis=1)
        col = cm.mean(axis=0)
    else:
        n = cells.counts.astype(float)
        mu = float(np.sum(n * cm) / n.sum())
        row = np.sum(n * cm, axis=1) / n.sum(axis=1)
        col = np.sum(n * cm, axis=0) / n.sum(axis=0)
    a = row - mu
    b = col - mu
    est = {"A": np.repeat(a[:, None], cm.shape[1], axis=1),
           "B": np.repeat(b[None, :], cm.shape[0], axis=0),
           "AB": cm - row[:, None] - col[None, :] + mu}[effect]
    return fit.resid_full + est.ravel()[fit.obs.cell]


def _none_art(effect, reason, extra=None):
    return MethodResult(id="aligned-rank-transform", effect=effect, statistic=None, statistic_name="F", p=None,
                        notes=(reason,), extra=extra or {})


def aligned_rank_transform(fit: Fit, *, effect: str = "AB", alignment: str = "observation-means") -> MethodResult:
    """Aligned-rank-transform F of one effect, with the alignment self-check.

    Parameters
    ----------
    fit : Fit
    effect : 'A', 'B' or 'AB'
    alignment : 'observation-means' (default, the published procedure) or 'cell-means'
        How the effects are estimated for the alignment (see :func:`aligned_response`).

    ``extra``: ss_type 'III', alignment, ``self_check`` = {'passed': bool,
    'f_other': {effect: F on the aligned unranked responses},
    'max_f_other': float, 'expected_zero': [effects whose F must be 0],
    'tolerance': float}.  The self-check: the F of a non-aligned effect on the
    aligned (unranked) responses is 0 to rounding where the alignment removes
    it exactly - every effect in a balanced design; A and B under the A or B
    alignment always; with unequal cell sizes the published interaction
    alignment leaves part of the main effects (reported, not failed), and the
    check is then that the interaction SS of the aligned responses equals that
    of the data.
    """
    check_effect(effect)
    _check_alignment(alignment)
    mid = "aligned-rank-transform"
    if fit.obs is None:
        return _no_data(mid, effect)
    fit = fit.standardised()   # exact power-of-two scale: the self-check's squares stay in range at every scale
    cells = fit.cells
    if cells.m < cells.J * cells.K:
        empty = [cells.cell_label(j, k) for j, k in zip(*np.nonzero(cells.counts == 0))]
        return _none_art(effect, "not computed: the aligned rank transform here reads a full factorial ANOVA "
                                 f"on the ranks, which needs every cell filled (empty: {', '.join(empty[:8])}); "
                                 "fix: use the Welch-James, HC3 or permutation tests, which test the "
                                 "estimable interaction contrasts")
    if cells.df_within == 0:
        return _none_art(effect, "not computed: one observation per cell leaves no within-cell error "
                                 "term for the ANOVA on ranks")
    al = aligned_response(fit, effect, alignment=alignment)
    # self-check of the method's authors: ANOVA on the aligned, unranked responses
    chk = type3_f(_cells_of(al, fit))
    if chk[effect]["F"] is None:
        return _none_art(effect, f"not computed: {chk[effect]['note']}", {"alignment": alignment})
    others = {e: chk[e]["F"] for e in EFFECTS if e != effect}
    balanced = bool(np.all(cells.counts == cells.counts.flat[0]))
    exact = [e for e in others if balanced or alignment == "cell-means" or effect != "AB"]
    tol_f = SELF_CHECK_TOL * max(1.0, chk[effect]["F"])
    max_other = max(others.values())
    passed = all(others[e] < tol_f for e in exact)
    if effect == "AB" and not exact:
        # the alignment adds an additive term to every cell mean: the interaction SS is unchanged
        ss_data = type3_f(cells)[effect]["ss"]
        passed = bool(abs(chk["AB"]["ss"] - ss_data) <= 1e-8 * max(ss_data, chk["AB"]["ss"], 1e-300))
    res = type3_f(_cells_of(aligned_mid_ranks(al), fit))[effect]
    check_note = ("alignment self-check: ANOVA on the aligned (unranked) responses gives F = "
                  + ", ".join(f"{v:.2g} for {k}" for k, v in others.items()))
    if not passed:
        check_note += " - NOT as it should be: the alignment failed, do not use this result"
    elif len(exact) == len(others):
        check_note += " (zero to rounding, as it should)"
    else:
        check_note += (" - with unequal cell sizes the published alignment (marginal means of the "
                       "observations) leaves part of the main effects in the interaction-aligned responses; "
                       "the interaction SS is preserved exactly, as it should")
    notes = [f"aligned for {effect} ({'marginal means of the observations, as published' if alignment == 'observation-means' else 'unweighted marginal means of the cell means'}), "
             f"mid-ranked, full factorial ANOVA on the ranks (Type III); only the {effect} row is read",
             check_note, *ART_CAUTIONS]
    if not balanced and alignment == "observation-means":
        notes.append(UNBALANCED_ART_NOTE[effect != "AB"])
    extra = {"ss_type": "III", "alignment": alignment,
             "self_check": {"passed": passed, "f_other": others, "max_f_other": max_other,
                            "expected_zero": exact, "tolerance": SELF_CHECK_TOL}}
    if not passed:
        return MethodResult(id=mid, effect=effect, statistic=None, statistic_name="F", p=None,
                            notes=tuple(notes), extra=extra)
    if res["F"] is None:
        return MethodResult(id=mid, effect=effect, statistic=None, statistic_name="F", p=None,
                            notes=(f"not computed: on the aligned ranks, {res['note']}", *notes), extra=extra)
    return MethodResult(id=mid, effect=effect, statistic=res["F"], statistic_name="F", df1=float(res["df1"]),
                        df2=float(res["df2"]), p=res["p"], notes=tuple(notes), extra=extra)


def aligned_rank_transform_all(fit: Fit, *, alignment: str = "observation-means") -> tuple[MethodResult, ...]:
    """ART results for A, B and AB (one alignment and ranking each)."""
    return tuple(aligned_rank_transform(fit, effect=e, alignment=alignment) for e in EFFECTS)
