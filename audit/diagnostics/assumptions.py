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
rejects at 0.05 and the band is small or moderate -> ok, but "minor" when fewer
than 20 residuals (the tests have little power; common practice).  When every
cell used has n >= 30 the severity is lowered one step (the cell means are
close to normal by the central limit theorem, so the interaction F keeps its
level; heavy tails still cost power) - common practice, consistent with the
robustness results reviewed by Glass, Peckham & Sanders 1972.
Per-cell Shapiro-Wilk is reported only for cells with 8 <= n <= 5000
(common practice: below 8 a per-cell test has almost no power); it is
informative only and does not change the severity.

homogeneity (cells with n >= 2).  Graded by the size of the problem for the
interaction test: L = the approximate true level of the classical interaction
F at alpha when the cell variances are the observed ones (Box 1954, Ann. Math.
Statist. 25:290-302: two-moment approximation F ~ b F(h1, h2), see
:func:`_box_level`; checked against simulation to 0.015 in the tests).  The
bands are Bradley's (1978, Br. J. Math. Stat. Psychol. 31:144-152) robustness
criteria for a test's true level.

=============================================== ========= ======================
condition on L / alpha                          severity  source
=============================================== ========= ======================
0.9 to 1.1 (Bradley's stringent bound)           ok        Bradley 1978
0.5 to 1.5 (Bradley's liberal bound)             note      Bradley 1978
above 1.5 (liberal) or below 0.5 (conservative)  warning   Bradley 1978
2 or more (false interactions at least doubled)  serious   our choice
=============================================== ========= ======================

Noise in the cell SDs makes L noisy, so L is compared with the range (2.5% to
97.5%) it takes when all cells share one variance, for these cell sizes
(``f_level_null``, simulated: the analogue of Hartley's 1950 F-max quantile).
L within that range and no test detecting unequal variances -> "clear" (no
evidence beyond noise, by size or by test); within that range but a test
detects them -> one step milder, not below "minor"; beyond that range -> the
band as above.  The tests are supporting evidence only: Brown-Forsythe
p < 0.05, or Bartlett p < 0.05, lift "clear" to "minor" and never more.  Bartlett
(1937) assumes normal cells and rejects for heavy tails as readily as for
unequal variances (Box 1953), so with raw data its statistic is first divided
by 1 + gamma2/2, gamma2 the within-cell excess kurtosis of the residuals
(:func:`bartlett_kurtosis_adjusted`; in summary mode, where tails cannot be
seen, the plain Bartlett p is used and the sentence says so).  A zero-SD cell
-> "concern".

When L cannot be formed (a cell with n < 2, or empty cells) the SD-ratio table
applies: r_sd = largest / smallest cell SD, r_n = largest / smallest cell size,
rho = Spearman correlation of cell size with cell variance, pairing "marked"
when r_n >= 1.5 and |rho| >= 0.5 (common practice).

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

There, when r_sd is no larger than the 95% quantile of the SD ratio that equal
variances would give with these cell sizes (``sd_ratio_null_95``, Hartley's
1950 F-max generalised to unequal cells by simulation) and no test rejects,
the severity is lowered one step.  The direction: large variances in small
cells make the classical F liberal (too many false interactions), large
variances in large cells make it conservative (Box 1954; Glass, Peckham &
Sanders 1972).  ``f_bias_ratio`` = E[MS_AB] / E[MS_E] under H0 with the cell
variances plugged in (the b above); 1 means unbiased in the mean.  The grade is
decided first (:func:`grade_homogeneity`, a :class:`HomogeneityGrade`) and the
sentence is chosen from it (:func:`word_homogeneity`), so the words never
contradict the grade.  The check does not read the methods' results
(diagnostics run before the methods).

Brown-Forsythe (the median-centred Levene test, Brown & Forsythe 1974) and
Fligner-Killeen are the robust tests (Conover, Johnson & Johnson 1981);
Levene's original mean-centred test (Levene 1960) is reported as the distinct
test it is; Bartlett (1937) assumes normality and reacts to heavy tails as much
as to unequal variances.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from ..design import pow2_scale
from ..fit import Fit
from ..facts import HomogeneityFacts, NormalityFacts
from ..results import NOT_RUN, Diagnostic, json_float

__all__ = [
    "normality",
    "homogeneity",
    "skew_kurtosis",
    "levene_test",
    "fligner_test",
    "bartlett_from_cells",
    "bartlett_kurtosis_adjusted",
    "sd_ratio_null_quantile",
    "grade_homogeneity",
    "word_homogeneity",
    "HomogeneityGrade",
    "NEEDS_DATA",
]

NEEDS_DATA = "needs the raw data (only cell summaries were given)"
#: Levene-type tests use only cells with at least this many observations (common practice: with
#: n = 2 the absolute deviations from the cell centre are equal, so the tests degenerate)
LEVENE_MIN_N = 3
SMALL_SKEW, MODERATE_SKEW, LARGE_SKEW = 0.5, 1.0, 2.0
SMALL_KURT, MODERATE_KURT, LARGE_KURT = 1.0, 3.0, 7.0
PER_CELL_MIN_N = 8
SHAPIRO_MAX_N = 5000
K2_MIN_N = 20
CLT_CELL_N = 30
RATIO_UNEQUAL_N = 1.5
PAIRING_RHO = 0.5
_STEPS = ("clear", "minor", "concern", "critical")


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
    return shape_from_moments(n, m2, m3, m4)


def shape_from_moments(n: int, m2: float, m3: float, m4: float) -> dict:
    """Adjusted skewness G1, excess kurtosis G2 and their normal-theory SEs
    from the central moments m2, m3, m4 of n values (n >= 4, m2 > 0); the
    formulas of :func:`skew_kurtosis`, shared with the engines' pooled cell
    moments."""
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


def normality(fit: Fit, *, shape: dict | None = None) -> Diagnostic:
    """Normality of the full-model residuals, graded by size (see module table).

    ``shape``: skewness and kurtosis computed elsewhere (the
    :func:`skew_kurtosis` keys), used for the size band instead of those of
    ``fit``'s residuals: an engine scan passes the values pooled from every
    row's cell moments while the tests run on its sample.

    values keys: n, excluded_single_cells, shapiro {statistic, p} or None,
    shapiro_reason, dagostino_k2 {statistic, p} or None, dagostino_reason,
    anderson {statistic, critical_5pct, p_interpolated, reject_5pct},
    skewness, skewness_se, excess_kurtosis, excess_kurtosis_se, size_band,
    any_test_rejects, min_cell_n, per_cell [{a, b, n, W, p}], per_cell_min_n,
    per_cell_rejects_05.
    """
    if fit.obs is None:
        return Diagnostic(id="normality", severity=NOT_RUN,
                          summary=f"Normality of residuals {NEEDS_DATA}; it cannot be checked from cell "
                                  "means and SDs.", values={"reason": NEEDS_DATA})
    r, cell, singles = _residuals_used(fit)
    r = r / pow2_scale(r)              # every statistic below is scale-free; divide exactly by 2^e
    n = int(r.size)
    base = {"n": n, "excluded_single_cells": singles}
    if n < 4 or not np.any(r != 0):
        return Diagnostic(id="normality", severity="minor",
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
    sk = skew_kurtosis(r) if shape is None else shape
    if shape is not None:
        v["shape_n"] = shape.get("n")
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

    sev = {"small": "clear", "moderate": "minor", "large": "concern", "severe": "critical"}[band]
    if not rejects and band in ("small", "moderate"):
        sev = "clear"
    low_power = not rejects and n < 20
    if low_power:
        sev = _worse(sev, "minor")
    clt = bool(v["min_cell_n"] >= CLT_CELL_N)
    if clt and sev in ("concern", "critical"):
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
    return Diagnostic(id="normality", severity=sev, summary=summary, values=v,
                      facts=NormalityFacts(size_band=v.get("size_band")))


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
    quantile is small at 4000 draws (about 1-2% of its value).  Designs with more
    than 5,000 cells use 2e7 / m draws, at least 1,000 (about 2-4%): the cost stays
    linear in the cells."""
    df = np.asarray(n, dtype=float) - 1.0
    if df.size > 5000:
        draws = min(draws, max(1000, 20_000_000 // df.size))
    rng = np.random.default_rng(seed)
    # drawn in blocks of rows (the generator fills row after row, so the values are those
    # of one (draws, m) draw): memory O(cells), not O(draws x cells)
    step = max(1, _NULL_BLOCK // max(df.size, 1))
    r = np.empty(draws)
    for i in range(0, draws, step):
        b = min(step, draws - i)
        s2 = rng.chisquare(np.broadcast_to(df, (b, df.size))) / df
        r[i:i + b] = np.sqrt(s2.max(axis=1) / s2.min(axis=1))
    return float(np.quantile(r, q))


#: values per block of simulated cell variances (null ranges of the homogeneity check)
_NULL_BLOCK = 1 << 20


def _f_bias_ratio(fit: Fit) -> tuple[float | None, str | None]:
    """E[MS_AB] / E[MS_E] under H0 with the cell variances plugged in:
    E[SS_AB] = tr(P S), P = C' (C D C')^-1 C, S = diag(s2 / n), by the core's
    structured form (:func:`audit.core.interaction_traces`, no JK x JK matrix)."""
    from ..core import interaction_traces

    c = fit.cells
    n = c.counts.astype(float)
    if np.any(n < 2):
        return None, "needs every cell to have n >= 2"
    s2 = c.variances.astype(float)
    e_ss = float(interaction_traces(n, s2 / n)[0])
    e_msab = e_ss / ((c.J - 1) * (c.K - 1))
    e_mse = float(np.sum((n - 1.0) * s2)) / (n.sum() - n.size)
    if e_mse <= 0:
        return None, "pooled variance is zero"
    return e_msab / e_mse, None


def _box_level_many(n: np.ndarray, s2: np.ndarray, r: int, alpha: float):
    """Vectorised core of :func:`_box_level`: n (J, K), rows of s2 (draws, J, K)."""
    from ..core import interaction_traces

    s2 = s2.reshape((-1,) + n.shape)
    tr, tr2 = interaction_traces(n, s2 / n)     # sum lambda, sum lambda^2
    nf, s2f = n.ravel(), s2.reshape(s2.shape[0], -1)
    dfe = float(nf.sum() - nf.size)
    w = (nf - 1.0) * s2f
    b = (tr / r) / (w.sum(axis=1) / dfe)
    h1 = tr * tr / tr2
    h2 = w.sum(axis=1) ** 2 / np.sum((nf - 1.0) * s2f * s2f, axis=1)
    crit = float(stats.f.isf(alpha, r, dfe))
    return stats.f.sf(crit / b, h1, h2), b, h1, h2


def _box_level(fit: Fit, draws: int = 2000, seed: int = 20240611) -> dict:
    """Approximate true level of the classical interaction F at alpha when the
    cell variances are the observed ones (Box 1954), and the range such
    estimates take when all cells share one variance.

    Under H0, SS_AB is a weighted sum of chi-square(1) variables with weights
    the eigenvalues lambda of (C D C')^-1 (C S C') (D = diag(1/n), S =
    diag(s2/n)), and SSE = sum s2_jk chi2(n_jk - 1).  Matching two moments of
    each (Satterthwaite), F ~= b F(h1, h2) with b = E[MS_AB] / E[MS_E] (the
    ``f_bias_ratio``), h1 = (sum lambda)^2 / sum lambda^2 and h2 = (sum (n-1)
    s2)^2 / sum (n-1) s2^2; the level is P(b F(h1, h2) > F_crit(alpha; r, N - m)).
    With P = C' (C D C')^-1 C, sum lambda = tr(P S) and sum lambda^2 =
    tr((P S)^2), so no eigenvalues are needed; both come from the additive
    model's normal equations (J + K - 1 unknowns) by
    :func:`audit.core.interaction_traces`, never from a JK x JK matrix.
    Equal variances give h1 = r, h2 = N - m, b = 1 and the level alpha exactly.

    The null range: the 2.5% and 97.5% points of the same estimate over
    sample variances s2 ~ chi2(n - 1) / (n - 1) (equal true variances, normal
    data, these cell sizes; Monte Carlo with a fixed seed), the analogue of
    Hartley's F-max quantile for this estimate.  Large designs get fewer draws
    (at most 2e7 / m^2, at least 50: a rougher range).

    Returns {level, bias_ratio, df1_eff, df2_eff, null_lo, null_hi} or
    {level: None, reason}.
    """
    c = fit.cells
    n = c.counts.astype(float)
    if np.any(n < 2):
        return {"level": None, "reason": "needs every cell to have n >= 2"}
    s2 = c.variances.astype(float)
    if np.any(~np.isfinite(s2)) or np.any(s2 <= 0):
        return {"level": None, "reason": "a cell has zero spread"}
    r = (c.J - 1) * (c.K - 1)
    lv, b, h1, h2 = _box_level_many(n, s2, r, fit.alpha)
    m = n.size
    draws = int(max(50, min(draws, 20_000_000 // (m * m))))  # large designs: fewer draws, rougher range
    rng = np.random.default_rng(seed)
    df = (n - 1.0).ravel()
    # blocks of draws (the generator fills row after row: the values of one (draws, m) draw)
    step = max(1, min(draws, _NULL_BLOCK // (8 * m)))
    nl = np.empty(draws)
    for i in range(0, draws, step):
        bk = min(step, draws - i)
        null = rng.chisquare(np.broadcast_to(df, (bk, m))) / df
        nl[i:i + bk] = _box_level_many(n, null, r, fit.alpha)[0]
    lo, hi = np.quantile(nl, [0.025, 0.975])
    return {"level": float(lv[0]), "bias_ratio": float(b[0]), "df1_eff": float(h1[0]), "df2_eff": float(h2[0]),
            "null_lo": float(lo), "null_hi": float(hi)}


def bartlett_kurtosis_adjusted(statistic: float, df: int, e: np.ndarray, n_obs: np.ndarray,
                               s2_obs: np.ndarray) -> dict:
    """Bartlett's statistic divided by 1 + gamma2 / 2, with gamma2 the excess
    kurtosis of the residuals ``e`` standardised within their cells (pooled
    m4 / m2^2, scaled so that normal cells of these sizes give 0 on average:
    E[m4 / m2^2] = 3 (n - 1) / (n + 1) for a normal sample, common practice).
    Under non-normality Bartlett's statistic tends to (1 + gamma2 / 2) chi2(k - 1)
    (Box 1953, Biometrika 40:318-335; from memory).  Checked by simulation in
    the tests: with Laplace errors in 6 cells of 20 the plain test rejects
    about 37% of equal-variance samples at 5%, the adjusted one about 15%
    (normal errors: both near 5%), so the adjustment reduces, not removes, the
    sensitivity to tails; the audit uses it only as supporting evidence.
    ``n_obs`` and ``s2_obs`` are the size and variance (ddof 1) of each
    residual's cell.  Returns {statistic, df, p, kurtosis}."""
    n = np.asarray(n_obs, dtype=float)
    z2 = np.asarray(e, dtype=float) ** 2 / (np.asarray(s2_obs, dtype=float) * (n - 1.0) / n)
    g2 = 3.0 * float(np.sum(z2 * z2)) / float(np.sum(3.0 * (n - 1.0) / (n + 1.0))) - 3.0
    scale = 1.0 + g2 / 2.0
    if scale <= 0:
        return {"statistic": None, "df": df, "p": None, "kurtosis": g2,
                "reason": "within-cell kurtosis too low for the adjustment"}
    T = statistic / scale
    return {"statistic": _num(T), "df": df, "p": _num(stats.chi2.sf(T, df)), "kurtosis": g2}


def _bartlett_kurtosis_adjusted(fit: Fit, use: np.ndarray, bart: dict) -> dict | None:
    """:func:`bartlett_kurtosis_adjusted` on the fit's residuals (cells with
    n >= 2); None in summary mode or when Bartlett is undefined."""
    if fit.obs is None or bart.get("statistic") is None:
        return None
    cell = fit.obs.cell
    keep = use.ravel()[cell]
    e = np.asarray(fit.resid_full, dtype=float)[keep]
    return bartlett_kurtosis_adjusted(bart["statistic"], bart["df"], e, fit.cells.counts.ravel()[cell[keep]],
                                      fit.cells.variances.ravel()[cell[keep]])


@dataclass(frozen=True, kw_only=True)
class HomogeneityGrade:
    """The grade of the homogeneity check, decided before any wording.

    severity: ok | note | warning | serious.  basis: 'level' (Box 1954
    approximate level of the classical interaction F), 'sd_ratio' (the SD-ratio
    table, when the level cannot be formed), 'zero_spread'.  band: for 'level',
    'nominal' (within Bradley's stringent bound 0.9-1.1 alpha), 'near'
    (within his liberal bound 0.5-1.5 alpha), 'liberal' (above 1.5 alpha),
    'very liberal' (2 alpha or more), 'conservative' (below 0.5 alpha); for
    'sd_ratio', the severity of that table.  chance: the estimate (or the SD
    ratio) lies within what equal variances give with these cell sizes.
    tests: the tests that detect unequal variances (Brown-Forsythe; Bartlett,
    kurtosis-adjusted with raw data), as supporting evidence.
    """

    severity: str
    basis: str
    band: str
    chance: bool
    tests: tuple[str, ...]


def _level_band(x: float) -> tuple[str, str]:
    if x >= 2.0:
        return "critical", "very liberal"
    if x > 1.5:
        return "concern", "liberal"
    if x < 0.5:
        return "concern", "conservative"
    if 0.9 <= x <= 1.1:
        return "clear", "nominal"
    return "minor", "near"


def grade_homogeneity(*, r_sd, r_n, pairing, level, level_null, alpha, null95, bf_p, bartlett_p,
                      bartlett_kind) -> HomogeneityGrade:
    """Grade the size of the variance problem for the interaction F (module table).

    level: Box (1954) approximate level of the classical interaction F with the
    observed cell variances, or None; level_null: its (2.5%, 97.5%) range
    under equal variances.  bartlett_p: the kurtosis-adjusted Bartlett p with
    raw data (bartlett_kind 'kurtosis-adjusted') or the plain one in summary
    mode ('normal-theory'); tests are supporting evidence only.
    """
    if r_sd is None:
        return HomogeneityGrade(severity="concern", basis="zero_spread", band="zero spread", chance=False, tests=())
    tests: list[str] = []
    if bf_p is not None and bf_p < 0.05:
        tests.append("Brown-Forsythe")
    if bartlett_p is not None and bartlett_p < 0.05:
        tests.append(f"Bartlett ({bartlett_kind})")
    if level is not None:
        sev, band = _level_band(level / alpha)
        chance = bool(level_null[0] <= level <= level_null[1])
        if chance and not tests:
            sev = "clear"  # no evidence of unequal variances beyond noise, by size or by test
        elif chance and sev != "clear":
            sev = _worse(_step(sev, -1), "minor")
        elif sev == "clear" and tests:
            sev = "minor"
        return HomogeneityGrade(severity=sev, basis="level", band=band, chance=chance, tests=tuple(tests))
    if r_n < RATIO_UNEQUAL_N:
        sev = "clear" if r_sd <= 2 else ("minor" if r_sd <= 3 else "concern")
    elif r_sd <= 1.5:
        sev = "clear"
    elif r_sd <= 2:
        sev = "concern" if pairing == "negative" else "minor"
    else:
        sev = "critical" if pairing == "negative" else "concern"
    band = sev
    chance = bool(r_sd <= null95)
    if chance and sev != "clear" and not tests:
        sev = _step(sev, -1)
    if sev == "clear" and tests:
        sev = "minor"
    return HomogeneityGrade(severity=sev, basis="sd_ratio", band=band, chance=chance, tests=tuple(tests))


def word_homogeneity(g: HomogeneityGrade, v: dict, alpha: float) -> str:
    """The summary sentence for a grade; the wording follows the grade, never the reverse."""
    r_sd, r_n = v.get("sd_ratio"), v.get("n_ratio")
    if g.basis == "zero_spread":
        return ("Homogeneity: a cell has zero spread, so variances cannot be compared by ratio: check that cell "
                "for tied or capped values (rounding, a floor or ceiling); the pooled error variance hides it and "
                "a heteroscedasticity-robust test should agree.")
    sizes = "near-equal" if r_n < RATIO_UNEQUAL_N else "unequal"
    what = f"largest/smallest cell SD = {r_sd:.2f} with {sizes} cell sizes (size ratio {r_n:.2f})"
    tests = []
    bf_p = (v.get("brown_forsythe") or {}).get("p")
    if bf_p is not None:
        tests.append(f"Brown-Forsythe p = {bf_p:.3g}")
    ba = v.get("bartlett_adjusted")
    if ba is not None and ba.get("p") is not None:
        tests.append(f"Bartlett p = {ba['p']:.3g} (adjusted for within-cell kurtosis {ba['kurtosis']:.2f})")
    elif v.get("bartlett", {}).get("p") is not None and v.get("brown_forsythe") is None:
        tests.append(f"Bartlett p = {v['bartlett']['p']:.3g} (assumes normal cells, which summaries cannot show)")
    ttxt = f"; {', '.join(tests)}" if tests else ""
    direction = v.get("direction")
    why = f" ({direction}: Box 1954; Glass, Peckham & Sanders 1972)" if direction else ""
    detected = " and ".join(g.tests)
    if g.basis == "level":
        L = v["f_level"]
        lo, hi = v["f_level_null"]
        lv = f"estimated level of the classical interaction F {L:.3f} at nominal {alpha:g} (Box 1954 approximation)"
        noise = f"equal variances give estimates from {lo:.3f} to {hi:.3f} with these cell sizes"
        if g.severity == "clear" and g.band == "nominal":
            cons = f"{lv}: the unequal variances do not bias the interaction F"
        elif g.severity == "clear":
            cons = (f"{lv}, but {noise} and no test detects unequal variances, so the spread is within chance; "
                    "the interaction F is graded as unaffected")
        elif g.band == "nominal":
            cons = f"{lv}, close to nominal, but {detected} detects unequal variances: a robust test should agree"
        elif g.band == "near":
            side = "slightly liberal" if L > alpha else "slightly conservative"
            cons = (f"{lv}: {side}, within Bradley's (1978) liberal bound {0.5 * alpha:g}-{1.5 * alpha:g}{why}; "
                    "a heteroscedasticity-robust test should agree")
        elif g.band == "conservative":
            cons = f"{lv}: conservative{why}, so it loses power; compare a heteroscedasticity-robust test"
        else:
            much = "at least double" if g.band == "very liberal" else "above 1.5 times"
            cons = (f"{lv}, {much} nominal: liberal{why}; prefer a heteroscedasticity-robust test "
                    "(Welch-James, HC3)")
        if g.chance and g.severity != "clear":
            cons += f" ({noise}, so the size is uncertain; graded one step milder)"
        elif not g.chance and g.severity != "clear":
            cons += f" ({noise})"
    else:
        if g.chance:
            what += (f", within what chance alone gives with these cell sizes (95% of equal-variance samples have "
                     f"a ratio below {v['sd_ratio_null_95']:.2f})")
        if g.severity == "clear":
            cons = "the SD ratio is within the range the interaction F tolerates"
        elif g.band == "clear":
            cons = f"the SD ratio is small, but {detected} detects unequal variances"
        elif direction:
            cons = direction + " (Box 1954; Glass, Peckham & Sanders 1972)"
        elif r_n < RATIO_UNEQUAL_N:
            cons = "with near-equal cells the F is fairly robust, but a heteroscedasticity-robust test should agree"
        else:
            cons = "unequal variances with unequal cells can bias the interaction F; check a Welch-type test"
        cons += f" (level of the F not estimated: {v.get('f_level_reason')})"
    return f"Homogeneity: {what}{ttxt}: {cons}."


def homogeneity(fit: Fit, *, tests: dict | None = None) -> Diagnostic:
    """Equality of variances across cells, graded by the size of the bias it
    causes in the classical interaction F (see module table).

    values keys: cells_used, excluded_cells, levene_mean {statistic, df1, df2,
    p}, brown_forsythe {..}, fligner_killeen {statistic, df, p}, bartlett
    {statistic, df, p}, bartlett_adjusted {statistic, df, p, kurtosis} or None,
    sd_ratio, sd_max_cell, sd_min_cell, n_ratio, size_variance_spearman,
    pairing ('negative'|'positive'|'none marked'|'not applicable'), direction
    (sentence or None), f_bias_ratio, f_bias_reason, f_level, f_level_df,
    f_level_null [2.5%, 97.5%] under equal variances, f_level_reason, grade
    {basis, band, chance, tests}, within_chance,
    reason (summary mode).

    ``tests``: values for any of levene_mean, brown_forsythe,
    fligner_killeen, bartlett_adjusted computed elsewhere (an engine scan:
    exact from cell moments, or on its sample), used in place of their
    data-mode computation.
    """
    unit = fit.cells.standardised().unit   # exact power of two: ratios and tests are scale-free
    fit = fit.standardised()
    c = fit.cells
    counts = c.counts
    use = counts >= 2
    v: dict = {"cells_used": int(use.sum()), "excluded_cells": _cell_labels(fit, (counts < 2) & (counts > 0)),
               "excluded_reason": "cells with n < 2 have no variance" if np.any((counts < 2) & (counts > 0)) else None}
    if use.sum() < 2:
        return Diagnostic(id="homogeneity", severity="minor",
                          summary="Fewer than two cells have n >= 2: equality of variances cannot be checked.",
                          values=v)
    n_u = counts[use].astype(float)
    s2 = c.variances[use]
    sd = np.sqrt(s2)
    labels = _cell_labels(fit, use)
    v["bartlett"] = bartlett_from_cells(n_u, s2)
    v["bartlett_adjusted"] = _bartlett_kurtosis_adjusted(fit, use, v["bartlett"])
    # Levene-type tests compare the spread of |y - cell centre| across cells; in a cell of 2 both
    # observations lie exactly equally far from the centre (mean or median), so such a cell has no
    # within-cell variation of that spread and the tests break down (p near 0 on equal variances).
    # They use the cells of 3 or more only; Bartlett (normal theory, valid at n = 2) uses every cell.
    lev_use = use & (counts >= LEVENE_MIN_N)
    v["levene_cells_used"] = int(lev_use.sum())
    if fit.obs is not None and lev_use.sum() >= 2:
        ys, g = _groups_sorted(fit.obs.y, fit.obs.cell, lev_use.ravel())
        v["levene_mean"] = levene_test(ys, g, "mean")
        v["brown_forsythe"] = levene_test(ys, g, "median")
        v["fligner_killeen"] = fligner_test(ys, g)
        v["reason"] = None if lev_use.sum() == use.sum() else (
            f"Levene, Brown-Forsythe and Fligner-Killeen use the {int(lev_use.sum())} cells with n >= "
            f"{LEVENE_MIN_N}: in a cell of 2 both observations are equally far from the cell's centre")
    elif fit.obs is not None:
        v["levene_mean"] = v["brown_forsythe"] = v["fligner_killeen"] = None
        v["reason"] = (f"Levene, Brown-Forsythe and Fligner-Killeen not run: they need two or more cells with n >= "
                       f"{LEVENE_MIN_N} (in a cell of 2 both observations are equally far from the cell's centre, so "
                       "the tests break down); Bartlett is used")
    else:
        v["levene_mean"] = v["brown_forsythe"] = v["fligner_killeen"] = None
        v["reason"] = f"Levene, Brown-Forsythe and Fligner-Killeen {NEEDS_DATA}"
    if tests:
        for key in ("levene_mean", "brown_forsythe", "fligner_killeen", "bartlett_adjusted"):
            if key in tests:
                v[key] = tests[key]
        v["reason"] = tests.get("reason", v["reason"])
    imax, imin = int(np.argmax(sd)), int(np.argmin(sd))
    v["sd_max_cell"] = labels[imax] + [_num(float(sd[imax]) * unit)]
    v["sd_min_cell"] = labels[imin] + [_num(float(sd[imin]) * unit)]
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
    bl = _box_level(fit) if r_sd is not None else {"level": None, "reason": "a cell has zero spread"}
    v["f_level"] = _num(bl["level"])
    v["f_level_df"] = [bl["df1_eff"], bl["df2_eff"]] if bl["level"] is not None else None
    v["f_level_null"] = [bl["null_lo"], bl["null_hi"]] if bl["level"] is not None else None
    v["f_level_reason"] = bl.get("reason")
    v["f_level_method"] = ("Box (1954) two-moment approximation of the classical interaction F's level at alpha "
                           "with the observed cell variances")
    matters = r_sd is not None and r_sd > 1.5
    direction = None
    if matters and pairing == "negative":
        direction = "large variances in small cells: the classical F is liberal"
    elif matters and pairing == "positive":
        direction = "large variances in large cells: the classical F is conservative"
    v["direction"] = direction
    bf_p = (v["brown_forsythe"] or {}).get("p")
    if v["bartlett_adjusted"] is not None:
        bart_p, bart_kind = v["bartlett_adjusted"].get("p"), "kurtosis-adjusted"
    elif fit.obs is None:
        bart_p, bart_kind = v["bartlett"].get("p"), "normal-theory"
    else:
        bart_p, bart_kind = None, None
    grade = grade_homogeneity(r_sd=r_sd, r_n=r_n, pairing=pairing, level=bl["level"], level_null=v["f_level_null"],
                              alpha=fit.alpha, null95=null95, bf_p=bf_p, bartlett_p=bart_p, bartlett_kind=bart_kind)
    v["within_chance"] = grade.chance
    v["grade"] = {"basis": grade.basis, "band": grade.band, "chance": grade.chance, "tests": list(grade.tests)}
    facts = HomogeneityFacts(
        sd_ratio=r_sd, n_ratio=r_n, unequal_variances=bool((not grade.chance) or grade.tests),
        pairing=pairing if pairing in ("negative", "positive") else "none",
        distorts_classical=grade.severity in ("concern", "critical") and grade.basis != "zero_spread")
    return Diagnostic(id="homogeneity", severity=grade.severity, summary=word_homogeneity(grade, v, fit.alpha),
                      values=v, facts=facts)
