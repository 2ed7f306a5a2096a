"""Rounding sensitivity of the interaction test: the summary-mode counterpart of
fragility (summary mode only; in data mode the raw values are known, fragility
and influence apply and this diagnostic is not produced).

A manuscript prints each cell mean and SD to a few decimals.  Every dataset
whose cell means and SDs round to the printed table is consistent with it: each
true mean lies in [m - h_m, m + h_m] and each true SD in [max(s - h_s, 0), s + h_s]
(h = half a unit in the last reported digit; an SE column's interval is carried
to the SD as SE * sqrt(n)).  Any real-valued cell of n >= 2 observations can
have any mean and any SD >= 0, so the box is exactly the set of consistent
datasets' cell statistics.

The interaction F is (SS_AB / df_AB) / (SSE / df_E).  SS_AB depends only on the
means, SSE = sum (n - 1) s^2 only on the SDs, so over the box

    F_min = SS_AB,min / df_AB / (SSE_max / df_E),   F_max = SS_AB,max / df_AB / (SSE_min / df_E),

and both are attained (the mean box and the SD box are independent).

* SSE is increasing in every SD: its extremes are at the SD box's corners
  (all lower ends, all upper ends).  Exact.
* SS_AB = ||L mu||^2, with L (df_AB x m) an orthonormal basis of the
  interaction space of the weighted (W = diag n) cell-means regression: the
  residual SS of the additive model fitted to the cell means by weighted least
  squares.  It is a convex quadratic in the means.
  - Its minimum over the box is a convex quadratic programme, solved exactly
    (to solver tolerance 1e-12) by bounded-variable least squares
    (:func:`scipy.optimize.lsq_linear`, method 'bvls').
  - Its maximum is attained at a vertex of the box (a convex function on a
    polytope).  With m <= 16 filled cells every one of the 2^m vertices is
    evaluated (exact); with df_AB = 1 the maximum is |l.c| + sum |l_i| h_i in
    closed form (exact); otherwise a vertex search (vertices sign(L'u) for
    8,192 random directions u - the candidates for the maximum - followed by
    single-coordinate flip ascent; fewer directions on large designs, at most
    4e6 / (m df_AB)) gives a lower bound for the maximum, and
    ``values['max_method']`` says so.

Severity: "concern" when the decision at alpha differs between the two ends of
the p range (the table's rounding alone can change the conclusion, weighed by
the verdict like fragility); "clear" otherwise.  Not run ("not-run") without an
error df (one observation per cell), without an interaction df, or with more than
64 filled cells (:data:`MAX_CELLS`; a printed table is far smaller).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

from ..decision import decision
from ..facts import RoundingFacts
from ..results import NOT_RUN, Diagnostic, json_float

__all__ = ["rounding", "interaction_basis", "effect_basis", "ss_interaction_range", "effect_F_ranges",
           "MAX_ENUMERATED_CELLS"]

#: enumerate every vertex of the mean box up to this many filled cells (2^20 vertices)
MAX_ENUMERATED_CELLS = 16
_SEARCH_DIRECTIONS = 8192
#: directions x cells x df of the vertex search (bounds its cost on large designs)
_SEARCH_BUDGET = 4_000_000
#: largest number of filled cells analysed (a printed manuscript table is far smaller)
MAX_CELLS = 64
_CHUNK = 1 << 15


def interaction_basis(counts: np.ndarray) -> np.ndarray:
    """L (df_AB x m) with SS_AB(mu) = ||L mu||^2 for the means mu of the filled
    cells (row-major order), weights n: the weighted residual SS of the additive
    model fitted to the cell means (common practice: the interaction SS is the
    additive model's extra residual SS over the cell-means model)."""
    counts = np.asarray(counts)
    J, K = counts.shape
    jj, kk = np.nonzero(counts > 0)
    m = jj.size
    X = np.zeros((m, 1 + J + K))
    X[:, 0] = 1.0
    X[np.arange(m), 1 + jj] = 1.0
    X[np.arange(m), 1 + J + kk] = 1.0
    z = np.sqrt(counts[jj, kk].astype(float))
    A = z[:, None] * X
    u, sv, _ = np.linalg.svd(A, full_matrices=True)
    rank = int((sv > sv.max() * 1e-10).sum())
    U = u[:, rank:]                   # orthonormal basis of the complement of col(A)
    return U.T * z[None, :]


def _design(counts, kind: str):
    """Columns of a model on the filled cells (row-major): '1', 'A', 'B' (treatment
    coding) or 'AB3' (sum-to-zero interaction columns), joined by '+'."""
    counts = np.asarray(counts)
    J, K = counts.shape
    jj, kk = np.nonzero(counts > 0)
    m = jj.size
    cols = []
    for part in kind.split("+"):
        if part == "1":
            cols.append(np.ones((m, 1)))
        elif part == "A":
            cols.append((jj[:, None] == np.arange(1, J)[None, :]).astype(float))
        elif part == "B":
            cols.append((kk[:, None] == np.arange(1, K)[None, :]).astype(float))
        elif part in ("A3", "B3", "AB3"):
            ea = np.where(jj[:, None] == np.arange(J - 1)[None, :], 1.0, 0.0) - (jj == J - 1)[:, None]
            eb = np.where(kk[:, None] == np.arange(K - 1)[None, :], 1.0, 0.0) - (kk == K - 1)[:, None]
            if part == "A3":
                cols.append(ea)
            elif part == "B3":
                cols.append(eb)
            else:
                cols.append((ea[:, :, None] * eb[:, None, :]).reshape(m, -1))
    return np.hstack(cols)


def _orth(A: np.ndarray) -> np.ndarray:
    if A.shape[1] == 0:
        return A
    u, sv, _ = np.linalg.svd(A, full_matrices=False)
    if sv.size == 0 or sv.max() == 0:
        return u[:, :0]
    return u[:, : int((sv > sv.max() * 1e-10).sum())]


def effect_basis(counts: np.ndarray, small: str, big: str | None) -> np.ndarray:
    """L with ||L mu||^2 = RSS(small) - RSS(big) for models fitted by weighted
    least squares (weights n) to the filled cells' means (big None: the
    cell-means model, RSS 0)."""
    counts = np.asarray(counts)
    z = np.sqrt(counts[counts > 0].astype(float))
    Qs = _orth(z[:, None] * _design(counts, small))
    if big is None:
        u, _, _ = np.linalg.svd(Qs, full_matrices=True)
        U = u[:, Qs.shape[1]:]
    else:
        B = z[:, None] * _design(counts, big)
        B = B - Qs @ (Qs.T @ B)
        U = _orth(B)
    return U.T * z[None, :]


#: (effect, SS type) -> (smaller model, larger model) on the cell means (None: cell-means model)
_MODELS = {
    ("A", "I"): ("1", "1+A"), ("B", "I"): ("1+A", "1+A+B"),
    ("A", "II"): ("1+B", "1+A+B"), ("B", "II"): ("1+A", "1+A+B"),
    ("A", "III"): ("1+B3+AB3", None), ("B", "III"): ("1+A3+AB3", None),
    ("AB", "I"): ("1+A+B", None), ("AB", "II"): ("1+A+B", None), ("AB", "III"): ("1+A+B", None),
}


def _sse_range(cells, st, sd_low, sd_high):
    filled = cells.counts > 0
    n = cells.counts[filled].astype(float)
    u = st.unit
    lo = np.asarray(sd_low, dtype=float)[filled] / u
    hi = np.asarray(sd_high, dtype=float)[filled] / u
    sd_now = np.sqrt(st.css[filled] / np.maximum(n - 1, 1))
    lo = np.where(np.isfinite(lo), np.maximum(lo, 0.0), sd_now)
    hi = np.where(np.isfinite(hi), hi, sd_now)
    w = np.maximum(n - 1, 0)
    return float((w * lo * lo).sum()), float((w * hi * hi).sum())


def effect_F_ranges(fit, *, mean_half: float | None, sd_low: np.ndarray, sd_high: np.ndarray) -> dict:
    """{(effect, SS type): (F_min, F_max)} over every table that rounds to the
    reported one, for every test the ANOVA forms (F_max None: unbounded).  Each
    SS is a quadratic form in the cell means, checked against the ANOVA at the
    reported means (a form that does not reproduce it, to 1e-8 relative, is left
    out); bounds as in the module docstring."""
    cells, an = fit.cells, fit.anova
    if an.df_error == 0 or cells.m > MAX_CELLS:
        return {}
    st = cells.standardised()
    filled = cells.counts > 0
    mu = st.means[filled]
    h = np.full(mu.shape, 0.0 if mean_half is None else float(mean_half) / st.unit)
    sse_min, sse_max = _sse_range(cells, st, sd_low, sd_high)
    d2 = an.df_error
    sse_now = float(st.css[filled].sum())     # standardised, as the ANOVA forms it
    out = {}
    done: dict = {}
    bases: dict = {}
    for (eff, typ), (small, big) in _MODELS.items():
        row = an.tables[typ].row(eff)
        if row.F is None or not row.df:
            continue
        key = (small, big)
        if key not in bases:
            bases[key] = effect_basis(cells.counts, small, big)
        L = bases[key]
        if L.shape[0] != int(row.df):
            continue
        # the form must reproduce the ANOVA's F (scale-free: compared in standardised units,
        # where neither the SS nor the unit's square leave the float64 range)
        if not sse_now > 0:
            continue
        f_now = (float((L @ mu) @ (L @ mu)) / int(row.df)) / (sse_now / d2)
        if not math.isclose(f_now, row.F, rel_tol=1e-8, abs_tol=1e-12 * max(1.0, abs(row.F))):
            continue
        if (small, big) not in done:
            done[(small, big)] = ss_interaction_range(L, mu, h)
        r = done[(small, big)]
        d1 = int(row.df)
        fmin = (r["min"] / d1) / (sse_max / d2) if sse_max > 0 else None
        fmax = (r["max"] / d1) / (sse_min / d2) if sse_min > 0 else None
        if fmin is not None:
            out[(eff, typ)] = (fmin, fmax)
    return out


def ss_interaction_range(L: np.ndarray, centre: np.ndarray, half: np.ndarray) -> dict:
    """Minimum and maximum of ||L mu||^2 over the box centre +- half.

    Returns a dict with ``min``, ``max``, ``min_method``, ``max_method``,
    ``vertices`` (vertices evaluated) and ``argmax`` (the maximising means).
    """
    from scipy.optimize import lsq_linear

    c = np.asarray(centre, dtype=float)
    h = np.asarray(half, dtype=float)
    d, m = L.shape
    Lc = L @ c
    out = {}
    if np.all(h == 0):
        v = float(Lc @ Lc)
        return {"min": v, "max": v, "min_method": "exact (no rounding)", "max_method": "exact (no rounding)",
                "vertices": 1, "argmax": c}
    # minimum: convex QP in x = (mu - c) / h in [-1, 1]^m: min ||Lc + (L h) x||^2
    free = h > 0
    Lh = L[:, free] * h[free][None, :]
    res = lsq_linear(Lh, -Lc, bounds=(-1.0, 1.0), method="bvls", tol=1e-12, max_iter=10_000)
    r = Lc + Lh @ res.x
    out["min"] = float(r @ r)
    out["min_method"] = "exact (convex quadratic programme, bounded-variable least squares)"
    mf = int(free.sum())
    if d == 1:
        l = Lh[0]
        s = np.sign(Lc[0]) if Lc[0] != 0 else 1.0
        x = s * np.sign(l)
        best = float((abs(Lc[0]) + np.abs(l).sum()) ** 2)
        out.update(max=best, max_method="exact (one interaction df: closed form)", vertices=1)
    elif mf <= MAX_ENUMERATED_CELLS:
        best, x = -1.0, None
        n_vert = 1 << mf
        bits = np.arange(mf, dtype=np.int64)
        for start in range(0, n_vert, _CHUNK):
            idx = np.arange(start, min(start + _CHUNK, n_vert), dtype=np.int64)
            S = ((idx[:, None] >> bits[None, :]) & 1) * 2.0 - 1.0
            V = Lc[None, :] + S @ Lh.T
            q = np.einsum("ij,ij->i", V, V)
            i = int(np.argmax(q))
            if q[i] > best:
                best, x = float(q[i]), S[i].copy()
        out.update(max=best, max_method=f"exact (all {n_vert:,} vertices of the mean box)", vertices=n_vert)
    else:
        rng = np.random.default_rng(0)
        n_dir = int(min(_SEARCH_DIRECTIONS, max(32, _SEARCH_BUDGET // max(1, mf * d))))
        U = rng.standard_normal((n_dir, d))
        S = np.where(U @ Lh >= 0, 1.0, -1.0)
        V = Lc[None, :] + S @ Lh.T
        q = np.einsum("ij,ij->i", V, V)
        order = np.argsort(q)[::-1][:4]
        best, x = -1.0, None
        for i in order:
            s = S[i].copy()
            v = V[i].copy()
            improved = True
            steps = 0
            while improved and steps < 4 * mf:          # single-coordinate flip ascent
                steps += 1
                improved = False
                gain = -4.0 * s * (Lh.T @ v) + 4.0 * np.einsum("ij,ij->j", Lh, Lh)
                j = int(np.argmax(gain))
                if gain[j] > 1e-12 * max(1.0, float(v @ v)):
                    v = v - 2.0 * s[j] * Lh[:, j]
                    s[j] = -s[j]
                    improved = True
            val = float(v @ v)
            if val > best:
                best, x = val, s
        out.update(max=best, max_method=f"vertex search ({n_dir:,} random directions and "
                                        "single-flip ascent): a lower bound for the maximum", vertices=len(S))
    mu = c.copy()
    mu[free] = c[free] + h[free] * x
    out["argmax"] = mu
    out["max"] = max(out["max"], out["min"])
    return out


def _not_run(reason: str, values: dict | None = None) -> Diagnostic:
    v = {"available": False, "reason": reason}
    v.update(values or {})
    return Diagnostic(id="rounding", severity=NOT_RUN, summary=f"Rounding sensitivity: not run ({reason}).",
                      values=v)


def rounding(fit, *, mean_half: float | None, sd_low: np.ndarray, sd_high: np.ndarray,
             decimals: dict | None = None, decimals_source: str | None = None) -> Diagnostic:
    """Range of the interaction F and p over every table that rounds to the reported one.

    Parameters
    ----------
    fit : Fit
        Summary-mode fit (the cells as reported).
    mean_half : float or None
        Half a unit in the means' last reported digit (None: means taken as exact).
    sd_low, sd_high : ndarray (J, K)
        Each cell's SD interval (NaN or equal ends where not rounded; ignored in
        cells with n < 2).
    decimals, decimals_source : optional
        Reported decimals and how they were found, echoed in ``values``.

    Notes
    -----
    values keys: ``available``, ``F``, ``p`` (from the table as printed), ``F_min``,
    ``F_max``, ``p_min``, ``p_max``, ``df1``, ``df2``, ``decision_can_change``,
    ``mean_half_unit``, ``ss_ab_min``, ``ss_ab_max``, ``sse_min``, ``sse_max``,
    ``min_method``, ``max_method``, ``vertices``, ``decimals``, ``decimals_source``,
    ``extreme_means`` (cell means giving F_max, as [[a, b, mean], ...]), ``F_ranges``
    (the same range for every effect and SS type: [{effect, ss_type, F_min, F_max}],
    used by the reconciliation of reported tests).
    """
    cells = fit.cells
    alpha = fit.alpha
    an = fit.anova
    row = an.tables["II"].row("AB")
    base = {"alpha": alpha, "decimals": decimals or {}, "decimals_source": decimals_source}
    if an.df_interaction == 0 or row.F is None:
        return _not_run(row.note or "the interaction has no test in this design", base)
    if an.df_error == 0:
        return _not_run("one observation per cell: no within-cell error, so no F to bound", base)
    if cells.m > MAX_CELLS:
        return _not_run(f"{cells.m} filled cells, more than the {MAX_CELLS} this analysis handles", base)
    st = cells.standardised()
    u = st.unit
    filled = cells.counts > 0
    n = cells.counts[filled].astype(float)
    mu = st.means[filled]
    h = np.full(mu.shape, 0.0 if mean_half is None else float(mean_half) / u)
    L = interaction_basis(cells.counts)
    rng = ss_interaction_range(L, mu, h)
    lo = np.asarray(sd_low, dtype=float)[filled] / u
    hi = np.asarray(sd_high, dtype=float)[filled] / u
    sd_now = np.sqrt(st.css[filled] / np.maximum(n - 1, 1))
    lo = np.where(np.isfinite(lo), np.maximum(lo, 0.0), sd_now)
    hi = np.where(np.isfinite(hi), hi, sd_now)
    w = np.maximum(n - 1, 0)
    sse_min = float((w * lo * lo).sum())
    sse_max = float((w * hi * hi).sum())
    d1, d2 = int(an.df_interaction), int(an.df_error)
    F_min = (rng["min"] / d1) / (sse_max / d2) if sse_max > 0 else None
    F_max = (rng["max"] / d1) / (sse_min / d2) if sse_min > 0 else math.inf
    if F_min is None:  # every SD is 0 even at its upper end: F infinite or undefined throughout
        return _not_run("every cell SD is zero even at the top of its rounding interval", base)
    p_max = float(stats.f.sf(F_min, d1, d2))
    p_min = 0.0 if math.isinf(F_max) else float(stats.f.sf(F_max, d1, d2))
    change = decision(p_min, alpha) != decision(p_max, alpha)
    sig = decision(row.p, alpha)
    la, lb = cells.levels_a, cells.levels_b
    jj, kk = np.nonzero(filled)
    ext = [[la[j], lb[k], float(v * u + cells.offset)] for j, k, v in zip(jj, kk, rng["argmax"])]
    range_notes: list = []

    def ss_value(x):
        """A standardised SS on the response scale (x u^2), None outside the float64 range."""
        with np.errstate(all="ignore"):
            v = float(x) * u * u
        if x == 0.0 or (math.isfinite(v) and abs(v) >= np.finfo(float).tiny):
            return v
        if not range_notes:
            range_notes.append("a sum of squares is outside the float64 range on the response's scale and is "
                               "left blank; F and p are computed on the standardised values and are unaffected")
        return None

    def fmt(x):
        return "unbounded" if x is None or not math.isfinite(x) else f"{x:.4g}"

    values = {
        "available": True, "alpha": alpha, "F": json_float(row.F), "p": json_float(row.p),
        "F_min": json_float(F_min), "F_max": json_float(F_max), "p_min": json_float(p_min),
        "p_max": json_float(p_max), "df1": d1, "df2": d2, "decision_can_change": bool(change),
        "mean_half_unit": json_float(mean_half) if mean_half is not None else None,
        "ss_ab_min": ss_value(rng["min"]), "ss_ab_max": ss_value(rng["max"]),
        "sse_min": ss_value(sse_min), "sse_max": ss_value(sse_max),
        "min_method": rng["min_method"], "max_method": rng["max_method"], "vertices": int(rng["vertices"]),
        "decimals": decimals or {}, "decimals_source": decimals_source, "extreme_means": ext,
    }
    if math.isinf(F_max):
        range_notes.insert(0, "an SD interval reaches 0 in every cell, so F is unbounded above")
    if range_notes:
        values["note"] = "; ".join(range_notes)
    span = (f"the interaction F ranges from {fmt(F_min)} to {fmt(F_max)} (p from {p_min:.3g} to {p_max:.3g}) "
            f"over every table that rounds to the reported means and SDs")
    if change:
        summary = (f"Rounding sensitivity: {span}, so the decision at alpha {alpha:g} can change within the "
                   "table's rounding alone; the reported precision cannot settle it.")
        sev = "concern"
    else:
        summary = (f"Rounding sensitivity: {span}; the decision at alpha {alpha:g} "
                   f"({'significant' if sig else 'not significant'}) is the same throughout.")
        sev = "clear"
    ranges = effect_F_ranges(fit, mean_half=mean_half, sd_low=sd_low, sd_high=sd_high)
    values["F_ranges"] = [{"effect": e, "ss_type": t, "F_min": json_float(a), "F_max": json_float(b)}
                          for (e, t), (a, b) in ranges.items()]
    facts = RoundingFacts(decision_can_change=bool(change), F_min=json_float(F_min), F_max=json_float(F_max),
                          p_min=p_min, p_max=p_max, significant=sig, F_ranges=ranges)
    return Diagnostic(id="rounding", severity=sev, summary=summary, values=values, facts=facts)
