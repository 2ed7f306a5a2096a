"""Diagnostics of the distributional assumptions: normality and homogeneity.

Each function takes a :class:`audit.fit.Fit` and returns a
:class:`audit.results.Diagnostic` whose ``id`` is the function name.  Nothing
is refitted: residuals come from the fit, and the variance tests work on the
cell groups with ``np.bincount`` (Bartlett, the SD ratio and the size/variance
pairing need only the cell statistics, so they also work in summary mode).

Residuals of the cell-means model are not independent (they sum to zero in
each cell and carry N - m df), so normality tests on them are approximate, as
is usual practice; they test the pooled residual distribution, which a mixture
of unequal cell variances also makes heavy-tailed.

Severity is graded by the *size* of a departure, not by p alone: with large N a
trivial departure is "significant", with small N a large one is not.

Grading rules
-------------
normality (full-model residuals; cells with n = 1 left out, their residual is 0
by construction).  G1 = adjusted sample skewness, G2 = adjusted excess
kurtosis (Joanes & Gill 1998, the estimators with the exact standard errors
below).  Size bands:

========== ======================================= ===============================
band       rule                                    source
========== ======================================= ===============================
small      |G1| < 0.5 and |G2| < 1                 Bulmer 1979 ("approximately
                                                   symmetric"); kurtosis bound:
                                                   common practice
moderate   |G1| < 1 and |G2| < 3                   Bulmer 1979 (skew 0.5-1
                                                   "moderately skewed"); common
                                                   practice
large      |G1| < 2 and |G2| < 7                   West, Finch & Curran 1995
severe     |G1| >= 2 or |G2| >= 7                  West, Finch & Curran 1995
========== ======================================= ===============================

severity: small -> ok (even when a test rejects: detectable but trivially
small); moderate -> note; large -> warning; severe -> serious.  No test
rejects at 0.05 and the band is small or moderate -> ok, but "note" when fewer
than 20 residuals (the tests have little power; common practice).  When every
cell used has n >= 30 the severity is lowered one step (the cell means are
close to normal by the central limit theorem, so the interaction F keeps its
level; heavy tails still cost power) - common practice, consistent with the
robustness results reviewed by Glass, Peckham & Sanders 1972.
Per-cell Shapiro-Wilk is reported only for cells with 8 <= n <= 5000
(common practice: below 8 a per-cell test has almost no power); it is
informative only and does not change the severity.

homogeneity (cells with n >= 2).  r_sd = largest / smallest cell SD, r_n =
largest / smallest cell size, rho = Spearman correlation of cell size with
cell variance.  The pairing is "marked" when r_n >= 1.5 and |rho| >= 0.5
(common practice).

=========================== ======================= ==========================
condition                   severity                source
=========================== ======================= ==========================
r_n < 1.5, r_sd <= 2        ok                      Box 1954 (equal n: F robust
                                                    to variance ratios ~1:3);
                                                    METHODS.md 8 ("above 2")
r_n < 1.5, 2 < r_sd <= 3    note                    common practice
r_n < 1.5, r_sd > 3         warning                 common practice
r_n >= 1.5, r_sd <= 1.5     ok                      common practice
r_n >= 1.5, 1.5 < r_sd <= 2 note; warning if the    Box 1954; Glass, Peckham &
                            pairing is negative     Sanders 1972
r_n >= 1.5, r_sd > 2        serious if negative     Box 1954; Glass, Peckham &
                            pairing (liberal F),    Sanders 1972
                            else warning
=========================== ======================= ==========================

When r_sd is no larger than the 95% quantile of the SD ratio that equal
variances would give with these cell sizes (``sd_ratio_null_95``, Hartley's
1950 F-max generalised to unequal cells by simulation), the severity is lowered
one step: small cells make the observed ratio noisy.  A Brown-Forsythe
p < 0.05 lifts "ok" to "note" (detectable but small).  The
direction: large variances in small cells make the classical F liberal (too
many false interactions), large variances in large cells make it conservative
(Box 1954; Glass, Peckham & Sanders 1972).  ``f_bias_ratio`` makes this
concrete for the interaction test: E[MS_AB] / E[MS_E] under H0 with the cell
variances plugged in (the moment argument of Box 1954); 1 means unbiased,
above 1 liberal, below 1 conservative.

Brown-Forsythe (the median-centred Levene test, Brown & Forsythe 1974) and
Fligner-Killeen are the robust tests (Conover, Johnson & Johnson 1981);
Levene's original mean-centred test (Levene 1960) is reported as the distinct
test it is; Bartlett (1937) assumes normality and reacts to heavy tails as much
as to unequal variances.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from ..design import pow2_scale
from ..fit import Fit
from ..results import Diagnostic, json_float

__all__ = [
    "normality",
    "homogeneity",
    "skew_kurtosis",
    "levene_test",
    "fligner_test",
    "bartlett_from_cells",
    "sd_ratio_null_quantile",
    "NEEDS_DATA",
]

NEEDS_DATA = "needs the raw data (only cell summaries were given)"
SMALL_SKEW, MODERATE_SKEW, LARGE_SKEW = 0.5, 1.0, 2.0
SMALL_KURT, MODERATE_KURT, LARGE_KURT = 1.0, 3.0, 7.0
PER_CELL_MIN_N = 8
SHAPIRO_MAX_N = 5000
K2_MIN_N = 20
CLT_CELL_N = 30
RATIO_UNEQUAL_N = 1.5
PAIRING_RHO = 0.5
_STEPS = ("ok", "note", "warning", "serious")


_num = json_float


def _step(sev: str, by: int) -> str:
    return _STEPS[min(max(_STEPS.index(sev) + by, 0), len(_STEPS) - 1)]


def _worse(a: str, b: str) -> str:
    return a if _STEPS.index(a) >= _STEPS.index(b) else b


def _cell_labels(fit: Fit, mask: np.ndarray) -> list[list[str]]:
    c = fit.cells
    return [[c.levels_a[j], c.levels_b[k]] for j, k in zip(*np.nonzero(mask))]


# ---------------------------------------------------------------------------
# normality
# ---------------------------------------------------------------------------

def skew_kurtosis(x: np.ndarray) -> dict:
    """Adjusted skewness G1 and excess kurtosis G2 with exact normal-theory SEs.

    G1 = g1 sqrt(n(n-1))/(n-2) and G2 = ((n+1) g2 + 6)(n-1)/((n-2)(n-3)) with
    g1 = m3/m2^1.5, g2 = m4/m2^2 - 3 (Joanes & Gill 1998; equal to
    scipy.stats.skew / kurtosis with bias=False).  Under normality
    SE(G1) = sqrt(6n(n-1)/((n-2)(n+1)(n+3))) and
    SE(G2) = 2 SE(G1) sqrt((n^2-1)/((n-3)(n+5))) (exact variances of these
    estimators for a normal sample; common practice).
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    if n < 4:
        return {"n": n, "skewness": None, "skewness_se": None, "excess_kurtosis": None, "excess_kurtosis_se": None}
    d = x - x.mean()
    d = d - d.mean()
    d = d / pow2_scale(d)              # exact power of two: no overflow / underflow in d^4
    m2 = float(np.mean(d * d))
    if m2 == 0.0:
        return {"n": n, "skewness": None, "skewness_se": None, "excess_kurtosis": None, "excess_kurtosis_se": None}
    m3 = float(np.mean(d * d * d))
    m4 = float(np.mean((d * d) ** 2))
    g1 = m3 / m2 ** 1.5
    g2 = m4 / (m2 * m2) - 3.0
    G1 = g1 * math.sqrt(n * (n - 1.0)) / (n - 2.0)
    G2 = ((n + 1.0) * g2 + 6.0) * (n - 1.0) / ((n - 2.0) * (n - 3.0))
    ses = math.sqrt(6.0 * n * (n - 1.0) / ((n - 2.0) * (n + 1.0) * (n + 3.0)))
    sek = 2.0 * ses * math.sqrt((n * n - 1.0) / ((n - 3.0) * (n + 5.0)))
    return {"n": n, "skewness": G1, "skewness_se": ses, "excess_kurtosis": G2, "excess_kurtosis_se": sek}


