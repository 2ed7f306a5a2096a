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
condition                                                        severity  source
================================================================ ========= ===============
nothing dropped                                                  ok        -
rows dropped, loss does not differ across cells (p >= 0.05) and  note      common practice
overall loss <= 20%
loss differs (p < 0.05), or overall loss > 20%, or rows with a   warning   common practice
missing factor
loss differs (p < 0.05) and the per-cell loss rates span more    serious   common practice
than 20 percentage points
================================================================ ========= ===============

The loss test is Pearson's chi-square on the 2 x m table of kept vs dropped
rows per cell, without continuity correction (scipy.stats.chi2_contingency,
correction=False); Cochran's (1954) rule (every expected count >= 1 and at most
20% below 5) is checked and reported.

independence: cannot be verified from the data (design matter: randomisation,
one observation per experimental unit).

============================================================ ========= ===============
condition                                                    severity  source
============================================================ ========= ===============
a unit column with some unit observed more than once         serious   Hurlbert 1984
                                                                       (pseudo-
                                                                       replication)
run order given: runs test p < 0.05 or |lag-1 r| >= 0.2      warning   common practice
run order given: |lag-1 r| >= 0.5                            serious   common practice
exact duplicate rows with a continuous-looking response      warning   common practice
(distinct values >= half of N)
exact duplicate rows otherwise (discrete scales repeat)      note      common practice
no order and no unit column                                  note      -
order/unit given and nothing found                           ok        -
============================================================ ========= ===============

Runs test: Wald & Wolfowitz (1940) on residuals above / below their median in
run order (values equal to the median left out), normal approximation without
continuity correction.  Durbin-Watson (1950) d = sum (e_t - e_{t-1})^2 /
sum e_t^2, reported with the lag-1 autocorrelation r1 = sum e_t e_{t-1} / sum
e_t^2 and its approximate p from r1 sqrt(N) ~ N(0, 1) (Box & Jenkins, large
sample; common practice).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..design import balance_class, is_connected
from ..fit import Fit
from ..results import Diagnostic
from .assumptions import NEEDS_DATA, _cell_labels, _num

__all__ = ["balance", "missingness", "independence", "runs_test", "durbin_watson"]

SMALL_CELL = 5
RATIO_LIMIT = 4.0
LOSS_SPAN = 0.20
LOSS_OVERALL = 0.20
LAG1_WARN, LAG1_SERIOUS = 0.2, 0.5
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
        sev = "serious"
        if df_e == 0:
            cons = "no within-cell replication, so the classical interaction F cannot be formed"
        elif df_ab <= 0:
            cons = "the filled cells leave no df for the interaction; it cannot be tested"
        else:
            cons = "the filled cells do not connect the levels, so effects cannot be compared across the parts"
    elif empty or small or ratio > RATIO_LIMIT:
        sev = "warning"
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
        sev = "note"
        cons = f"unequal cell sizes (ratio {ratio:.2f}): {ss}"
    else:
        sev = "ok"
        cons = ss
    summary = f"Balance ({cls}, {c.N} observations in {c.m} of {c.J * c.K} cells): {cons}."
    return Diagnostic(id="balance", severity=sev, summary=summary, values=v)


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
        return Diagnostic(id="missingness", severity="note",
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
            return Diagnostic(id="missingness", severity="ok",
                              summary="Missingness: no rows were dropped, so missing data cannot bias the "
                                      "interaction test.", values=v)
        sev = "warning" if d.missing_factor else "note"
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
        sev = "serious"
    elif differs or overall > LOSS_OVERALL or d.missing_factor:
        sev = "warning"
    else:
        sev = "note"
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


def independence(fit: Fit) -> Diagnostic:
    """What can and cannot be said about independence of the observations.

    values keys: caveat, order_column, unit_column, runs {runs, n_above,
    n_below, expected, z, p} or None, durbin_watson {statistic, lag1_r,
    lag1_p} or None, units, repeated_units, rows_in_repeated_units,
    max_rows_per_unit, duplicate_rows, distinct_response_share.
    """
    v: dict = {"caveat": INDEPENDENCE_CAVEAT}
    if fit.obs is None:
        v["reason"] = NEEDS_DATA
        return Diagnostic(id="independence", severity="note",
                          summary=f"Independence: run order and units {NEEDS_DATA}. " + INDEPENDENCE_CAVEAT,
                          values=v)
    obs = fit.obs
    v["order_column"] = obs.order_name
    v["unit_column"] = obs.unit_name
    sev = "ok"
    findings: list[str] = []
    checked: list[str] = []
    v["runs"] = v["durbin_watson"] = None
    if obs.order is not None:
        idx = np.argsort(obs.order, kind="stable")
        e = fit.resid_full[idx]
        # residuals of n = 1 cells are 0 by construction: leave them out of the sequence
        e = e[fit.cells.counts.ravel()[obs.cell[idx]] >= 2]
        rt = runs_test(e)
        dw = durbin_watson(e)
        v["runs"], v["durbin_watson"] = rt, dw
        checked.append(f"run order ({obs.order_name})")
        r1 = dw.get("lag1_r")
        if r1 is not None and abs(r1) >= LAG1_SERIOUS:
            sev = "serious"
            findings.append(f"strong serial correlation in run order (lag-1 r = {r1:.2f}, Durbin-Watson "
                            f"{dw['statistic']:.2f})")
        elif (rt.get("p") is not None and rt["p"] < 0.05) or (r1 is not None and abs(r1) >= LAG1_WARN):
            sev = "warning"
            findings.append(f"residuals drift with run order (runs test p = {rt['p']:.3g}, lag-1 r = "
                            f"{r1:.2f}, Durbin-Watson {dw['statistic']:.2f})" if rt.get("p") is not None and
                            r1 is not None else "residuals drift with run order")
    if obs.unit is not None:
        cnt = np.bincount(obs.unit)
        rep = cnt > 1
        v["units"] = int(cnt.size)
        v["repeated_units"] = int(rep.sum())
        v["rows_in_repeated_units"] = int(cnt[rep].sum())
        v["max_rows_per_unit"] = int(cnt.max())
        checked.append(f"units ({obs.unit_name})")
        if rep.any():
            sev = "serious"
            findings.append(f"{int(rep.sum())} unit(s) of '{obs.unit_name}' contribute more than one row "
                            f"(up to {int(cnt.max())}): pseudo-replication, the interaction F treats "
                            "correlated rows as independent and its p-value is too small")
    dup = int(obs.duplicate_rows)
    v["duplicate_rows"] = dup
    n = len(obs)
    distinct = float(np.unique(obs.y).size / n) if n else 0.0
    v["distinct_response_share"] = distinct
    if dup:
        if distinct >= 0.5:
            sev = "warning" if sev in ("ok", "note") else sev
            findings.append(f"{dup} exact duplicate row(s) with a continuous response: check for double entry")
        else:
            sev = "note" if sev == "ok" else sev
            findings.append(f"{dup} exact duplicate row(s) (common on a discrete response scale; check for "
                            "double entry)")
    if not checked:
        sev = "note" if sev == "ok" else sev
        head = "no run-order or unit column was given, so nothing about independence was tested"
    elif not findings:
        head = "no sign of dependence in " + " or ".join(checked)
    else:
        head = ""
    body = "; ".join(x for x in (head, *findings) if x)
    summary = f"Independence: {body}. {INDEPENDENCE_CAVEAT}"
    return Diagnostic(id="independence", severity=sev, summary=summary, values=v)
