"""Outliers, influence and fragility of the interaction test (METHODS.md section 8).

Three pure functions of a :class:`audit.fit.Fit`, each returning a
:class:`audit.results.Diagnostic`:

* :func:`outliers` - studentized deleted residuals of the full (cell-means)
  model with a Bonferroni cut-off, and Cook's distance.
* :func:`influence` - the interaction p-value with each observation left out,
  computed exactly without refitting over the observations.
* :func:`fragility` - the smallest number of deletions, chosen greedily by
  their effect on the interaction F, that flips the decision at alpha.

How leave-one-out is computed
-----------------------------
Deleting observation i from cell c changes only that cell's sufficient
statistics: n_c -> n_c - 1, ybar_c -> ybar_c - d_i / (n_c - 1) and
css_c -> css_c - n_c d_i^2 / (n_c - 1), with d_i = y_i - ybar_c.  The interaction
sum of squares is Q(A+B) = SSE(additive) - SSE(cell means).  The cell-means
model's leverage is 1/n_c; the additive model's leverage g_c and cell residual
R_c come from one weighted least-squares solve on the cell means (its normal
equations reduced to at most min(J, K) - 1 unknowns).  The deleted-observation
identities SSE(-i) = SSE - e_i^2 / (1 - h_i) of both models then give every
Q_i in closed form (see :func:`loo_interaction`): O(N) after one small solve,
nothing refitted per observation or per cell.

A cell with a single observation becomes empty when it is deleted: the
interaction then has m - 1 - rank(A+B) degrees of freedom, as a refit of the
reduced data would have.

Severity rules (written down here and in the contributor guide)
---------------------------------------------------------------
outliers
    "clear": no studentized deleted residual beyond the Bonferroni cut-off
    t_{1-alpha/(2N)}(N - m - 1) (Bonferroni outlier test: Cook & Weisberg 1982,
    Residuals and Influence in Regression, sec. 2.2.3).  "concern": one or more
    beyond it (our choice: whether an outlier matters for the interaction is
    judged by ``influence`` and ``fragility``, so an outlier alone is never
    "critical").  The pooled SD understates the spread of a high-variance cell,
    so each flagged value is also judged within its own cell: its studentized
    deleted residual against the cell's SD without it (n_c - 2 df), with the
    same Bonferroni cut-off over N (the same test with the cell's own
    variance; our choice).  When every flagged value is within that cut-off
    ("its cell's own spread explains it") the severity is "minor": the flags
    point to unequal variances (see homogeneity), not to wrong values.  Cells
    with n < 4 are too small to judge this way and keep the warning.  Cook's distance above 4/N is listed as common practice and does
    not change the severity (about 5% of any sample exceeds it).
influence
    "critical": deleting a single observation flips the interaction decision at
    alpha.  "concern": some single deletion changes the interaction p-value by a
    factor of 10 or more (our choice).  "clear" otherwise.  "minor" when the test
    cannot be formed.
fragility (after the fragility index of Walsh et al. 2014, J Clin Epidemiol
67:622-628, which reports the count without fixed thresholds; the cut-offs
are our choice)
    significant interaction: 1-2 deletions flip it: "critical"; 3-5: "concern";
    6 up to the step cap: "minor"; not flipped within the cap: "clear".
    non-significant interaction: 1-2 deletions make it significant: "concern";
    3 up to the cap: "minor"; not within the cap: "clear".

Caution: an automated audit supports a statistician's judgement, it does not
replace it.  Deleting observations because they are influential is not a
remedy; these numbers say how much the conclusion rests on few rows.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from ..core import additive_fit_and_leverage as _additive_fit_and_leverage
from ..core import additive_residual
from ..design import cell_moments, pow2_scale
from ..decision import decision, decisions
from ..facts import FragilityFacts, InfluenceFacts, OutlierFacts
from ..results import NOT_RUN, Diagnostic, json_float

__all__ = [
    "outliers",
    "influence",
    "fragility",
    "loo_interaction",
    "interaction_test",
    "FRAGILITY_MAX_STEPS",
]

#: default cap on greedy deletion steps in :func:`fragility` (each step costs O(cells)
#: plus one small solve; see :class:`_GreedySearch`)
FRAGILITY_MAX_STEPS = 20

#: rows listed at most in long value lists (counts are always given in full)
_LIST_CAP = 100

#: leave-one-out p-values listed one per row up to this many rows; beyond it the
#: list keeps the extremes and evenly spaced rows (``loo_complete`` False)
LOO_LIST_CAP = 20_000

_SUMMARY_MODE = ("needs the raw observations; only cell summaries were given, "
                 "so this check was not run")


# --------------------------------------------------------------------------
# cell-level machinery shared with scale.py
# --------------------------------------------------------------------------

def cell_sums(y: np.ndarray, cell: np.ndarray, JK: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counts, means (0 where empty) and centred SS per cell (see design.cell_moments)."""
    return cell_moments(y, cell, JK)