def _anderson(x: np.ndarray) -> dict:
    """Anderson-Darling A^2 for normality (parameters estimated), its 5%
    critical value (Stephens 1974: 0.787 / (1 + 4/n - 25/n^2), the value
    scipy.stats.anderson tabulates) and, where this scipy offers it, the p
    interpolated from those tables (clipped to [0.01, 0.15])."""
    n = x.size
    crit5 = 0.787 / (1.0 + 4.0 / n - 25.0 / (n * n))
    p = None
    try:
        res = stats.anderson(x, dist="norm", method="interpolate")
        stat, p = float(res.statistic), float(res.pvalue)
    except TypeError:  # scipy < 1.17: no p-value option
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = stats.anderson(x, dist="norm")
        stat = float(res.statistic)
    return {"statistic": _num(stat), "critical_5pct": crit5, "p_interpolated": _num(p),
            "reject_5pct": bool(stat > crit5)}


def _residuals_used(fit: Fit) -> tuple[np.ndarray, np.ndarray, list]:
    """Full-model residuals of observations in cells with n >= 2."""
    counts = fit.cells.counts.ravel()
    cell = fit.obs.cell
    keep = counts[cell] >= 2
    return fit.resid_full[keep], cell[keep], _cell_labels(fit, fit.cells.counts == 1)


