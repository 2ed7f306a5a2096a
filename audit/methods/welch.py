"""Welch-type tests of the two-way effects on cell means (Johansen 1980).

For a hypothesis C mu = 0 on the cell means (C of rank r, cells j-major):

    S = diag(s2_jk / n_jk),  T = (C ybar)' (C S C')^-1 (C ybar),
    A = sum_jk R_jk,jk^2 / f_jk  with R = S C' (C S C')^-1 C, f_jk = n_jk - 1,
    c = r + 2A - 6A / (r + 2),   T / c ~ F(r, r (r + 2) / (3A)).

With one factor this is Welch's (1951) heteroscedastic one-way ANOVA; for a
2 x 2 interaction it is the Welch-Satterthwaite t^2 of the interaction
contrast; T is the HC2 Wald chi-square of C mu = 0 in the saturated
cell-means regression.  The trimmed version (Wilcox; Keselman, Wilcox & Lix
2003) replaces means by gamma-trimmed means, s2/n by
d_jk = (n_jk - 1) s2_w,jk / (h_jk (h_jk - 1)) (s2_w the Winsorized variance,
h_jk = n_jk - 2 floor(gamma n_jk)) and f_jk by h_jk - 1.

Everything here works from cell statistics, so the untrimmed test also runs in
summary mode (cell means, SDs and sizes only).  :func:`welch_james_cells`
accepts a leading batch axis for the resampling engine.

References
----------
.. [1] Johansen, S. (1980). The Welch-James approximation to the distribution
       of the residual sum of squares in a weighted linear regression.
       Biometrika 67, 85-92.
.. [2] Welch, B. L. (1951). On the comparison of several mean values: an
       alternative approach. Biometrika 38, 330-336.
.. [3] Keselman, H. J., Wilcox, R. R. & Lix, L. M. (2003). A generally robust
       approach to hypothesis testing in independent and correlated groups
       designs. Psychophysiology 40, 586-596.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..core import Type3Contrast
from ..errors import OptionError
from ..fit import Fit
from ..results import MethodResult
from .wald import wald_and_a

__all__ = [
    "EFFECTS",
    "welch_james_cells",
    "trimmed_cell_stats",
    "welch_james",
    "welch_james_trimmed",
    "welch_james_all",
    "welch_james_trimmed_all",
    "effect_contrast",
    "estimable_contrast",
]

EFFECTS = ("A", "B", "AB")


def check_effect(effect: str) -> str:
    """Validate an effect name ('A', 'B' or 'AB')."""
    if effect not in EFFECTS:
        raise OptionError(f"effect: expected one of {EFFECTS}, found {effect!r}; use 'AB' for the interaction")
    return effect


def effect_contrast(cells, effect: str) -> np.ndarray:
    """C_A, C_B or C_AB on the J*K cells (j-major), sum-to-zero hypotheses on
    unweighted marginal means (METHODS.md section 1), kept by structure
    (:class:`audit.core.Type3Contrast`; ``numpy.asarray`` gives the matrix)."""
    return Type3Contrast(cells.J, cells.K, check_effect(effect))


def empty_cell_labels(cells) -> list[str]:
    """Labels ('a2 x b1') of the empty cells, j-major."""
    return [cells.cell_label(j, k) for j, k in zip(*np.nonzero(cells.counts == 0))]


def estimable_contrast(cells, effect: str) -> tuple[np.ndarray | None, np.ndarray, str | None]:
    """Hypothesis matrix of ``effect`` on the filled cells, the filled-cell mask, or a reason.

    Every cell filled: the Type III contrasts C_A, C_B, C_AB.  With empty cells
    the interaction is tested on its estimable part: the contrasts of the filled
    cell means orthogonal to the additive model (the null space of the additive
    design restricted to the filled cells, m - rank(A + B) rows), the same
    hypothesis as the classical interaction F and the resampling methods
    (:func:`audit.methods.resampling.effect_hypothesis`).  Main effects (Type III,
    unweighted marginal means) need every cell: None and a reason naming the
    empty cells and the fix.

    Returns
    -------
    C : ndarray (r, m) or None
        Rows on the filled cells (j-major order of the filled cells).
    filled : ndarray of bool (J*K,)
    reason : str or None
    """
    from .resampling import effect_hypothesis

    check_effect(effect)
    filled = cells.counts.ravel() > 0
    C, reason = effect_hypothesis(cells, effect)
    if C is not None:
        return (C if isinstance(C, Type3Contrast) else np.asarray(C, dtype=float)), filled, None
    empty = empty_cell_labels(cells)
    where = f"{len(empty)} empty cell(s): {', '.join(empty[:8])}" + (" ..." if len(empty) > 8 else "")
    if effect == "AB":
        return None, filled, (f"not computed: with these empty cells no interaction contrast is estimable "
                              f"(m - rank(A + B) = 0; {where}); fix: collect observations in some of these "
                              "cells so that a filled 2 x 2 sub-table forms")
    return None, filled, (f"not computed: the Type III hypothesis of main effect {effect} compares unweighted "
                          f"marginal means, which need every cell filled ({where}); fix: read the interaction "
                          "(tested on its estimable contrasts) and the classical Type II main effect, or collect "
                          "observations in these cells (or drop a level so every cell is filled)")


def welch_james_cells(means, variances, counts, C, *, dfs=None):
    """Johansen's Welch-James test of C mu = 0 from cell statistics.

    Parameters
    ----------
    means : ndarray, shape (..., m)
        Cell means (a leading batch axis is allowed, e.g. one row per resample).
    variances : ndarray, shape (..., m)
        The squared standard errors' numerators: cell variances s2_jk (ddof 1),
        so that S = diag(variances / counts).  For the trimmed test pass
        ``variances = d_jk * counts`` (see :func:`trimmed_cell_stats`).
    counts : ndarray, shape (m,) or (..., m)
        Cell sizes n_jk.
    C : ndarray, shape (r, m)
        Full-row-rank hypothesis matrix.
    dfs : ndarray, optional
        Per-cell degrees of freedom f_jk used in A; default ``counts - 1``
        (``h_jk - 1`` for trimmed means).

    Returns
    -------
    T, A, c, df2 : ndarray, shape (...)
        The Wald statistic, Johansen's A, the scale c = r + 2A - 6A/(r+2) and the
        denominator df r(r+2)/(3A).  The test statistic T/c is referred to
        F(r, df2).

    Notes
    -----
    No validation is done here (the function sits inside resampling loops):
    the callers make sure every cell has f_jk >= 1 and S C' is of full rank.
    """
    if not isinstance(C, Type3Contrast):
        C = np.asarray(C, dtype=float)
    counts = np.asarray(counts, dtype=float)
    v = np.asarray(variances, dtype=float) / counts
    f = counts - 1.0 if dfs is None else np.asarray(dfs, dtype=float)
    r = C.shape[0]
    T, A = wald_and_a(means, v, f, C)
    c = r + 2.0 * A - 6.0 * A / (r + 2.0)
    with np.errstate(divide="ignore"):
        df2 = r * (r + 2.0) / (3.0 * A)
    return T, A, c, df2


def trimmed_cell_stats(y, cell, m: int, *, gamma: float = 0.2):
    """Trimmed means, Winsorized variances and effective sizes per cell.

    Parameters
    ----------
    y : ndarray (N,)
    cell : ndarray of int (N,)
        Cell index of each observation (0 .. m-1).
    m : int
        Number of cells.
    gamma : float
        Proportion trimmed from each tail (0 <= gamma < 0.5).

    Returns
    -------
    tmean, wvar, counts, h : ndarray (m,)
        gamma-trimmed mean, gamma-Winsorized variance (ddof 1), n_jk and
        h_jk = n_jk - 2 floor(gamma n_jk).  Cells with too few values hold NaN.

    One sort over all observations (by cell, then value) and bincounts; no loop
    over cells.
    """
    if not (0.0 <= gamma < 0.5):
        raise OptionError(f"gamma: expected a trimming proportion in [0, 0.5), found {gamma!r}; try 0.2")
    y = np.asarray(y, dtype=float)
    cell = np.asarray(cell, dtype=np.int64)
    order = np.lexsort((y, cell))
    ys, cs = y[order], cell[order]
    n = np.bincount(cs, minlength=m)
    start = np.concatenate([[0], np.cumsum(n)[:-1]])
    pos = np.arange(ys.size) - start[cs]                     # rank within cell, 0-based
    g = np.floor(gamma * n + 1e-12).astype(np.int64)          # guard 0.2*5 = 1 exactly
    h = n - 2 * g
    keep = (pos >= g[cs]) & (pos < (n - g)[cs])
    with np.errstate(invalid="ignore", divide="ignore"):
        tmean = np.bincount(cs[keep], weights=ys[keep], minlength=m) / h
        # Winsorize: clip to the (g+1)-th smallest and (g+1)-th largest value of the cell
        ok = h >= 1
        lo_idx = np.where(ok, start + g, 0)
        hi_idx = np.where(ok, start + n - 1 - g, 0)
        lo = ys[lo_idx] if ys.size else np.zeros(m)
        hi = ys[hi_idx] if ys.size else np.zeros(m)
        w = np.clip(ys, lo[cs], hi[cs])
        wmean = np.bincount(cs, weights=w, minlength=m) / n
        d = w - wmean[cs]
        wmean = wmean + np.bincount(cs, weights=d, minlength=m) / n   # two-pass correction
        d = w - wmean[cs]
        wvar = np.bincount(cs, weights=d * d, minlength=m) / (n - 1)
    tmean = np.where(h >= 1, tmean, np.nan)
    wvar = np.where(n >= 2, wvar, np.nan)
    return tmean, wvar, n, h


def _degenerate(method_id: str, effect: str, reason: str, name: str = "T/c", extra=None) -> MethodResult:
    return MethodResult(id=method_id, effect=effect, statistic=None, statistic_name=name, df1=None, df2=None,
                        p=None, notes=(reason,), extra=extra or {})


def _cells_problem(cells, need: int, what: str) -> str | None:
    """Reason when a filled cell has fewer than ``need`` observations (empty cells
    are handled by :func:`estimable_contrast`)."""
    counts = cells.counts
    small = (counts > 0) & (counts < need)
    if small.any():
        lab = [f"{cells.cell_label(j, k)} (n = {counts[j, k]})" for j, k in zip(*np.nonzero(small))]
        return (f"not computed: {what} needs n >= {need} in every filled cell, found {len(lab)} smaller cell(s): "
                f"{', '.join(lab[:5])}; fix: collect more observations there, or use the classical F "
                "(pooled error) for these cells")
    return None


#: note for welch-james (and the trimmed test) when a filled cell has n <= 3
SMALL_CELL_NOTE = ("Welch-James runs liberal in very small cells: {cells} ha{s} n <= 3, where each cell "
                   "variance rests on 1-2 df; read p with caution and compare the studentized permutation")


#: note for the wild bootstrap when a filled cell has n <= 3
WILD_SMALL_CELL_NOTE = ("wild bootstrap at its limits in cells of 2-3 observations: sign flips swap each "
                        "cell's spread and mean deviation ({cells}); read p with caution")


def small_cell_note(cells, limit: int = 3, template: str = SMALL_CELL_NOTE) -> str | None:
    """A note naming the filled cells with n <= ``limit`` (None when there are none)."""
    counts = cells.counts
    small = (counts > 0) & (counts <= limit)
    if not small.any():
        return None
    lab = [f"{cells.cell_label(j, k)} (n = {counts[j, k]})" for j, k in zip(*np.nonzero(small))]
    more = f" and {len(lab) - 5} more" if len(lab) > 5 else ""
    return template.format(cells=", ".join(lab[:5]) + more, s="ve" if len(lab) > 1 else "s")


def _result_from_core(method_id, effect, T, A, c, df2, r, notes, extra) -> MethodResult:
    T, A, c, df2 = float(T), float(A), float(c), float(df2)
    if not (np.isfinite(T) and np.isfinite(A) and np.isfinite(df2) and c > 0):
        return _degenerate(method_id, effect,
                           "not computed: the cell variances leave the contrast covariance singular "
                           "(zero variance in the cells this effect compares)", extra=extra)
    stat = T / c
    p = float(stats.f.sf(stat, r, df2))
    extra = {**extra, "T": T, "A": A, "c": c}
    return MethodResult(id=method_id, effect=effect, statistic=stat, statistic_name="T/c", df1=float(r),
                        df2=df2, p=p, notes=tuple(notes), extra=extra)


def _solve_safely(fn):
    try:
        with np.errstate(all="ignore"):
            return fn()
    except np.linalg.LinAlgError:
        return None


_HYP_NOTE = {
    "A": "main effect A tested on unweighted marginal means (Type III hypothesis)",
    "B": "main effect B tested on unweighted marginal means (Type III hypothesis)",
    "AB": "interaction tested on all (J-1)(K-1) interaction contrasts of the cell means",
}


def _hyp_note(effect: str, r: int, filled) -> str:
    """What the hypothesis is; with empty cells, the estimable interaction contrasts."""
    if effect == "AB" and not np.all(filled):
        return (f"empty cells: interaction tested on its {r} estimable contrast(s) of the filled cell means "
                "(those orthogonal to the additive model A + B over the filled cells), the hypothesis of the "
                "classical interaction F")
    return _HYP_NOTE[effect]


def welch_james(fit: Fit, *, effect: str = "AB") -> MethodResult:
    """Welch-James (Johansen 1980) approximate-df test of one effect.

    Needs n_jk >= 2 in every filled cell; works from cell statistics only
    (summary mode too).  With empty cells the interaction is tested on its
    estimable contrasts (:func:`estimable_contrast`); main effects then get a
    reason.  ``extra`` holds T (the HC2 Wald chi-square), A, c.
    """
    check_effect(effect)
    cells = fit.cells.standardised()   # exact power-of-two scale: same statistic at every data scale
    C, filled, reason = estimable_contrast(cells, effect)
    reason = reason or _cells_problem(cells, 2, "the Welch-James test")
    if reason:
        return _degenerate("welch-james", effect, reason)
    var = cells.variances.ravel()[filled]
    if not (var > 0).any():
        return _degenerate("welch-james", effect, "not computed: every cell has zero variance")
    out = _solve_safely(lambda: welch_james_cells(cells.means.ravel()[filled], var, cells.counts.ravel()[filled], C))
    if out is None:
        return _degenerate("welch-james", effect,
                           "not computed: the cell variances leave the contrast covariance singular "
                           "(zero variance in the cells this effect compares)")
    notes = [_hyp_note(effect, C.shape[0], filled),
             "allows unequal cell variances; the df approximation can be liberal when cells are very "
             "small (n < 6 or so, common practice) - read it with the cell sizes in view"]
    small = small_cell_note(cells)
    if small:
        notes.append(small)
    return _result_from_core("welch-james", effect, *out, C.shape[0], notes, {"gamma": 0.0})


def welch_james_trimmed(fit: Fit, *, effect: str = "AB", gamma: float = 0.2, _stats=None) -> MethodResult:
    """Welch-James test on gamma-trimmed means with Winsorized variances.

    Needs the raw data (trimmed means are not in a summary table) and
    h_jk = n_jk - 2 floor(gamma n_jk) >= 2 in every filled cell; with empty
    cells the interaction is tested on its estimable contrasts.
    ``extra`` holds T, A, c, gamma and the smallest h_jk.
    """
    check_effect(effect)
    mid = "welch-james-trimmed"
    cells = fit.cells
    if fit.obs is None:
        return _degenerate(mid, effect, "not computed: trimmed means need the raw observations "
                                        "(only cell summaries were given)", extra={"gamma": gamma})
    C, filled, reason = estimable_contrast(cells, effect)
    reason = reason or _cells_problem(cells, 2, "the trimmed Welch-James test")
    if reason:
        return _degenerate(mid, effect, reason, extra={"gamma": gamma})
    m = cells.J * cells.K
    unit = cells.standardised().unit   # exact power of two: squares stay in range at every data scale
    if _stats is None:       # computed once for all effects by welch_james_trimmed_all
        _stats = _trimmed_stats(fit, gamma)
    tmean, wvar, n, h = _stats
    bad_h = filled & (h < 2)
    if bad_h.any():
        bad = [f"{cells.cell_label(i // cells.K, i % cells.K)} (n = {n[i]}, h = {h[i]})"
               for i in np.nonzero(bad_h)[0]]
        return _degenerate(mid, effect,
                           f"not computed: after trimming {gamma:.0%} from each tail a cell keeps fewer than 2 "
                           f"values (h_jk >= 2 needed): {', '.join(bad[:5])}; fix: a smaller gamma, or "
                           "the untrimmed Welch-James test", extra={"gamma": gamma})
    tmean, wvar, n, h = tmean[filled], wvar[filled], n[filled], h[filled]
    d = (n - 1) * wvar / (h * (h - 1.0))                  # squared standard error of the trimmed mean
    if not (d > 0).any():
        return _degenerate(mid, effect, "not computed: every cell has zero Winsorized variance",
                           extra={"gamma": gamma})
    out = _solve_safely(lambda: welch_james_cells(tmean, d * n, n, C, dfs=h - 1.0))
    if out is None:
        return _degenerate(mid, effect, "not computed: the Winsorized variances leave the contrast "
                                        "covariance singular", extra={"gamma": gamma})
    notes = [_hyp_note(effect, C.shape[0], filled).replace("marginal means", "marginal trimmed means").replace(
                 "of the cell means", "of the trimmed cell means"),
             f"{gamma:.0%} trimmed means with Winsorized variances: tests trimmed population means, "
             "not means; resistant to heavy tails and outliers, allows unequal variances"]
    small = small_cell_note(cells)
    if small:
        notes.append(small)
    tm_full = np.full(m, np.nan)
    tm_full[filled] = tmean * unit + cells.offset
    extra = {"gamma": float(gamma), "min_h": int(h.min()),
             "trimmed_means": [[None if not np.isfinite(x) else float(x) for x in row]
                               for row in tm_full.reshape(cells.J, cells.K)]}
    return _result_from_core(mid, effect, *out, C.shape[0], notes, extra)


def welch_james_all(fit: Fit) -> tuple[MethodResult, ...]:
    """Welch-James results for A, B and AB."""
    return tuple(welch_james(fit, effect=e) for e in EFFECTS)


def _trimmed_stats(fit: Fit, gamma: float):
    cells = fit.cells
    unit = cells.standardised().unit   # exact power of two: squares stay in range at every data scale
    return trimmed_cell_stats(fit.obs.y / unit, fit.obs.cell, cells.J * cells.K, gamma=gamma)


def welch_james_trimmed_all(fit: Fit, *, gamma: float = 0.2) -> tuple[MethodResult, ...]:
    """Trimmed Welch-James results for A, B and AB (the trimmed cell statistics, one sort
    of all observations, computed once for the three)."""
    stats = None
    if fit.obs is not None and 0.0 <= gamma < 0.5:
        stats = _trimmed_stats(fit, gamma)
    return tuple(welch_james_trimmed(fit, effect=e, gamma=gamma, _stats=stats) for e in EFFECTS)