def _f_stat(Q, sse, df1, df2):
    """Vectorised classical F, following audit.core: when the error SS is 0 the F
    is infinite if Q > 0, else 0; NaN when a df is 0.  Returns (F, df1, df2) as
    float arrays."""
    Q = np.maximum(np.asarray(Q, dtype=float), 0.0)
    sse = np.maximum(np.asarray(sse, dtype=float), 0.0)
    df1 = np.asarray(df1, dtype=float)
    df2 = np.asarray(df2, dtype=float)
    ok = (df1 > 0) & (df2 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        F = (Q / df1) / (sse / df2)
    F = np.where(sse > 0, F, np.where(Q > 0, np.inf, 0.0))
    F = np.where(ok, F, np.nan)
    return F, df1, df2


def _p_of_f(F, df1, df2):
    """Upper-tail p of F(df1, df2): NaN where F is NaN, 0 where F is infinite."""
    F = np.asarray(F, dtype=float)
    p = np.full(F.shape, np.nan)
    fin = np.isfinite(F)
    if fin.any():
        p[fin] = stats.f.sf(F[fin], np.broadcast_to(df1, F.shape)[fin], np.broadcast_to(df2, F.shape)[fin])
    p[np.isinf(F)] = 0.0
    return p


def _f_and_p(Q, sse, df1, df2):
    """Vectorised classical F and p, following audit.core: when the error SS is
    0 the F is infinite (p = 0) if Q > 0, else 0 (p = 1); NaN when a df is 0."""
    F, df1, df2 = _f_stat(Q, sse, df1, df2)
    return F, _p_of_f(F, df1, df2)


def interaction_test(counts: np.ndarray, means: np.ndarray, css: np.ndarray, J: int, K: int):
    """Classical interaction F test from flat cell statistics (j-major, J x K).

    Returns (F, df1, df2, p); F and p are NaN when a df is 0.  The interaction
    has m - rank(A+B) df (= (J-1)(K-1) with every cell filled), the same under
    SS Types I, II and III (METHODS.md section 1).  The additive fit is the
    core's structured solver (:func:`audit.core.additive_residual`).
    """
    counts = np.asarray(counts)
    w = counts.astype(float)
    filled = w > 0
    centre = float(np.sum(w * np.where(filled, means, 0.0)) / w.sum())
    r, rank = additive_residual(w.reshape(J, K), np.where(filled, means - centre, 0.0).reshape(J, K))
    Q = float(np.sum(w * r.ravel() ** 2))
    m = int(filled.sum())
    df1 = m - rank
    df2 = int(counts.sum()) - m
    F, p = _f_and_p(Q, float(np.sum(css)), df1, df2)
    return float(F), df1, df2, float(p)


def _loo_sums(y: np.ndarray, cell: np.ndarray, J: int, K: int):
    """Interaction SS Q_i, error SS and degrees of freedom of the classical
    interaction test after deleting each observation i, in closed form.

    Returns Q, sse, df1, df2 as ndarrays (N,) (df as int64); the F and p are
    formed by the callers (:func:`loo_interaction`, and :func:`fragility`, which
    needs p only for the few candidates it compares).

    Notes
    -----
    Q(A+B) = SSE(additive) - SSE(cell means).  Deleting observation i of cell
    c lowers SSE(cell means) by n_c d_i^2 / (n_c - 1) (leverage 1/n_c) and
    SSE(additive) by e_i^2 / (1 - g_c), with e_i = d_i + R_c its additive
    residual and g_c its additive leverage (one small weighted solve on the
    cell means, :func:`_additive_fit_and_leverage`).  Hence

        Q_i = Q - (2 d_i R_c + R_c^2) / (1 - g_c) + gamma_c d_i^2
            = Q_(-c) + gamma_c (d_i - d*_c)^2,
        gamma_c = n_c (1 - H_c) / ((n_c - 1) (n_c - H_c)) >= 0,  H_c = n_c g_c,
        d*_c = R_c (n_c - 1) / (1 - H_c),  Q_(-c) = Q - n_c R_c^2 / (1 - H_c),

    the second form (a sum of two non-negative terms) being the one evaluated;
    Q_(-c), the additive fit's Q without cell c, is recomputed from its residual
    vector where the cell carries nearly all of Q.  An observation alone in its
    cell empties the cell: Q_i = Q_(-c), or Q with one rank fewer when the cell
    is the design's only link between its levels (H_c = 1).  Cost O(N)
    plus one solve of at most min(J, K) - 1 unknowns; nothing is refitted per
    observation or per cell.
    """
    y = np.asarray(y, dtype=float)
    y = y / pow2_scale(y)              # exact power of two: F and p are scale-free, squares stay in range
    cell = np.asarray(cell, dtype=np.int64)
    n, mean, css = cell_sums(y, cell, J * K)
    terms = _loo_cells(n, mean, css, J, K)
    return _loo_rows(terms, y - mean[cell], cell)


def _loo_cells(n, mean, css, J: int, K: int) -> dict:
    """The cell-level part of :func:`_loo_sums` from the cell counts, means and
    centred SS (flat, J * K): the additive fit, each cell's leverage and Q without
    it; O(cells) plus one solve of at most min(J, K) - 1 unknowns."""
    JK = J * K
    N = int(n.sum())
    filled = n > 0
    m = int(filled.sum())
    sse = float(css.sum())
    centre = float(np.sum(n * mean) / N)
    t = np.where(filled, mean - centre, 0.0)
    R, g, rank, cross = _additive_fit_and_leverage(n.reshape(J, K), t.reshape(J, K))
    R, g = R.ravel(), g.ravel()
    nf = n.astype(float)
    Q0 = float(np.sum(nf * R * R))
    H = nf * g
    # a cell whose removal lowers the rank ("bridge") has H = 1; otherwise
    # 1 - H >= 1 / (1 + n_c (J + K)) (leverage = n_c x effective resistance)
    bridge = filled & ((1.0 - H) * (1.0 + nf * (J + K)) < 0.5)
    live = filled & ~bridge
    # Q without cell c; recomputed from the residual vector where the short
    # formula would lose digits (the cell carries nearly all of Q)
    Qdel = np.full(JK, Q0)
    with np.errstate(divide="ignore", invalid="ignore"):
        Qdel[live] = Q0 - nf[live] * R[live] ** 2 / (1.0 - H[live])
    for c in np.flatnonzero(live & (Qdel < 1e-3 * Q0)):
        r = R + (nf[c] * cross(c // K, c % K).ravel()) * (R[c] / (1.0 - H[c]))
        r[c] = 0.0
        Qdel[c] = float(np.sum(nf * r * r))
    Qdel = np.maximum(Qdel, 0.0)
    return {"N": N, "m": m, "rank": rank, "sse": sse, "Q0": Q0, "nf": nf, "H": H, "R": R,
            "bridge": bridge, "Qdel": Qdel}


def _loo_rows(terms: dict, d: np.ndarray, cell: np.ndarray):
    """The row-level part of :func:`_loo_sums` for any subset of rows: ``d`` their
    deviations from their cell means, ``cell`` their cells.  Every row's numbers are
    elementwise functions of (d, cell) and the cell terms, so a subset gets exactly
    the values the whole data would."""
    N, m, rank, sse, Q0 = terms["N"], terms["m"], terms["rank"], terms["sse"], terms["Q0"]
    nf, H, R, bridge, Qdel = terms["nf"], terms["H"], terms["R"], terms["bridge"], terms["Qdel"]
    size = d.size
    nc = nf[cell]
    single = nc == 1
    many = ~single
    Q = np.empty(size)
    sse_i = np.empty(size)
    df1 = np.full(size, m - rank, dtype=np.int64)
    df2 = np.full(size, N - 1 - m, dtype=np.int64)
    if many.any():
        cm = cell[many]
        ncm, Hm = nf[cm], H[cm]
        gamma = ncm * (1.0 - Hm) / ((ncm - 1.0) * (ncm - Hm))
        dm = d[many]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            dstar = R[cm] * (ncm - 1.0) / (1.0 - Hm)
            Q[many] = np.where(bridge[cm], Q0, Qdel[cm] + gamma * (dm - dstar) ** 2)
        sse_i[many] = sse - (ncm / (ncm - 1.0)) * dm * dm
    if single.any():
        cs = cell[single]
        Q[single] = np.where(bridge[cs], Q0, Qdel[cs])
        sse_i[single] = sse
        df1[single] = (m - 1) - (rank - bridge[cs].astype(np.int64))
        df2[single] = (N - 1) - (m - 1)
    return Q, sse_i, df1, df2


def loo_interaction(y: np.ndarray, cell: np.ndarray, J: int, K: int):
    """Exact leave-one-out interaction F test for every observation, in closed form.

    Parameters
    ----------
    y : ndarray (N,)
        Response (any constant offset).
    cell : ndarray of int (N,)
        Cell index a * K + b.
    J, K : int
        Numbers of levels of A and B.

    Returns
    -------
    F, p, df1, df2 : ndarrays (N,)
        The interaction F and p after deleting each observation (NaN where the
        test cannot be formed), with its degrees of freedom.

    Notes
    -----
    See :func:`_loo_sums` for the closed form: O(N) plus one solve of at most
    min(J, K) - 1 unknowns; nothing is refitted per observation or per cell.
    """
    Q, sse_i, df1, df2 = _loo_sums(y, cell, J, K)
    F, p = _f_and_p(Q, sse_i, df1, df2)
    return F, p, df1, df2


# --------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------

_num = json_float


def _fmt_p(p) -> str:
    if p is None or not math.isfinite(p):
        return "not available"
    if p < 1e-4:
        return f"{p:.1e}"
    return f"{p:.4f}"


def _cell_names(fit, c: int) -> list[str]:
    K = fit.cells.K
    return [fit.cells.levels_a[c // K], fit.cells.levels_b[c % K]]


def _summary_mode(id_: str) -> Diagnostic:
    return Diagnostic(id=id_, severity=NOT_RUN, summary=f"{id_.capitalize()}: {_SUMMARY_MODE}.",
                      values={"available": False, "reason": _SUMMARY_MODE})


def _ab_full(fit):
    row = fit.anova.tables["II"].row("AB")
    return row


# --------------------------------------------------------------------------
# outliers
# --------------------------------------------------------------------------

#: a flagged value is judged against its own cell's spread only when the cell
#: has at least this many observations (n - 2 >= 2 df for the SD without it)
WITHIN_CELL_MIN_N = 4


def _rows_txt(fl: list) -> str:
    rows = [str(f["row"]) for f in fl[:5]]
    more = ", ..." if len(fl) > 5 else ""
    return ("row " if len(fl) == 1 else "rows ") + ", ".join(rows) + more


def outliers(fit) -> Diagnostic:
    """Studentized deleted residuals (Bonferroni cut-off) and Cook's distance
    of the full cell-means model.

    Leverage of an observation in cell jk is h = 1 / n_jk; an observation alone
    in its cell (h = 1) has no residual and is reported as such.

    values keys: ``available``, ``alpha``, ``N``, ``df``, ``cutoff`` (the
    Bonferroni critical |t|), ``n_flagged``, ``flagged`` (list of {row, cell, y,
    t, p_bonferroni, cell_n, cell_sd_ratio (cell SD / pooled SD), within_cell_t
    (against the cell's own SD without the value, n_c - 2 df), within_cell_cutoff
    (Bonferroni over N on those df), explained_by_cell (None when n_c < 4)},
    largest |t| first), ``max_abs_t``, ``max_abs_t_row``,
    ``cooks_threshold`` (4/N), ``n_cooks_flagged``, ``cooks_flagged`` (up to
    100 rows, largest first), ``max_cooks``, ``max_cooks_row``,
    ``rows_without_residual`` (rows alone in their cell).
    """
    if fit.obs is None:
        return _summary_mode("outliers")
    obs, cells = fit.obs, fit.cells
    N, m = cells.N, cells.m
    df_e = N - m
    unit = cells.standardised().unit   # t and Cook's D are scale-free: work in units of 2^e
    sse = cells.standardised().sse_within
    alpha = fit.alpha
    cell = obs.cell
    n_i = cells.counts.ravel()[cell].astype(float)
    e = np.asarray(fit.resid_full, dtype=float) / unit
    rows = np.asarray(obs.rows)
    single = n_i == 1
    rows_single = [int(r) for r in rows[single]]
    df_t = df_e - 1
    if df_t < 1 or sse <= 0:
        return Diagnostic(
            id="outliers", severity="minor",
            summary=("Outliers: too few error degrees of freedom (N - m - 1 < 1) or no within-cell "
                     "variation, so studentized residuals cannot be formed."),
            values={"available": False, "reason": "N - m - 1 < 1 or zero within-cell SS",
                    "alpha": alpha, "N": N, "df": df_t, "rows_without_residual": rows_single[:_LIST_CAP]},
        )
    h = 1.0 / n_i
    ok = ~single
    t = np.full(N, np.nan)
    denom = sse * (1.0 - h[ok]) - e[ok] ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        t[ok] = e[ok] * np.sqrt(df_t / np.maximum(denom, 0.0))
    # t_i is infinite only if row i carries the whole SSE; keep it as a flag
    mse = sse / df_e
    cook = np.full(N, np.nan)
    cook[ok] = e[ok] ** 2 * h[ok] / (m * mse * (1.0 - h[ok]) ** 2)
    cutoff = float(stats.t.isf(alpha / (2.0 * N), df_t))
    abs_t = np.abs(t)
    flag = ok & (abs_t > cutoff)
    p_two = np.full(N, np.nan)
    p_two[ok] = 2.0 * stats.t.sf(abs_t[ok], df_t)
    p_bonf = np.minimum(1.0, N * p_two)
    fl_idx = np.flatnonzero(flag)
    fl_idx = fl_idx[np.argsort(-abs_t[fl_idx], kind="stable")]
    # within-cell view of each flagged value: its studentized deleted residual against its own cell's
    # SD without it, t_c = d n / (n - 1) / (s_(-i) sqrt(n / (n - 1))), on n_c - 2 df, with the same
    # Bonferroni cut-off over N (so it is "explained" when the cell's own spread makes it unremarkable)
    n_c = cells.counts.ravel()[cell].astype(float)
    css_c = cells.standardised().css.ravel()[cell]   # same power-of-two units as e
    flagged = []
    for i in fl_idx[:_LIST_CAP]:
        nc = int(n_c[i])
        entry = {"row": int(rows[i]), "cell": _cell_names(fit, int(cell[i])), "y": float(obs.y_original[i]),
                 "t": _num(t[i]), "p_bonferroni": _num(p_bonf[i]), "cell_n": nc,
                 "cell_sd_ratio": None, "within_cell_t": None, "within_cell_cutoff": None,
                 "explained_by_cell": None}
        if nc >= WITHIN_CELL_MIN_N:
            css_del = max(float(css_c[i]) - nc * e[i] ** 2 / (nc - 1.0), 0.0)
            s_del = math.sqrt(css_del / (nc - 2.0))
            dfc = nc - 2
            cut_c = float(stats.t.isf(alpha / (2.0 * N), dfc))
            if s_del > 0:
                tc = e[i] * nc / (nc - 1.0) / (s_del * math.sqrt(nc / (nc - 1.0)))
                entry["within_cell_t"] = _num(tc)
                entry["explained_by_cell"] = bool(abs(tc) <= cut_c)
            else:
                entry["explained_by_cell"] = False
            entry["within_cell_cutoff"] = cut_c
            entry["cell_sd_ratio"] = _num(math.sqrt(float(css_c[i]) / (nc - 1.0)) / math.sqrt(mse))
        flagged.append(entry)
    thr = 4.0 / N
    cflag = ok & (cook > thr)
    c_idx = np.flatnonzero(cflag)
    c_idx = c_idx[np.argsort(-cook[c_idx], kind="stable")]
    any_ok = bool(ok.any())
    imax = int(np.nanargmax(abs_t)) if any_ok else None
    cmax = int(np.nanargmax(cook)) if any_ok else None
    nf = int(fl_idx.size)
    if nf == 0:
        sev = "clear"
        summ = (f"Outliers: no studentized deleted residual beyond the Bonferroni cut-off |t| > {cutoff:.2f} "
                f"(alpha {alpha:g} over N = {N}); no single extreme value stands out from the cell-means model.")
    else:
        explained = [f for f in flagged if f["explained_by_cell"]]
        extreme = [f for f in flagged if f["explained_by_cell"] is False]
        unjudged = [f for f in flagged if f["explained_by_cell"] is None]
        all_explained = len(explained) == len(flagged) and nf <= _LIST_CAP
        sev = "minor" if all_explained else "concern"
        shown = ", ".join(str(f["row"]) for f in flagged[:5])
        summ = (f"Outliers: {nf} observation(s) beyond the Bonferroni cut-off |t| > {cutoff:.2f} against the "
                f"pooled SD (row(s) {shown}{', ...' if nf > 5 else ''})")
        parts = []
        if explained:
            f0 = explained[0]
            parts.append(
                f"{_rows_txt(explained)} {'is' if len(explained) == 1 else 'are'} not extreme within "
                f"{'its' if len(explained) == 1 else 'their'} own cell: "
                f"{'its cell' + chr(39) + 's own spread explains it' if len(explained) == 1 else 'their cells' + chr(39) + ' own spread explains them'} "
                f"({'e.g. row ' + str(f0['row']) + ': ' if len(explained) > 1 else ''}within-cell t = {f0['within_cell_t']:.2f} against cut-off "
                f"{f0['within_cell_cutoff']:.2f}; that cell's SD is {f0['cell_sd_ratio']:.1f} times the pooled "
                "SD), which points to unequal variances (see homogeneity) rather than a wrong value")
        if extreme:
            parts.append(f"{_rows_txt(extreme)} {'stands' if len(extreme) == 1 else 'stand'} out within "
                         f"{'its' if len(extreme) == 1 else 'their'} own cell too: check for entry errors")
        if unjudged:
            parts.append(f"{_rows_txt(unjudged)} {'sits' if len(unjudged) == 1 else 'sit'} in a cell too small "
                         f"(n < {WITHIN_CELL_MIN_N}) to judge by its own spread: check for entry errors")
        summ += "; " + "; ".join(parts) if parts else ""
        summ += "; see the influence and fragility checks for whether they carry the interaction result."
    if rows_single:
        summ += (f" {len(rows_single)} observation(s) alone in their cell have leverage 1 and no residual, "
                 "so they cannot be checked this way.")
    return Diagnostic(id="outliers", severity=sev, summary=summ,
                      facts=OutlierFacts(rows=tuple(int(rows[i]) for i in fl_idx)), values={
        "available": True,
        "alpha": alpha,
        "N": N,
        "df": int(df_t),
        "cutoff": cutoff,
        "n_flagged": nf,
        "flagged": flagged,
        "max_abs_t": _num(abs_t[imax]) if imax is not None else None,
        "max_abs_t_row": int(rows[imax]) if imax is not None else None,
        "cooks_threshold": thr,
        "n_cooks_flagged": int(c_idx.size),
        "cooks_flagged": [{"row": int(rows[i]), "cooks_d": float(cook[i])} for i in c_idx[:_LIST_CAP]],
        "max_cooks": _num(cook[cmax]) if cmax is not None else None,
        "max_cooks_row": int(rows[cmax]) if cmax is not None else None,
        "rows_without_residual": rows_single[:_LIST_CAP],
        "n_without_residual": len(rows_single),
    })


# --------------------------------------------------------------------------
# influence
# --------------------------------------------------------------------------

def influence(fit, *, top: int = 10) -> Diagnostic:
    """The interaction p-value with each observation left out (exact).

    values keys: ``available``, ``alpha``, ``p_full``, ``F_full``, ``df``
    [df1, df2] of the full data, ``loo_p`` (one per kept row, data order, up to
    LOO_LIST_CAP rows, else the extremes and evenly spaced rows; None where the
    test cannot be formed), ``rows`` (row numbers, same order), ``loo_complete``,
    ``n_loo``, ``n_loo_undefined``, ``n_loo_below_alpha`` (counts of all rows),
    ``p_min``, ``p_max``, ``n_flipping`` (single deletions that flip the
    decision), ``flipping_rows`` (up to 100), ``most_influential`` (up to
    ``top`` entries {row, cell, y, p, F, log10_ratio}, largest |log10(p_i/p)|
    first), ``rows_emptying_a_cell``.
    """
    if fit.obs is None:
        return _summary_mode("influence")
    obs, cells = fit.obs, fit.cells
    alpha = fit.alpha
    ab = _ab_full(fit)
    rows = np.asarray(obs.rows)
    if ab.p is None:
        return Diagnostic(
            id="influence", severity="minor",
            summary=f"Influence: the interaction test cannot be formed on the full data ({ab.note}), "
                    "so leave-one-out p-values are not available.",
            values={"available": False, "reason": ab.note, "alpha": alpha, "loo_p": [], "rows": [int(r) for r in rows]},
        )
    F, p, df1, df2 = loo_interaction(obs.y, obs.cell, cells.J, cells.K)
    p0 = float(ab.p)
    sig0 = decision(p0, alpha)
    valid = np.isfinite(p)
    flip = valid & (decisions(p, alpha) != sig0)
    with np.errstate(divide="ignore"):
        lr = np.abs(np.log10(np.maximum(p, 1e-300)) - math.log10(max(p0, 1e-300)))
    lr = np.where(valid, lr, -1.0)
    order = np.argsort(-lr, kind="stable")[:top]
    cell = obs.cell
    most = [
        {"row": int(rows[i]), "cell": _cell_names(fit, int(cell[i])), "y": float(obs.y_original[i]),
         "p": _num(p[i]), "F": _num(F[i]),
         "log10_ratio": _num(math.log10(max(p[i], 1e-300)) - math.log10(max(p0, 1e-300)))}
        for i in order if valid[i]
    ]
    fl = np.flatnonzero(flip)
    fl = fl[np.argsort(-lr[fl], kind="stable")]
    emptying = cells.counts.ravel()[cell] == 1
    max_lr = float(lr.max()) if valid.any() else 0.0
    if fl.size:
        sev = "critical"
        summ = (f"Influence: deleting a single observation flips the interaction decision at alpha {alpha:g} "
                f"for {fl.size} row(s) (most influential: row {int(rows[fl[0]])}, p {_fmt_p(p0)} -> "
                f"{_fmt_p(float(p[fl[0]]))}); the interaction conclusion rests on individual observations.")
    elif max_lr >= 1.0:
        sev = "concern"
        summ = (f"Influence: no single deletion flips the interaction decision, but deleting row "
                f"{most[0]['row']} changes its p-value tenfold or more ({_fmt_p(p0)} -> {_fmt_p(most[0]['p'])}).")
    else:
        sev = "clear"
        summ = (f"Influence: no single deletion flips the interaction decision at alpha {alpha:g}; "
                f"leave-one-out p-values range {_fmt_p(float(np.nanmin(p)) if valid.any() else None)} to "
                f"{_fmt_p(float(np.nanmax(p)) if valid.any() else None)}.")
    if (~valid).any():
        summ += f" For {int((~valid).sum())} row(s) the test cannot be formed after deletion (p listed as None)."
    # one p per row up to LOO_LIST_CAP rows; beyond, the extremes and evenly spaced rows
    # (counts stay those of all rows) so that the findings JSON stays small
    if p.size > LOO_LIST_CAP:
        from .plotdata import thin_keep_extremes

        keep_idx = thin_keep_extremes(np.where(valid, p, 1.0), LOO_LIST_CAP)
    else:
        keep_idx = np.arange(p.size)
    facts = InfluenceFacts(flipping_rows=tuple(int(rows[i]) for i in fl[:_LIST_CAP]),
                           p_min=_num(np.nanmin(p)) if valid.any() else None,
                           p_max=_num(np.nanmax(p)) if valid.any() else None)
    return Diagnostic(id="influence", severity=sev, summary=summ, facts=facts, values={
        "available": True,
        "alpha": alpha,
        "p_full": p0,
        "F_full": _num(ab.F),
        "df": [int(ab.df), int(fit.anova.df_error)],
        "loo_p": [(float(p[i]) if valid[i] else None) for i in keep_idx.tolist()],
        "rows": [int(rows[i]) for i in keep_idx.tolist()],
        "loo_complete": bool(keep_idx.size == p.size),
        "n_loo": int(p.size),
        "n_loo_undefined": int((~valid).sum()),
        "n_loo_below_alpha": int((valid & decisions(p, alpha)).sum()),
        "p_min": _num(np.nanmin(p)) if valid.any() else None,
        "p_max": _num(np.nanmax(p)) if valid.any() else None,
        "n_flipping": int(fl.size),
        "flipping_rows": [int(rows[i]) for i in fl[:_LIST_CAP]],
        "most_influential": most,
        "rows_emptying_a_cell": [int(r) for r in rows[emptying][:_LIST_CAP]],
    })


# --------------------------------------------------------------------------
# fragility
# --------------------------------------------------------------------------

def _fragility_severity(k, sig0: bool) -> str:
    if k is None:
        return "clear"
    if sig0:
        return "critical" if k <= 2 else ("concern" if k <= 5 else "minor")
    return "concern" if k <= 2 else "minor"


def _greedy_pick(F, df1, df2, sig0: bool) -> tuple[int, float]:
    """The deletion a greedy fragility step makes: among the rows whose test can be
    formed (F not NaN), the largest p (then the smallest F, then the first row) when
    ``sig0``, else the smallest p (then the largest F, then the first row).
    Returns (row position, its p), or (-1, nan) when no row qualifies.

    p is a non-increasing function of F for given degrees of freedom, so within a
    group of rows sharing (df1, df2) that order is the order of F alone, ties by
    position: the best row of each group is its smallest (largest) F, first
    occurrence.  Only those few candidates (one per df pair: every row of a cell with
    n >= 2 shares one pair, rows alone in their cell at most two more) get a p, and
    the full order above decides among them.  So a step costs O(N) array passes and
    a handful of F tail areas, not N of them, and picks the row the full order picks.
    """
    valid = ~np.isnan(F)
    if not valid.any():
        return -1, math.nan
    key = df1 * (np.max(df2) + 1.0) + df2
    first = key[np.argmax(valid)]
    same = valid & (key == first)
    groups = [same]
    rest = valid & ~same
    if rest.any():
        for kv in np.unique(key[rest]):
            groups.append(rest & (key == kv))
    cand = []
    for g in groups:
        pos = np.flatnonzero(g)
        Fg = F[pos]                         # +inf (error SS 0) counts as the largest F
        cand.append(int(pos[np.argmin(Fg) if sig0 else np.argmax(Fg)]))
    cand = np.array(cand, dtype=np.int64)
    pc = _p_of_f(F[cand], df1[cand], df2[cand])
    Fc = F[cand]
    if sig0:  # want the largest p (then the smallest F)
        o = np.lexsort((cand, Fc, -pc))
    else:     # want the smallest p (then the largest F)
        o = np.lexsort((cand, -Fc, pc))
    return int(cand[o[0]]), float(pc[o[0]])


#: cells with more kept rows than this are searched (see :class:`_GreedySearch`) instead
#: of having every row evaluated at each greedy step
SEARCH_MIN_CELL = 256
#: points per level of that search
_SEARCH_GRID = 64
#: relative margin by which the rows bounding a searched range must be worse than its best
_SEARCH_MARGIN = 1e-12


class _GreedySearch:
    """The kept rows of a greedy fragility search, cell by cell, so that a step costs
    O(cells) instead of O(N).

    A greedy step needs, per group of rows sharing their degrees of freedom, the row
    with the smallest F (the largest when the interaction is not significant), first
    row on ties (:func:`_greedy_pick`).  Within a cell every row's F is a function of
    its deviation d from the cell mean alone (:func:`_loo_rows`):
    F(d) = c (Q_(-c) + gamma (d - d*)^2) / (S - a d^2) with non-negative constants,
    whose sub-level sets {F <= t} are intervals (a quadratic inequality with a
    positive leading coefficient), so F is quasi-convex in d: falling, then rising.
    Hence, over the cell's rows sorted by value,

    * the smallest F lies in the range bracketed by the neighbours of the best of
      an evenly spaced grid of rows (refined until the range holds at most two grid
      spans, every row of it evaluated), and
    * the largest F lies among the first or last rows.

    Rounding could still favour a row outside the evaluated range when F is flat, so
    the range is accepted only when the rows bounding it are worse than its best by a
    relative margin (1e-12, far above the rounding of F): by quasi-convexity every row
    beyond them is worse still.  Otherwise the whole cell is evaluated.  Cells with at
    most :data:`SEARCH_MIN_CELL` rows are always evaluated whole.  The cell moments are
    those of the kept rows, recomputed (in data order, as ``cell_moments`` would) only
    for the cell that loses a row; every F is computed by the same elementwise
    formulas as in :func:`loo_interaction`, so the step picks the row and p that
    evaluating every row picks.
    """

    def __init__(self, y, cell, J: int, K: int):
        y = np.asarray(y, dtype=float)
        self.y = y / pow2_scale(y)
        self.cell = np.asarray(cell, dtype=np.int64)
        self.J, self.K = J, K
        JK = J * K
        self.n, self.mean, self.css = (np.array(a) for a in cell_sums(self.y, self.cell, JK))
        bounds = np.concatenate([[0], np.cumsum(np.bincount(self.cell, minlength=JK))])
        in_data = np.argsort(self.cell, kind="stable")
        self.rows = [in_data[bounds[c]:bounds[c + 1]] for c in range(JK)]
        # by value, then data order (a stable sort of rows already in data order)
        self.sorted = [r[np.argsort(self.y[r], kind="stable")] for r in self.rows]
        self.vals = [self.y[r] for r in self.sorted]

    def delete(self, i: int) -> None:
        c = int(self.cell[i])
        self.rows[c] = self.rows[c][self.rows[c] != i]
        keep = self.sorted[c] != i
        self.sorted[c], self.vals[c] = self.sorted[c][keep], self.vals[c][keep]
        yc = self.y[self.rows[c]]
        n, mean, css = cell_sums(yc, np.zeros(yc.size, dtype=np.int64), 1)
        self.n[c], self.mean[c], self.css[c] = n[0], mean[0], css[0]

    def _f(self, terms, c: int, pos) -> np.ndarray:
        d = self.vals[c][pos] - self.mean[c]
        Q, sse_i, df1, df2 = _loo_rows(terms, d, np.full(d.size, c, dtype=np.int64))
        return _f_stat(Q, sse_i, df1, df2)[0]

    def _search(self, terms, c: int, smallest: bool):
        """Sorted positions in cell ``c`` that must hold its best row; None: evaluate all."""
        n = self.vals[c].size
        G = _SEARCH_GRID
        if n <= 2 * G:
            return None
        ok = lambda F: bool(np.all(np.isfinite(F)) and np.all(F >= 0))  # noqa: E731
        if not smallest:
            pos = np.r_[0:G, n - G:n]
            F = self._f(terms, c, pos)
            if not ok(F):
                return None
            best = F.max()
            if F[G - 1] < best * (1.0 - _SEARCH_MARGIN) and F[G] < best * (1.0 - _SEARCH_MARGIN):
                return pos
            return None
        lo, hi = 0, n - 1
        while hi - lo + 1 > 2 * G:
            grid = np.unique(np.linspace(lo, hi, G).round().astype(np.int64))
            F = self._f(terms, c, grid)
            if not ok(F):
                return None
            j = int(np.argmin(F))
            lo, hi = int(grid[max(j - 1, 0)]), int(grid[min(j + 1, grid.size - 1)])
        pos = np.arange(lo, hi + 1)
        F = self._f(terms, c, pos)
        if not ok(F):
            return None
        best = F.min()
        if (lo == 0 or F[0] > best * (1.0 + _SEARCH_MARGIN)) and \
                (hi == n - 1 or F[-1] > best * (1.0 + _SEARCH_MARGIN)):
            return pos
        return None

    def pick(self, sig0: bool) -> tuple[int, float]:
        """The row (original position) the greedy step deletes and its p; (-1, nan) if none."""
        terms = _loo_cells(self.n, self.mean, self.css, self.J, self.K)
        cand = []
        for c in np.flatnonzero(self.n > 0):
            c = int(c)
            pos = None
            if self.vals[c].size > SEARCH_MIN_CELL:
                pos = self._search(terms, c, smallest=sig0)
            cand.append(self.sorted[c] if pos is None else self.sorted[c][pos])
        if not cand:
            return -1, math.nan
        rows = np.sort(np.concatenate(cand))     # data order: ties go to the first row
        c = self.cell[rows]
        Q, sse_i, df1, df2 = _loo_rows(terms, self.y[rows] - self.mean[c], c)
        best, p = _greedy_pick(*_f_stat(Q, sse_i, df1, df2), sig0)
        return (int(rows[best]), p) if best >= 0 else (-1, math.nan)


def fragility(fit, *, max_steps: int = FRAGILITY_MAX_STEPS) -> Diagnostic:
    """Smallest number of greedy deletions that flips the interaction decision.

    At each step every remaining observation's deletion is evaluated exactly
    (:func:`loo_interaction`) and the one that moves the interaction p-value
    furthest toward the other side of alpha is deleted (largest p when the
    interaction is significant, smallest p otherwise; ties by larger / smaller
    F, then data order).  Stops at the first flip or after ``max_steps``
    deletions (default 20).  Each step costs O(cells) plus a solve of at most
    min(J, K) - 1 unknowns: large cells are searched rather than evaluated row
    by row and p is formed only for the few candidates (:class:`_GreedySearch`,
    :func:`_greedy_pick`), with the same picks as evaluating every row; about
    0.7 s at N = 1,000,000 in 20 cells.  Greedy deletion gives an upper bound on the true
    minimum; a flip within few steps is what matters.

    values keys: ``available``, ``alpha``, ``p_full``, ``direction``
    ('significant->not significant' or the reverse), ``deletions_to_flip``
    (int, or None if not flipped within the cap), ``rows`` (row numbers in
    deletion order when flipped, else empty), ``rows_tried`` (the greedy
    deletions made, flipped or not), ``p_path`` (interaction p after each deletion),
    ``max_steps``, ``stopped`` ('flipped' | 'cap reached' | 'no testable
    deletion left'), ``cells_emptied`` (cells left empty by the deletions).
    """
    if fit.obs is None:
        return _summary_mode("fragility")
    try:
        max_steps = int(max_steps)
    except (TypeError, ValueError):
        from ..errors import OptionError
        raise OptionError(f"max_steps: expected a whole number >= 1, found {max_steps!r}") from None
    if max_steps < 1:
        from ..errors import OptionError
        raise OptionError(f"max_steps: expected a whole number >= 1, found {max_steps}; try 20")
    obs, cells = fit.obs, fit.cells
    alpha = fit.alpha
    ab = _ab_full(fit)
    rows_all = np.asarray(obs.rows)
    if ab.p is None:
        return Diagnostic(
            id="fragility", severity="minor",
            summary=f"Fragility: the interaction test cannot be formed on the full data ({ab.note}).",
            values={"available": False, "reason": ab.note, "alpha": alpha,
                    "deletions_to_flip": None, "rows": [], "max_steps": max_steps},
        )
    p0 = float(ab.p)
    sig0 = decision(p0, alpha)
    J, K = cells.J, cells.K
    keep = np.ones(len(obs), dtype=bool)
    y_all, cell_all = np.asarray(obs.y, dtype=float), obs.cell
    deleted: list[int] = []
    path: list[float] = []
    flipped = False
    exhausted = False
    search = _GreedySearch(y_all, cell_all, J, K)
    for _ in range(max_steps):
        i, p_best = search.pick(sig0)
        if i < 0:
            exhausted = True
            break
        search.delete(i)
        keep[i] = False
        deleted.append(i)
        path.append(p_best)
        if decision(p_best, alpha) != sig0:
            flipped = True
            break
    k = len(deleted) if flipped else None
    del_rows = [int(rows_all[i]) for i in deleted]
    n_left = np.bincount(cell_all[keep], minlength=J * K)
    emptied = [_cell_names(fit, int(c)) for c in np.flatnonzero((n_left == 0) & (cells.counts.ravel() > 0))]
    sev = _fragility_severity(k, sig0)
    direction = "significant->not significant" if sig0 else "not significant->significant"
    word = "significant" if sig0 else "non-significant"
    if flipped:
        shown = ", ".join(map(str, del_rows[:5])) + (", ..." if len(del_rows) > 5 else "")
        summ = (f"Fragility: deleting {k} observation(s) (row(s) {shown}) turns the {word} interaction "
                f"(p {_fmt_p(p0)}) {'non-significant' if sig0 else 'significant'} at alpha {alpha:g} "
                f"(p {_fmt_p(path[-1])}).")
        if sig0 and k <= 5:
            summ += " The interaction claim rests on very few observations."
    elif exhausted:
        summ = (f"Fragility: the {word} interaction decision at alpha {alpha:g} did not flip within "
                f"{len(deleted)} greedy deletion(s); after them no further deletion leaves a testable "
                "interaction, so the search stopped before the cap.")
    else:
        summ = (f"Fragility: the {word} interaction decision at alpha {alpha:g} did not flip within "
                f"{len(deleted)} greedy deletion(s) (cap {max_steps}); last p {_fmt_p(path[-1] if path else None)}.")
    if emptied:
        summ += f" The deletions empty {len(emptied)} cell(s), which changes the design."
    stopped = "flipped" if flipped else ("no testable deletion left" if exhausted else "cap reached")
    facts = FragilityFacts(deletions_to_flip=k, rows=tuple(del_rows if flipped else ()), max_steps=max_steps,
                           significant_before=bool(sig0), stopped=stopped)
    return Diagnostic(id="fragility", severity=sev, summary=summ, facts=facts, values={
        "available": True,
        "alpha": alpha,
        "p_full": p0,
        "direction": direction,
        "deletions_to_flip": k,
        "rows": del_rows if flipped else [],
        "rows_tried": del_rows,
        "p_path": path,
        "max_steps": max_steps,
        "stopped": stopped,
        "cells_emptied": emptied,
    })