def normality(fit: Fit) -> Diagnostic:
    """Normality of the full-model residuals, graded by size (see module table).

    values keys: n, excluded_single_cells, shapiro {statistic, p} or None,
    shapiro_reason, dagostino_k2 {statistic, p} or None, dagostino_reason,
    anderson {statistic, critical_5pct, p_interpolated, reject_5pct},
    skewness, skewness_se, excess_kurtosis, excess_kurtosis_se, size_band,
    any_test_rejects, min_cell_n, per_cell [{a, b, n, W, p}], per_cell_min_n,
    per_cell_rejects_05.
    """
    if fit.obs is None:
        return Diagnostic(id="normality", severity="note",
                          summary=f"Normality of residuals {NEEDS_DATA}; it cannot be checked from cell "
                                  "means and SDs.", values={"reason": NEEDS_DATA})
    r, cell, singles = _residuals_used(fit)
    r = r / pow2_scale(r)              # every statistic below is scale-free; divide exactly by 2^e
    n = int(r.size)
    base = {"n": n, "excluded_single_cells": singles}
    if n < 4 or not np.any(r != 0):
        return Diagnostic(id="normality", severity="note",
                          summary="Too few non-zero residuals to check normality; the interaction test rests on "
                                  "the normality assumption unchecked.",
                          values={**base, "reason": "fewer than 4 residuals from cells with n >= 2"})
    v = dict(base)
    if 3 <= n <= SHAPIRO_MAX_N:
        w = stats.shapiro(r)
        v["shapiro"] = {"statistic": _num(w.statistic), "p": _num(w.pvalue)}
        v["shapiro_reason"] = None
    else:
        v["shapiro"] = None
        v["shapiro_reason"] = f"Shapiro-Wilk not computed: n = {n} is above {SHAPIRO_MAX_N} (Royston's algorithm limit)"
    if n >= K2_MIN_N:
        k2 = stats.normaltest(r)
        v["dagostino_k2"] = {"statistic": _num(k2.statistic), "p": _num(k2.pvalue)}
        v["dagostino_reason"] = None
    else:
        v["dagostino_k2"] = None
        v["dagostino_reason"] = f"D'Agostino-Pearson K^2 not computed: n = {n} is below {K2_MIN_N}"
    v["anderson"] = _anderson(r)
    sk = skew_kurtosis(r)
    for key in ("skewness", "skewness_se", "excess_kurtosis", "excess_kurtosis_se"):
        v[key] = _num(sk[key])
    G1 = abs(sk["skewness"] or 0.0)
    G2 = abs(sk["excess_kurtosis"] or 0.0)
    if G1 < SMALL_SKEW and G2 < SMALL_KURT:
        band = "small"
    elif G1 < MODERATE_SKEW and G2 < MODERATE_KURT:
        band = "moderate"
    elif G1 < LARGE_SKEW and G2 < LARGE_KURT:
        band = "large"
    else:
        band = "severe"
    v["size_band"] = band
    ps = [t["p"] for t in (v["shapiro"], v["dagostino_k2"]) if t is not None and t["p"] is not None]
    rejects = any(p < 0.05 for p in ps) or v["anderson"]["reject_5pct"]
    v["any_test_rejects"] = bool(rejects)
    counts = fit.cells.counts
    used_n = counts[counts >= 2]
    v["min_cell_n"] = int(used_n.min())
    # per-cell Shapiro-Wilk on cells large enough to mean something
    per = []
    order = np.argsort(cell, kind="stable")
    rs, cs = r[order], cell[order]
    starts = np.searchsorted(cs, np.arange(counts.size))
    K = fit.cells.K
    for c_idx in np.flatnonzero((counts.ravel() >= PER_CELL_MIN_N) & (counts.ravel() <= SHAPIRO_MAX_N)):
        x = rs[starts[c_idx]:starts[c_idx] + counts.flat[c_idx]]
        if np.ptp(x) == 0:
            continue
        w = stats.shapiro(x)
        per.append({"a": fit.cells.levels_a[c_idx // K], "b": fit.cells.levels_b[c_idx % K],
                    "n": int(x.size), "W": _num(w.statistic), "p": _num(w.pvalue)})
    v["per_cell"] = per
    v["per_cell_min_n"] = PER_CELL_MIN_N
    v["per_cell_rejects_05"] = sum(1 for d in per if d["p"] is not None and d["p"] < 0.05)

    sev = {"small": "ok", "moderate": "note", "large": "warning", "severe": "serious"}[band]
    if not rejects and band in ("small", "moderate"):
        sev = "ok"
    low_power = not rejects and n < 20
    if low_power:
        sev = _worse(sev, "note")
    clt = bool(v["min_cell_n"] >= CLT_CELL_N)
    if clt and sev in ("warning", "serious"):
        sev = _step(sev, -1)
    v["clt_downgrade"] = clt
    f2 = lambda x: "not available" if x is None or not math.isfinite(x) else f"{x:.2f}"  # noqa: E731
    desc = (f"skewness {f2(sk['skewness'])} (SE {f2(sk['skewness_se'])}), excess kurtosis "
            f"{f2(sk['excess_kurtosis'])} (SE {f2(sk['excess_kurtosis_se'])})")
    if band == "small":
        what = ("residuals look close to normal" if not rejects else
                "a test detects non-normality but it is small in size (large N makes trivial departures significant)")
        cons = "no concern for the interaction F"
    elif band == "moderate":
        what = "residuals depart moderately from normal" if rejects else "residuals look roughly normal"
        cons = ("the interaction F is usually robust to this, more so with equal cell sizes"
                if rejects else "no clear concern for the interaction F")
    else:
        what = f"residuals depart {'strongly' if band == 'large' else 'severely'} from normal"
        cons = ("the cells are large enough (n >= 30) for the F test's level to hold, but power is lost"
                if clt else "the interaction F p-value may be off; compare with the robust and resampling methods of this audit")
    tail = "; with fewer than 20 residuals the tests have little power" if low_power else ""
    summary = f"Normality: {what} ({desc}): {cons}{tail}."
    return Diagnostic(id="normality", severity=sev, summary=summary, values=v)


# ---------------------------------------------------------------------------
# homogeneity
# ---------------------------------------------------------------------------

def _groups_sorted(y: np.ndarray, cell: np.ndarray, keep_cells: np.ndarray):
    """Observations of the kept cells sorted by (cell, y); group codes 0..g-1."""
    keep = keep_cells[cell]
    y, cell = y[keep], cell[keep]
    order = np.lexsort((y, cell))
    ys, cs = y[order], cell[order]
    codes = np.cumsum(keep_cells) - 1  # cell index -> group code
    g = codes[cs]
    return ys, g


def levene_test(ys: np.ndarray, g: np.ndarray, center: str = "mean") -> dict:
    """Levene's test (center='mean', Levene 1960) or the Brown-Forsythe test
    (center='median', Brown & Forsythe 1974) on observations ``ys`` sorted
    within groups ``g`` (0..k-1, contiguous).  Same statistic as
    scipy.stats.levene(center=...).  Returns {statistic, df1, df2, p}."""
    k = int(g.max()) + 1
    n = np.bincount(g, minlength=k).astype(float)
    if center == "mean":
        s = np.bincount(g, weights=ys, minlength=k)
        ctr = s / n
        ctr = ctr + np.bincount(g, weights=ys - ctr[g], minlength=k) / n
    else:
        starts = np.concatenate(([0], np.cumsum(n.astype(np.int64))[:-1]))
        ni = n.astype(np.int64)
        lo = ys[starts + (ni - 1) // 2]
        hi = ys[starts + ni // 2]
        ctr = (lo + hi) / 2.0
    z = np.abs(ys - ctr[g])
    zbar_i = np.bincount(g, weights=z, minlength=k) / n
    N = float(n.sum())
    zbar = float(np.sum(zbar_i * n) / N)
    numer = (N - k) * float(np.sum(n * (zbar_i - zbar) ** 2))
    dz = z - zbar_i[g]
    denom = (k - 1.0) * float(np.sum(dz * dz))
    if denom == 0.0:
        return {"statistic": None, "df1": k - 1, "df2": int(N - k), "p": None,
                "reason": "every observation sits at its cell centre; the test is undefined"}
    W = numer / denom
    return {"statistic": _num(W), "df1": k - 1, "df2": int(N - k), "p": _num(stats.f.sf(W, k - 1, N - k))}


def fligner_test(ys: np.ndarray, g: np.ndarray) -> dict:
    """Fligner-Killeen median-centred test (Conover, Johnson & Johnson 1981);
    the statistic of scipy.stats.fligner(center='median').  Returns
    {statistic, df, p}."""
    k = int(g.max()) + 1
    ni = np.bincount(g, minlength=k)
    starts = np.concatenate(([0], np.cumsum(ni)[:-1]))
    med = (ys[starts + (ni - 1) // 2] + ys[starts + ni // 2]) / 2.0
    z = np.abs(ys - med[g])
    N = float(ni.sum())
    ranks = stats.rankdata(z)
    a = stats.norm.ppf(ranks / (2.0 * (N + 1.0)) + 0.5)
    abar_i = np.bincount(g, weights=a, minlength=k) / ni
    abar = float(np.mean(a))
    var = float(np.var(a, ddof=1))
    if var == 0.0:
        return {"statistic": None, "df": k - 1, "p": None, "reason": "all scores tie; the test is undefined"}
    X = float(np.sum(ni * (abar_i - abar) ** 2)) / var
    return {"statistic": _num(X), "df": k - 1, "p": _num(stats.chi2.sf(X, k - 1))}


def bartlett_from_cells(n: np.ndarray, s2: np.ndarray) -> dict:
    """Bartlett's (1937) test from group sizes and variances (ddof 1); the
    statistic of scipy.stats.bartlett.  Returns {statistic, df, p}."""
    n = np.asarray(n, dtype=float)
    s2 = np.asarray(s2, dtype=float)
    k = n.size
    if np.any(s2 <= 0):
        return {"statistic": None, "df": k - 1, "p": None,
                "reason": "a cell has zero variance (log of 0); Bartlett's test is undefined"}
    Ntot = float(n.sum())
    spsq = float(np.sum((n - 1.0) * s2)) / (Ntot - k)
    numer = (Ntot - k) * math.log(spsq) - float(np.sum((n - 1.0) * np.log(s2)))
    denom = 1.0 + 1.0 / (3 * (k - 1)) * (float(np.sum(1.0 / (n - 1.0))) - 1.0 / (Ntot - k))
    T = numer / denom
    return {"statistic": _num(T), "df": k - 1, "p": _num(stats.chi2.sf(T, k - 1))}


def sd_ratio_null_quantile(n: np.ndarray, q: float = 0.95, draws: int = 4000, seed: int = 20240611) -> float:
    """The q-quantile of largest/smallest sample SD when every cell has the
    same variance and normal data, for cells of sizes ``n`` (Monte Carlo with
    a fixed seed; s^2 ~ sigma^2 chi2(n-1)/(n-1)).  Hartley's (1950) F-max,
    generalised by simulation to unequal cells.  Monte Carlo SE of the
    quantile is small at 4000 draws (about 1-2% of its value)."""
    df = np.asarray(n, dtype=float) - 1.0
    rng = np.random.default_rng(seed)
    s2 = rng.chisquare(np.broadcast_to(df, (draws, df.size))) / df
    r = np.sqrt(s2.max(axis=1) / s2.min(axis=1))
    return float(np.quantile(r, q))


def _f_bias_ratio(fit: Fit) -> tuple[float | None, str | None]:
    """E[MS_AB] / E[MS_E] under H0 with the cell variances plugged in."""
    from ..core import type3_contrasts

    c = fit.cells
    n = c.counts.ravel().astype(float)
    if np.any(n < 2):
        return None, "needs every cell to have n >= 2"
    s2 = c.variances.ravel()
    C = type3_contrasts(c.J, c.K)["AB"]
    M = (C / n) @ C.T
    Vc = (C * (s2 / n)) @ C.T
    e_ss = float(np.trace(np.linalg.solve(M, Vc)))
    e_msab = e_ss / C.shape[0]
    e_mse = float(np.sum((n - 1.0) * s2)) / (n.sum() - n.size)
    if e_mse <= 0:
        return None, "pooled variance is zero"
    return e_msab / e_mse, None


def homogeneity(fit: Fit) -> Diagnostic:
    """Equality of variances across cells, graded by SD ratio and by the
    pairing of variance with cell size (see module table).

    values keys: cells_used, excluded_cells, levene_mean {statistic, df1, df2,
    p}, brown_forsythe {..}, fligner_killeen {statistic, df, p}, bartlett
    {statistic, df, p}, sd_ratio, sd_max_cell, sd_min_cell, n_ratio,
    size_variance_spearman, pairing ('negative'|'positive'|'none marked'|
    'not applicable'), direction (sentence or None), f_bias_ratio,
    f_bias_reason, reason (summary mode).
    """
    c = fit.cells
    counts = c.counts
    use = counts >= 2
    v: dict = {"cells_used": int(use.sum()), "excluded_cells": _cell_labels(fit, (counts < 2) & (counts > 0)),
               "excluded_reason": "cells with n < 2 have no variance" if np.any((counts < 2) & (counts > 0)) else None}
    if use.sum() < 2:
        return Diagnostic(id="homogeneity", severity="note",
                          summary="Fewer than two cells have n >= 2: equality of variances cannot be checked.",
                          values=v)
    n_u = counts[use].astype(float)
    s2 = c.variances[use]
    sd = np.sqrt(s2)
    labels = _cell_labels(fit, use)
    v["bartlett"] = bartlett_from_cells(n_u, s2)
    if fit.obs is not None:
        ys, g = _groups_sorted(fit.obs.y, fit.obs.cell, use.ravel())
        v["levene_mean"] = levene_test(ys, g, "mean")
        v["brown_forsythe"] = levene_test(ys, g, "median")
        v["fligner_killeen"] = fligner_test(ys, g)
        v["reason"] = None
    else:
        v["levene_mean"] = v["brown_forsythe"] = v["fligner_killeen"] = None
        v["reason"] = f"Levene, Brown-Forsythe and Fligner-Killeen {NEEDS_DATA}"
    imax, imin = int(np.argmax(sd)), int(np.argmin(sd))
    v["sd_max_cell"] = labels[imax] + [float(sd[imax])]
    v["sd_min_cell"] = labels[imin] + [float(sd[imin])]
    r_sd = float(sd[imax] / sd[imin]) if sd[imin] > 0 else None
    v["sd_ratio"] = r_sd
    null95 = sd_ratio_null_quantile(n_u)
    v["sd_ratio_null_95"] = null95
    v["sd_ratio_null_method"] = ("95% quantile of the SD ratio when all cells share one variance (normal data, "
                                 "these cell sizes; Monte Carlo, 4000 draws, fixed seed)")
    r_n = float(n_u.max() / n_u.min())
    v["n_ratio"] = r_n
    rho = None
    if n_u.size >= 3 and np.ptp(n_u) > 0 and np.ptp(s2) > 0:
        rho = _num(stats.spearmanr(n_u, s2).statistic)
    v["size_variance_spearman"] = rho
    v["size_variance_method"] = "Spearman rank correlation of cell size with cell variance (cells with n >= 2)"
    if r_n < RATIO_UNEQUAL_N or rho is None:
        pairing = "not applicable"
    elif rho <= -PAIRING_RHO:
        pairing = "negative"
    elif rho >= PAIRING_RHO:
        pairing = "positive"
    else:
        pairing = "none marked"
    v["pairing"] = pairing
    fb, fb_reason = _f_bias_ratio(fit)
    v["f_bias_ratio"] = _num(fb)
    v["f_bias_reason"] = fb_reason

    bf_p = (v["brown_forsythe"] or {}).get("p")
    if r_sd is None:
        sev = "warning"
        what = "a cell has zero spread, so variances cannot be compared by ratio"
    elif r_n < RATIO_UNEQUAL_N:
        sev = "ok" if r_sd <= 2 else ("note" if r_sd <= 3 else "warning")
        what = f"largest/smallest cell SD = {r_sd:.2f} with near-equal cell sizes (size ratio {r_n:.2f})"
    else:
        if r_sd <= 1.5:
            sev = "ok"
        elif r_sd <= 2:
            sev = "warning" if pairing == "negative" else "note"
        else:
            sev = "serious" if pairing == "negative" else "warning"
        what = f"largest/smallest cell SD = {r_sd:.2f} with unequal cell sizes (size ratio {r_n:.2f})"
    chance = r_sd is not None and r_sd <= null95
    v["within_chance"] = bool(chance)
    if chance and sev != "ok":
        sev = _step(sev, -1)
        what += (f", within what chance alone gives with these cell sizes (95% of equal-variance samples "
                 f"have a ratio below {null95:.2f})")
    if sev == "ok" and bf_p is not None and bf_p < 0.05:
        sev = "note"
    matters = r_sd is not None and r_sd > 1.5
    direction = None
    if matters and pairing == "negative":
        direction = "large variances in small cells: the classical F is liberal"
    elif matters and pairing == "positive":
        direction = "large variances in large cells: the classical F is conservative"
    v["direction"] = direction
    if r_sd is None:
        cons = ("check that cell for tied or capped values (rounding, a floor or ceiling); the pooled error "
                "variance hides it and a heteroscedasticity-robust test should agree")
    elif direction:
        cons = direction + " (Box 1954; Glass, Peckham & Sanders 1972)"
    elif sev == "ok":
        cons = "no concern for the interaction F"
    elif r_n < RATIO_UNEQUAL_N:
        cons = "with near-equal cells the F is fairly robust, but a heteroscedasticity-robust test should agree"
    else:
        cons = "unequal variances with unequal cells can bias the interaction F; check a Welch-type test"
    tests = ""
    if bf_p is not None:
        tests = f"; Brown-Forsythe p = {bf_p:.3g}"
    summary = f"Homogeneity: {what}{tests}: {cons}."
    return Diagnostic(id="homogeneity", severity=sev, summary=summary, values=v)
