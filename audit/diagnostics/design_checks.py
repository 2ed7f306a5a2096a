"""Diagnostics of the design: balance, missingness and independence.

Each function takes a :class:`audit.fit.Fit` and returns a
:class:`audit.results.Diagnostic` whose ``id`` is the function name.

Grading rules
-------------
balance (cell counts n_jk; size ratio = largest / smallest non-empty cell):

======================================================== ========= ================
condition                                                severity  source
======================================================== ========= ================
balanced or proportional, no empty cell, every n >= 5     ok        common practice
unbalanced, every cell n >= 5, size ratio <= 4            note      common practice
an empty cell, a cell with n < 5 (incl. n = 1), or size   warning   common practice
ratio > 4
no within-cell df (all n = 1), interaction df = 0, or     serious   common practice
the filled cells do not connect the levels
======================================================== ========= ================

Consequence for SS types (Searle 1987, from memory): with every cell filled
SS_AB is the same under Types I, II and III, so the interaction test does not
depend on the SS type; main effects do unless the design is balanced (all
agree) or proportional (Types I and II agree).  Unequal cell sizes make the
interaction F sensitive to unequal variances (Box 1954; Glass, Peckham &
Sanders 1972).

missingness (rows dropped at intake for a missing response, per cell):

================================================================ ========= ===============
condition                                                    severity  source
============================================================ ========= ===============
a unit column with some unit observed more than once         serious   Hurlbert 1984
                                                                       (pseudo-
                                                                       replication)
run order: lag-1 r >= 0.5 (strong drift/clustering)          serious   common practice
run order: lag-1 r >= 0.2, or runs test p < 0.05 with too    warning   common practice
few runs (drift or clustering)
run order: lag-1 r <= -0.5, or r <= -0.2 confirmed by the    warning   our choice
runs test (too many runs) or by lag-1 p < 0.05 (alternation)
run order: r <= -0.2 unconfirmed, or too many runs with      note      our choice
|r| < 0.2 (possible alternation, not drift)
repeated values within cells far beyond what the recording   warning   our choice
resolution and the cell spreads give (rule below)
no order and no unit column                                  note      -
order/unit given and nothing found (said explicitly, e.g.    ok        -
"each unit contributes exactly one row")
============================================================ ========= ===============

Runs test: Wald & Wolfowitz (1940) on residuals above / below their median in
run order (values equal to the median left out), normal approximation without
continuity correction.  Durbin-Watson (1950) d = sum (e_t - e_{t-1})^2 /
sum e_t^2, reported with the lag-1 autocorrelation r1 = sum e_t e_{t-1} / sum
e_t^2 and its approximate p from r1 sqrt(N) ~ N(0, 1) (Box & Jenkins, large
sample; common practice).  A positive r1 (neighbours alike) is called drift or
clustering; a negative r1 (neighbours on opposite sides) is called alternation,
never drift.  Alternation is graded one step milder unless the runs test or the
lag-1 test confirms it (our choice): slow drift is the usual failure (instrument
drift, fatigue, learning) and confounds with factors run in blocks, while a
randomised run order averages a run-to-run alternation out of the cell means;
alternation points to conditions used in turn (two instruments, operators).

Repeated values (possible double entry).  Data recorded to whole units or to
0.1 repeat values by chance, so repeats are judged against the recording
resolution (common practice: the resolution is the unit the values were
recorded in), found by :func:`recording_resolution`: the step of the decimal
grid the values sit on (fewest decimals <= 6, times the gcd of the gaps), else
the smallest gap between distinct values when fewer than half are distinct,
else 0 (full-precision values: a repeat is never expected).  The expected
number of repeats (n - distinct values, per cell, summed) is computed for
normal cells with the cell's mean and SD (Sheppard's correction s^2 - step^2/12)
recorded on that grid (exact bin probabilities; the continuous limit when
SD / step > 500).  Repeats are suspicious when P(Poisson(2 x expected) >=
observed) < 0.001 (our choice: the factor 2 covers skewed and peaked cells,
which repeat more often than normal ones - an exponential cell about 1.8 times
as often - and the small p leaves room for values heaped on round numbers).
Repeats within the expectation are mentioned, not graded.  R's warpbreaks
(integer counts) and ToothGrowth (lengths to 0.1) each hold 5 repeats against
about 6.3 and 2.3 expected: no warning.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from ..design import balance_class, cell_moments, is_connected
from ..fit import Fit
from ..facts import BalanceFacts, IndependenceFacts
from ..results import NOT_RUN, Diagnostic
from .assumptions import NEEDS_DATA, _cell_labels, _num, _worse

__all__ = ["balance", "missingness", "independence", "runs_test", "durbin_watson", "recording_resolution",
           "repeated_values"]

SMALL_CELL = 5
RATIO_LIMIT = 4.0
LOSS_SPAN = 0.20
LOSS_OVERALL = 0.20
LAG1_WARN, LAG1_SERIOUS = 0.2, 0.5
#: repeated values are judged against DUP_SAFETY times the normal-model
#: expectation (other shapes tie more often: our choice, see module notes)
DUP_SAFETY = 2.0
#: ... and called suspicious when P(Poisson(DUP_SAFETY * expected) >= observed) < DUP_P (our choice)
DUP_P = 0.001
RESOLUTION_MAX_DECIMALS = 6
INDEPENDENCE_CAVEAT = ("Independence of observations cannot be verified from the data; it rests on the design "
                       "(randomisation, one observation per experimental unit).")


# ---------------------------------------------------------------------------
# balance
# ---------------------------------------------------------------------------

def balance(fit: Fit) -> Diagnostic:
    """Cell counts and what their pattern means for the interaction test.

    values keys: counts (J x K list), n, size_ratio, balance ('balanced'|
    'proportional'|'unbalanced'), empty_cells, single_cells, small_cells
    (1 <= n < 5), connected, df_interaction, df_error, ss_types (sentence).
    Works from cell statistics (summary mode too).
    """
    c = fit.cells
    counts = c.counts
    nz = counts[counts > 0]
    cls = balance_class(counts)
    ratio = float(nz.max() / nz.min())
    empty = _cell_labels(fit, counts == 0)
    single = _cell_labels(fit, counts == 1)
    small = _cell_labels(fit, (counts >= 1) & (counts < SMALL_CELL))
    connected = is_connected(counts > 0)
    df_ab = int(fit.anova.df_interaction)
    df_e = int(fit.anova.df_error)
    if cls == "balanced":
        ss = "balanced: Types I, II and III sums of squares agree for every effect"
    elif cls == "proportional":
        ss = ("proportional cell sizes: Types I and II agree for the main effects; the interaction SS is the "
              "same under every type")
    elif empty:
        ss = ("empty cells: the interaction is tested on fewer df, on only the contrasts the filled cells "
              "identify; Type III main effects are not estimable")
    else:
        ss = ("unbalanced: main-effect tests differ between SS Types I, II and III, but the interaction SS is "
              "the same under every type")
    v = {"counts": counts.tolist(), "n": int(c.N), "size_ratio": ratio, "balance": cls, "empty_cells": empty,
         "single_cells": single, "small_cells": small, "small_cell_limit": SMALL_CELL, "connected": connected,
         "df_interaction": df_ab, "df_error": df_e, "ss_types": ss}
    if df_e == 0 or df_ab <= 0 or not connected:
        sev = "critical"
        if df_e == 0:
            cons = "no within-cell replication, so the classical interaction F cannot be formed"
        elif df_ab <= 0:
            cons = "the filled cells leave no df for the interaction; it cannot be tested"
        else:
            cons = "the filled cells do not connect the levels, so effects cannot be compared across the parts"
    elif empty or small or ratio > RATIO_LIMIT:
        sev = "concern"
        bits = []
        if empty:
            bits.append(f"{len(empty)} empty cell(s)")
        if single:
            bits.append(f"{len(single)} cell(s) with n = 1")
        if len(small) > len(single):
            bits.append(f"{len(small) - len(single)} {'other ' if single else ''}cell(s) with n < {SMALL_CELL}")
        if ratio > RATIO_LIMIT:
            bits.append(f"cell sizes differ by a factor of {ratio:.1f}")
        kind = "small and unequal cells make" if cls == "unbalanced" else "small cells make"
        cons = (", ".join(bits) + f": {kind} the interaction F sensitive to unequal variances and to single "
                "observations")
    elif cls == "unbalanced":
        sev = "minor"
        cons = f"unequal cell sizes (ratio {ratio:.2f}): {ss}"
    else:
        sev = "clear"
        cons = ss
    summary = f"Balance ({cls}, {c.N} observations in {c.m} of {c.J * c.K} cells): {cons}."
    filled = c.counts[c.counts > 0]
    facts = BalanceFacts(min_n=int(filled.min()) if filled.size else 0, empty_cells=len(empty),
                         single_cells=len(single))
    return Diagnostic(id="balance", severity=sev, summary=summary, values=v, facts=facts)


# ---------------------------------------------------------------------------
# missingness
# ---------------------------------------------------------------------------

def missingness(fit: Fit) -> Diagnostic:
    """Rows lost to missing values, per cell, and whether loss differs across cells.

    values keys: dropped_by_cell (J x K list), kept_by_cell, loss_rate_by_cell
    (None where a cell had no rows), dropped_total, missing_factor,
    missing_other, overall_loss, loss_span, chi2 {statistic, df, p,
    min_expected, cochran_ok} or None, chi2_reason.
    """
    if fit.obs is None:
        return Diagnostic(id="missingness", severity=NOT_RUN,
                          summary=f"Missingness {NEEDS_DATA}; a table of cell summaries cannot show rows lost "
                                  "before it was made.", values={"reason": NEEDS_DATA})
    d = fit.obs.dropped
    miss = np.asarray(d.missing_response, dtype=np.int64)
    kept = fit.cells.counts.astype(np.int64)
    tot = kept + miss
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = np.where(tot > 0, miss / np.maximum(tot, 1), np.nan)
    v = {
        "dropped_by_cell": miss.tolist(),
        "kept_by_cell": kept.tolist(),
        "loss_rate_by_cell": [[_num(x) for x in row] for row in rate],
        "dropped_total": int(miss.sum()),
        "missing_factor": int(d.missing_factor),
        "missing_other": int(d.missing_other),
    }
    overall = float(miss.sum() / tot.sum()) if tot.sum() else 0.0
    v["overall_loss"] = overall
    present = tot > 0
    span = float(np.nanmax(rate) - np.nanmin(rate)) if present.any() else 0.0
    v["loss_span"] = span
    if miss.sum() == 0:
        v["chi2"] = None
        v["chi2_reason"] = "no rows with a missing response"
        if d.missing_factor == 0 and d.missing_other == 0:
            return Diagnostic(id="missingness", severity="clear",
                              summary="Missingness: no rows were dropped, so missing data cannot bias the "
                                      "interaction test.", values=v)
        sev = "concern" if d.missing_factor else "minor"
        extra = []
        if d.missing_factor:
            extra.append(f"{d.missing_factor} row(s) with a missing factor value belong to no cell")
        if d.missing_other:
            extra.append(f"{d.missing_other} row(s) missing the order/unit value")
        return Diagnostic(id="missingness", severity=sev,
                          summary="Missingness: " + "; ".join(extra) + " and were dropped; if their loss is "
                                  "related to the response the cell means are biased.", values=v)
    table = np.vstack([kept[present], miss[present]])
    nz_cols = table.sum(axis=0) > 0
    table = table[:, nz_cols]
    if table.shape[1] < 2:
        v["chi2"] = None
        v["chi2_reason"] = "fewer than two cells had rows"
        p = None
    else:
        res = stats.chi2_contingency(table, correction=False)
        exp = res.expected_freq
        cochran = bool(exp.min() >= 1 and np.mean(exp < 5) <= 0.2)
        v["chi2"] = {"statistic": _num(res.statistic), "df": int(res.dof), "p": _num(res.pvalue),
                     "min_expected": float(exp.min()), "cochran_ok": cochran}
        v["chi2_reason"] = None
        p = _num(res.pvalue)
    differs = p is not None and p < 0.05
    if differs and span > LOSS_SPAN:
        sev = "critical"
    elif differs or overall > LOSS_OVERALL or d.missing_factor:
        sev = "concern"
    else:
        sev = "minor"
    ptxt = f" (chi-square p = {p:.3g}{'' if v['chi2']['cochran_ok'] else ', small expected counts: approximate'})" \
        if p is not None else ""
    what = (f"{int(miss.sum())} row(s) ({overall:.1%}) dropped for a missing response; loss "
            f"{'differs' if differs else 'does not clearly differ'} across cells{ptxt}")
    if d.missing_factor:
        what += f"; {d.missing_factor} more row(s) with a missing factor belong to no cell"
    cons = ("unequal loss can bias the cell means and so the interaction if missingness depends on the response"
            if differs else "the interaction test is unbiased only if the values are missing at random")
    return Diagnostic(id="missingness", severity=sev, summary=f"Missingness: {what}: {cons}.", values=v)


# ---------------------------------------------------------------------------
# independence
# ---------------------------------------------------------------------------

def runs_test(x: np.ndarray) -> dict:
    """Wald-Wolfowitz runs test of x above / below its median (values equal to
    the median left out), normal approximation, no continuity correction
    (Wald & Wolfowitz 1940).  Returns {runs, n_above, n_below, expected, z, p}."""
    x = np.asarray(x, dtype=float)
    med = float(np.median(x))
    s = x[x != med] > med
    n1, n2 = int(s.sum()), int((~s).sum())
    if n1 == 0 or n2 == 0:
        return {"runs": None, "n_above": n1, "n_below": n2, "expected": None, "z": None, "p": None,
                "reason": "all residuals on one side of the median"}
    R = int(1 + np.count_nonzero(s[1:] != s[:-1]))
    n = n1 + n2
    mu = 2.0 * n1 * n2 / n + 1.0
    var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * (n - 1.0))
    if var <= 0:
        return {"runs": R, "n_above": n1, "n_below": n2, "expected": mu, "z": None, "p": None,
                "reason": "too few residuals for the normal approximation"}
    z = (R - mu) / np.sqrt(var)
    return {"runs": R, "n_above": n1, "n_below": n2, "expected": mu, "z": _num(z),
            "p": _num(2.0 * stats.norm.sf(abs(z)))}


def durbin_watson(e: np.ndarray) -> dict:
    """Durbin-Watson d and the lag-1 autocorrelation of residuals in order.
    Returns {statistic, lag1_r, lag1_p}."""
    e = np.asarray(e, dtype=float)
    ss = float(np.dot(e, e))
    if ss == 0.0 or e.size < 3:
        return {"statistic": None, "lag1_r": None, "lag1_p": None, "reason": "residuals are all zero or too few"}
    diff = np.diff(e)
    d = float(np.dot(diff, diff)) / ss
    r1 = float(np.dot(e[1:], e[:-1])) / ss
    p = float(2.0 * stats.norm.sf(abs(r1) * np.sqrt(e.size)))
    return {"statistic": d, "lag1_r": r1, "lag1_p": p}


def recording_resolution(y: np.ndarray) -> tuple[float, str]:
    """The step to which the response was recorded, and how it was found.

    1. Decimal grid: the fewest decimals d <= 6 for which every value is
       exactly a multiple of 10^-d (x == round(x 10^d) / 10^d in floating point,
       which holds for every value parsed from text with d decimals); the step
       is 10^-d times the greatest common divisor of the gaps between the
       sorted distinct values (so counts in steps of 2, or halves, are found).
    2. Otherwise the values carry more digits than recorded data do (computed
       values): when fewer than half of them are distinct they still sit on a
       few points (a transformed discrete scale) and the step is the smallest
       positive gap between sorted distinct values; else 0 (continuous: exact
       repeats are not expected).
    Returns (step, basis sentence).  Common practice: a measurement's
    resolution is the unit it was recorded in.
    """
    y = np.asarray(y, dtype=float)
    u = np.unique(y)
    if u.size < 2:
        return 0.0, "the response is constant"
    for d in range(0, RESOLUTION_MAX_DECIMALS + 1):
        scale = 10.0 ** d
        k = np.round(u * scale)
        if np.max(np.abs(k)) >= 2.0 ** 52:
            break
        if np.array_equal(k / scale, u):
            step = float(np.gcd.reduce(np.diff(k).astype(np.int64))) / scale
            return step, f"values recorded in steps of {step:g}"
    if u.size < 0.5 * y.size:
        step = float(np.min(np.diff(u)))
        return step, (f"values sit on {u.size} distinct points; smallest gap between them {step:.4g}")
    return 0.0, "values carry full precision (no recording grid found): exact repeats are not expected"


def _expected_repeats(n: int, mean: float, sd: float, step: float, origin: float) -> float:
    """Expected number of repeated values (n - distinct values) among n draws
    from a normal distribution (mean, sd) recorded on the grid origin + k step.

    Exact bin probabilities while sd / step <= 500; beyond, the continuous
    limit E[distinct] = (sd / step) * integral (1 - exp(-n (step / sd) phi(z))) dz.
    """
    if n < 2 or step <= 0.0:
        return 0.0
    if sd <= 0.0:
        return float(n - 1)
    ratio = sd / step
    if ratio <= 500.0:
        k0 = math.floor((mean - 8.0 * sd - origin) / step) - 1
        k1 = math.ceil((mean + 8.0 * sd - origin) / step) + 1
        edges = origin + (np.arange(k0, k1 + 2) - 0.5) * step
        p = np.diff(stats.norm.cdf((edges - mean) / sd))
        distinct = float(np.sum(-np.expm1(n * np.log1p(-np.minimum(p, 1.0 - 1e-16)))))
    else:
        z = np.linspace(-8.0, 8.0, 4001)
        f = -np.expm1(-n * stats.norm.pdf(z) / ratio)
        distinct = ratio * float(np.sum((f[1:] + f[:-1]) * 0.5) * (z[1] - z[0]))
    return max(float(n) - distinct, 0.0)


def _expected_repeats_total(n, mean, sd, step: float, origin: float) -> float:
    """Sum of :func:`_expected_repeats` over cells (arrays n, mean, sd), vectorised in
    blocks of cells (a few MB at a time) instead of one call per cell: the same bins
    and the same integral, so the same number to rounding."""
    n = np.asarray(n, dtype=float)
    mean = np.asarray(mean, dtype=float)
    sd = np.asarray(sd, dtype=float)
    use = n >= 2
    if step <= 0.0 or not use.any():
        return 0.0
    n, mean, sd = n[use], mean[use], sd[use]
    total = float(np.sum(np.where(sd <= 0.0, n - 1.0, 0.0)))
    live = sd > 0.0
    n, mean, sd = n[live], mean[live], sd[live]
    ratio = sd / step
    exact = ratio <= 500.0
    # continuous limit: cells x 4001 nodes, in blocks
    z = np.linspace(-8.0, 8.0, 4001)
    pdf = stats.norm.pdf(z)
    dz = z[1] - z[0]
    nc, rc = n[~exact], ratio[~exact]
    for lo in range(0, nc.size, 256):
        f = -np.expm1(-nc[lo:lo + 256, None] * pdf[None, :] / rc[lo:lo + 256, None])
        distinct = rc[lo:lo + 256] * (np.sum((f[:, 1:] + f[:, :-1]) * 0.5, axis=1) * dz)
        total += float(np.sum(np.maximum(nc[lo:lo + 256] - distinct, 0.0)))
    # exact bins: each cell's own grid range, padded to the longest in the block
    ne, me, se = n[exact], mean[exact], sd[exact]
    k0 = np.floor((me - 8.0 * se - origin) / step) - 1
    k1 = np.ceil((me + 8.0 * se - origin) / step) + 1
    nb = (k1 - k0 + 1).astype(np.int64)                   # bins per cell (edges nb + 1)
    order = np.argsort(nb)
    i = 0
    while i < order.size:
        width = int(nb[order[min(order.size - 1, i + 255)]])
        rows = max(1, min(256, (1 << 20) // (width + 1)))
        idx = order[i:i + rows]
        width = int(nb[idx].max())
        pos = np.minimum(np.arange(width + 1)[None, :], nb[idx][:, None])   # padding repeats the last edge
        edges = origin + (k0[idx][:, None] + pos - 0.5) * step
        p = np.diff(stats.norm.cdf((edges - me[idx][:, None]) / se[idx][:, None]), axis=1)
        distinct = np.sum(-np.expm1(ne[idx][:, None] * np.log1p(-np.minimum(p, 1.0 - 1e-16))), axis=1)
        total += float(np.sum(np.maximum(ne[idx] - distinct, 0.0)))
        i += rows
    return total


def repeated_values(y: np.ndarray, cell: np.ndarray, counts: np.ndarray, y_original: np.ndarray | None = None) -> dict:
    """Repeated response values within cells against what the recording
    resolution and the cell spreads make likely (module notes).

    Returns {duplicate_rows, expected, p, resolution, resolution_basis,
    suspicious}.  ``p`` = P(Poisson(2 * expected) >= duplicate_rows).  When
    ``y`` (centred) shows no grid, the resolution is sought in ``y_original``.
    """
    y = np.asarray(y, dtype=float)
    cell = np.asarray(cell)
    order = np.lexsort((y, cell))
    ys, cs = y[order], cell[order]
    dup = int(np.count_nonzero((cs[1:] == cs[:-1]) & (ys[1:] == ys[:-1]))) if y.size > 1 else 0
    step, basis = recording_resolution(y)
    if step == 0.0 and y_original is not None:
        # a response centred in floating point at intake loses its decimal grid; the original keeps it
        step, basis = recording_resolution(y_original)
    JK = counts.size
    n, mean, css = cell_moments(y, cell, JK)
    origin = float(y.min()) if y.size else 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        s2 = np.where(n >= 2, css / np.maximum(n - 1.0, 1.0), 0.0)
    # Sheppard's correction: rounding to a step adds step^2 / 12 to the variance (common practice)
    sd = np.sqrt(np.maximum(s2 - step * step / 12.0, (step / 4.0) ** 2)) if step > 0 else np.sqrt(s2)
    sd = np.where(s2 <= 0.0, 0.0, sd)
    expected = _expected_repeats_total(n, mean, sd, step, origin)
    if dup == 0:
        p = 1.0
    elif expected <= 0.0:
        p = 0.0
    else:
        p = float(stats.poisson.sf(dup - 1, DUP_SAFETY * expected))
    return {"duplicate_rows": dup, "expected": expected, "p": p, "resolution": step,
            "resolution_basis": basis, "suspicious": bool(dup > 0 and p < DUP_P)}


def _serial(rt: dict, dw: dict) -> tuple[str, str | None, str | None]:
    """Grade serial dependence in run order: (severity, kind, sentence).

    kind: 'drift' (positive lag-1 correlation or too few runs: neighbouring
    residuals alike), 'alternation' (negative lag-1 correlation or too many
    runs: neighbours tend to lie on opposite sides), or None.
    """
    r1 = dw.get("lag1_r")
    rp, rz = rt.get("p"), rt.get("z")
    runs_sig = rp is not None and rp < 0.05
    few_runs = runs_sig and rz is not None and rz < 0
    many_runs = runs_sig and rz is not None and rz > 0
    lag_sig = dw.get("lag1_p") is not None and dw["lag1_p"] < 0.05
    dws = f", Durbin-Watson {dw['statistic']:.2f}" if dw.get("statistic") is not None else ""
    rtxt = f"runs test p = {rp:.3g}" if rp is not None else "runs test not available"
    r1txt = f"lag-1 r = {r1:.2f}" if r1 is not None else "lag-1 r not available"
    if r1 is not None and r1 >= LAG1_SERIOUS:
        return "critical", "drift", (f"strong positive serial correlation in run order: neighbouring residuals "
                                    f"are alike, as with drift or clustering ({r1txt}{dws}, {rtxt})")
    if (r1 is not None and r1 >= LAG1_WARN) or few_runs:
        return "concern", "drift", (f"residuals drift or cluster in run order: neighbours are alike "
                                    f"({rtxt}, {r1txt}{dws})")
    if r1 is not None and r1 <= -LAG1_SERIOUS:
        return "concern", "alternation", (f"strong negative serial correlation in run order: residuals "
                                          f"alternate from run to run ({r1txt}{dws}, {rtxt}); look for "
                                          "conditions used in turn (two instruments, operators or batches)")
    if r1 is not None and r1 <= -LAG1_WARN and (many_runs or lag_sig):
        return "concern", "alternation", (f"residuals alternate in run order (negative serial correlation: "
                                          f"{r1txt}, lag-1 p = {dw['lag1_p']:.3g}{dws}, {rtxt}); look for "
                                          "conditions used in turn")
    if r1 is not None and r1 <= -LAG1_WARN:
        return "minor", "alternation", (f"negative serial correlation in run order ({r1txt}, lag-1 p = "
                                       f"{dw['lag1_p']:.3g}{dws}) that the runs test does not confirm ({rtxt}): "
                                       "residuals may alternate from run to run")
    if many_runs:
        return "minor", "alternation", (f"more runs above/below the median than chance gives ({rtxt}, {r1txt}): "
                                       "residuals may alternate from run to run")
    return "clear", None, None


def independence(fit: Fit) -> Diagnostic:
    """What can and cannot be said about independence of the observations.

    values keys: caveat, order_column, unit_column, runs {runs, n_above,
    n_below, expected, z, p} or None, durbin_watson {statistic, lag1_r,
    lag1_p} or None, serial_pattern ('drift' | 'alternation' | None), units,
    repeated_units, rows_in_repeated_units, max_rows_per_unit, units_passed
    (True when a unit column was given and each unit has one row; None
    without one), duplicate_rows (repeated response values within cells),
    duplicates_expected, duplicates_p, duplicates_suspicious, resolution,
    resolution_basis, distinct_response_share.
    """
    v: dict = {"caveat": INDEPENDENCE_CAVEAT}
    if fit.obs is None:
        v["reason"] = NEEDS_DATA
        return Diagnostic(id="independence", severity=NOT_RUN,
                          summary=f"Independence: run order and units {NEEDS_DATA}. " + INDEPENDENCE_CAVEAT,
                          values=v, facts=IndependenceFacts(checked=False, pseudo_replication=False,
                                                            serial_dependence=False))
    obs = fit.obs
    v["order_column"] = obs.order_name
    v["unit_column"] = obs.unit_name
    sev = "clear"
    findings: list[str] = []
    passed: list[str] = []
    infos: list[str] = []
    checked: list[str] = []
    v["runs"] = v["durbin_watson"] = None
    v["serial_pattern"] = None
    v["units_passed"] = None
    if obs.order is not None:
        idx = np.argsort(obs.order, kind="stable")
        e = fit.resid_full[idx]
        # residuals of n = 1 cells are 0 by construction: leave them out of the sequence
        e = e[fit.cells.counts.ravel()[obs.cell[idx]] >= 2]
        rt = runs_test(e)
        dw = durbin_watson(e)
        v["runs"], v["durbin_watson"] = rt, dw
        checked.append(f"run order ({obs.order_name})")
        s_sev, kind, sentence = _serial(rt, dw)
        v["serial_pattern"] = kind
        if sentence:
            sev = _worse(sev, s_sev)
            findings.append(sentence)
        else:
            passed.append(f"no drift or alternation in run order ({obs.order_name})")
    if obs.unit is not None:
        cnt = np.bincount(obs.unit)
        rep = cnt > 1
        v["units"] = int(cnt.size)
        v["repeated_units"] = int(rep.sum())
        v["rows_in_repeated_units"] = int(cnt[rep].sum())
        v["max_rows_per_unit"] = int(cnt.max())
        v["units_passed"] = not bool(rep.any())
        checked.append(f"units ({obs.unit_name})")
        if rep.any():
            sev = "critical"
            findings.append(f"{int(rep.sum())} unit(s) of '{obs.unit_name}' contribute more than one row "
                            f"(up to {int(cnt.max())}): pseudo-replication, the interaction F treats "
                            "correlated rows as independent and its p-value is too small")
        else:
            passed.append(f"each of the {int(cnt.size)} units of '{obs.unit_name}' contributes exactly one row, "
                          "so the data show no pseudo-replication as labelled")
    n = len(obs)
    rv = repeated_values(obs.y, obs.cell, fit.cells.counts.ravel(),
                         obs.y_original if obs.offset else None)
    v["duplicate_rows"] = rv["duplicate_rows"]
    v["duplicates_expected"] = _num(rv["expected"])
    v["duplicates_p"] = _num(rv["p"])
    v["duplicates_suspicious"] = rv["suspicious"]
    v["resolution"] = _num(rv["resolution"])
    v["resolution_basis"] = rv["resolution_basis"]
    v["distinct_response_share"] = float(np.unique(obs.y).size / n) if n else 0.0
    dup = rv["duplicate_rows"]
    if rv["suspicious"]:
        sev = _worse(sev, "concern")
        if rv["expected"] > 0:
            findings.append(f"{dup} repeated value(s) within cells where about {rv['expected']:.1f} are expected "
                            f"from the recording resolution and the cell spreads ({rv['resolution_basis']}; "
                            f"p = {rv['p']:.2g}): check for rows entered twice or values heaped on round numbers")
        else:
            findings.append(f"{dup} exact duplicate row(s) although the {rv['resolution_basis']}: check for "
                            "rows entered twice")
    elif dup:
        infos.append(f"{dup} repeated value(s) within cells are what the recording resolution gives "
                     f"({rv['resolution_basis']}; about {rv['expected']:.1f} expected), not a sign of double entry")
    if not checked:
        sev = _worse(sev, "minor")
        head = "no run-order or unit column was given, so nothing about independence was tested"
    else:
        head = ""
    body = "; ".join(x for x in (head, *findings, *passed, *infos) if x)
    summary = f"Independence: {body}. {INDEPENDENCE_CAVEAT}"
    facts = IndependenceFacts(checked=bool(checked), pseudo_replication=v["units_passed"] is False,
                              serial_dependence=v["serial_pattern"] is not None)
    return Diagnostic(id="independence", severity=sev, summary=summary, values=v, facts=facts)
