"""Plot coordinates for the figures (computed here; the renderer only draws).

Each function returns a plain dict of JSON-serialisable lists (None, never
NaN), or None when the figure cannot be made (stated in ``reason`` where it
can be).  Display values are on the response's original scale (the intake
offset added back).

Constructions
-------------
* Cell-mean intervals: mean +/- t_{n-1, 0.975} SD / sqrt(n) per cell, from
  that cell's own SD (so the interval does not assume equal variances); no
  interval for n < 2.
* Normal-quantile plot: internally studentized residuals r_i = e_i / (s
  sqrt(1 - 1/n_cell)), s^2 = MS_E, of cells with n >= 2, against Blom (1958)
  plotting positions Phi^-1((i - 3/8) / (n + 1/4)).  Simultaneous band: the
  Kolmogorov band, inverting the two-sided Kolmogorov-Smirnov statistic
  (critical value d from scipy.stats.kstwo at the chosen level): the i-th order
  statistic must lie between Phi^-1(i/n - d) and Phi^-1((i-1)/n + d).  With
  mean and SD estimated the band is conservative (Lilliefors 1967), so a point
  outside it is a real departure.  Like the KS test it is wide in the
  tails (the outermost few points may have no bound at all), so it shows
  departures of the bulk; single extreme values are the job of the
  ``outliers`` diagnostic.  Above ``max_points`` residuals the points
  are thinned to evenly spaced ranks (all extremes kept) for drawing only.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..fit import Fit
from .assumptions import _num

__all__ = ["thin_keep_extremes", "cell_means_ci", "qq_points", "spread_vs_fitted", "sd_vs_n", "loo_points", "boxcox_profile",
           "methods_p", "boxcox_p_curve", "model_figure_data", "diagnostic_figure_data",
           "figure_data"]

MAX_POINTS = 5000


def _lst(a) -> list:
    return [_num(x) for x in np.asarray(a, dtype=float).ravel()]


def cell_means_ci(fit: Fit, level: float = 0.95) -> dict:
    """Cell means with per-cell t intervals, in both orientations.

    Returns {response, level, interval_method, orientations: [{x_factor,
    x_levels, trace_factor, traces: [{level, mean, lower, upper, n}]}, ...]}
    with the first orientation having factor A on the x axis.
    """
    c = fit.cells
    n = c.counts.astype(float)
    mean = np.where(n > 0, c.display_means, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        se = np.sqrt(c.variances / n)
        tq = stats.t.ppf(0.5 + level / 2.0, np.where(n > 1, n - 1, np.nan))
    lo, hi = mean - tq * se, mean + tq * se
    orient = []
    for axis in (0, 1):
        # axis 0: x = A levels, traces = B levels; axis 1: swapped
        if axis == 0:
            xf, xl, tf, tl = c.factors[0], c.levels_a, c.factors[1], c.levels_b
            M, L, H, Nn = mean.T, lo.T, hi.T, n.T
        else:
            xf, xl, tf, tl = c.factors[1], c.levels_b, c.factors[0], c.levels_a
            M, L, H, Nn = mean, lo, hi, n
        traces = [{"level": tl[i], "mean": _lst(M[i]), "lower": _lst(L[i]), "upper": _lst(H[i]),
                   "n": [int(x) for x in Nn[i]]} for i in range(len(tl))]
        orient.append({"x_factor": xf, "x_levels": list(xl), "trace_factor": tf, "traces": traces})
    return {"response": c.response, "level": level,
            "interval_method": f"{level:.0%} t interval from each cell's own SD; none for n < 2",
            "orientations": orient}


def _thin(n: int, max_points: int) -> np.ndarray:
    if n <= max_points:
        return np.arange(n)
    edge = min(100, max_points // 10)
    mid = np.linspace(edge, n - edge - 1, max_points - 2 * edge).round().astype(np.int64)
    return np.unique(np.concatenate([np.arange(edge), mid, np.arange(n - edge, n)]))


def thin_keep_extremes(values: np.ndarray, max_points: int) -> np.ndarray:
    """Indices (sorted) of at most about ``max_points`` entries of ``values``: the
    max_points/4 smallest, the max_points/4 largest and evenly spaced ones between."""
    values = np.asarray(values, dtype=float)
    if values.size <= max_points:
        return np.arange(values.size)
    k = max_points // 4
    order = np.argsort(values, kind="stable")
    return np.union1d(np.union1d(order[:k], order[-k:]), _thin(values.size, max_points - 2 * k))


def qq_points(fit: Fit, level: float = 0.95, max_points: int = MAX_POINTS) -> dict | None:
    """Normal-quantile plot of studentized residuals with a Kolmogorov band.

    Returns {n, level, theoretical, sample, band_lower, band_upper, outside,
    band_method, thinned, rows_outside} or None in summary mode.
    """
    if fit.obs is None or fit.anova.ms_error in (None, 0.0):
        return None
    counts = fit.cells.counts.ravel()
    nc = counts[fit.obs.cell]
    keep = nc >= 2
    r = fit.resid_full[keep] / np.sqrt(fit.anova.ms_error * (1.0 - 1.0 / nc[keep]))
    rows = fit.obs.rows[keep]
    order = np.argsort(r, kind="stable")
    rs = r[order]
    n = rs.size
    if n < 3:
        return None
    i = np.arange(1, n + 1, dtype=float)
    theo = stats.norm.ppf((i - 0.375) / (n + 0.25))
    d = float(stats.kstwo.ppf(level, n))
    with np.errstate(divide="ignore"):
        lo = stats.norm.ppf(np.clip(i / n - d, 0.0, 1.0))
        hi = stats.norm.ppf(np.clip((i - 1) / n + d, 0.0, 1.0))
    out = (rs < lo) | (rs > hi)
    idx = _thin(n, max_points)
    outside_idx = np.flatnonzero(out)
    if outside_idx.size > max_points // 2:  # keep the drawing small: an even subset of the outside points
        outside_idx = outside_idx[_thin(outside_idx.size, max_points // 2)]
    idx = np.union1d(idx, outside_idx)
    return {
        "n": int(n), "level": level,
        "theoretical": _lst(theo[idx]), "sample": _lst(rs[idx]),
        "band_lower": _lst(lo[idx]), "band_upper": _lst(hi[idx]),
        "outside": int(out.sum()),
        "rows_outside": [int(x) for x in rows[order][out][:50]],
        "band_method": (f"{level:.0%} simultaneous Kolmogorov band (KS critical value {d:.4f}); conservative "
                        "with estimated mean and SD (Lilliefors 1967)"),
        "thinned": bool(idx.size < n),
    }


def spread_vs_fitted(fit: Fit, max_points: int = MAX_POINTS) -> dict:
    """Residuals against fitted cell means, and cell SD against cell mean.

    Returns {response, cells: [{label, mean, sd, n}], pooled_sd, points:
    {fitted, resid} or None (summary mode), thinned}.
    """
    c = fit.cells
    cells = []
    for j in range(c.J):
        for k in range(c.K):
            n = int(c.counts[j, k])
            if n == 0:
                continue
            sd = float(np.sqrt(c.variances[j, k])) if n > 1 else None
            cells.append({"label": c.cell_label(j, k), "mean": float(c.display_means[j, k]), "sd": sd, "n": n})
    pooled = float(np.sqrt(fit.anova.ms_error)) if fit.anova.ms_error else None
    pts, thinned = None, False
    if fit.obs is not None:
        N = fit.resid_full.size
        idx = np.arange(N) if N <= max_points else np.random.default_rng(0).choice(N, max_points, replace=False)
        thinned = N > max_points
        pts = {"fitted": _lst(fit.fitted_full[idx] + c.offset), "resid": _lst(fit.resid_full[idx])}
    return {"response": c.response, "cells": cells, "pooled_sd": pooled, "points": pts, "thinned": thinned}


def sd_vs_n(fit: Fit) -> dict:
    """Cell SD against cell size (cells with n >= 2).

    Returns {response, n, sd, labels, pooled_sd, spearman}.
    """
    c = fit.cells
    use = c.counts >= 2
    n = c.counts[use].astype(float)
    sd = np.sqrt(c.variances[use])
    labels = [c.cell_label(j, k) for j, k in zip(*np.nonzero(use))]
    rho = None
    if n.size >= 3 and np.ptp(n) > 0 and np.ptp(sd) > 0:
        rho = _num(stats.spearmanr(n, sd).statistic)
    pooled = float(np.sqrt(fit.anova.ms_error)) if fit.anova.ms_error else None
    return {"response": c.response, "n": [int(x) for x in n], "sd": _lst(sd), "labels": labels,
            "pooled_sd": pooled, "spearman": rho}


def _find(diagnostics, did: str):
    for d in diagnostics or ():
        if getattr(d, "id", None) == did:
            return d
        if isinstance(d, dict) and d.get("id") == did:
            return d
    return None


def _values(d) -> dict:
    if isinstance(d, dict):
        return d.get("values") or {}
    return d.values or {}


def loo_points(diagnostics, max_points: int = MAX_POINTS) -> dict | None:
    """Leave-one-out interaction p-values by row, from the 'influence'
    diagnostic (values 'loo_p', 'rows', 'alpha'); None when absent.

    Returns {rows, p, alpha, n, n_below_alpha, n_undefined, thinned, p_full,
    row_kind, flipping_rows, n_flipping}: ``flipping_rows`` are the rows whose
    deletion alone flips the decision at alpha (as listed by the diagnostic, up
    to its cap; ``n_flipping`` counts all of them); above ``max_points`` rows the drawing keeps the smallest and
    largest p-values and evenly spaced rows between (counts are of all rows)."""
    d = _find(diagnostics, "influence")
    if d is None:
        return None
    v = _values(d)
    p, rows = v.get("loo_p"), v.get("rows")
    if not p or not rows or len(p) != len(rows):
        return None
    pairs = [(int(r), float(q)) for r, q in zip(rows, p) if q is not None]
    if not pairs:
        return None
    pairs.sort()
    alpha = v.get("alpha")
    rows = np.array([r for r, _ in pairs])
    ps = np.array([q for _, q in pairs])
    # the influence diagnostic may already carry a thinned list; its counts are of all rows
    complete = v.get("loo_complete", True)
    n_all = int(v.get("n_loo", len(pairs) if complete else len(p)))
    n_undefined = int(v.get("n_loo_undefined", len(p) - len(pairs)))
    n_below = v.get("n_loo_below_alpha")
    if n_below is None:
        n_below = int(sum(1 for _, q in pairs if alpha is not None and q < alpha))
    flipping = [int(r) for r in (v.get("flipping_rows") or [])]
    n_flipping = v.get("n_flipping")
    if n_flipping is None:
        n_flipping = len(flipping)
    thinned = ps.size > max_points or not complete
    if ps.size > max_points:  # keep the extremes of p (the rows that matter) and evenly spaced rows between
        keep = thin_keep_extremes(ps, max_points)
        keep = np.union1d(keep, np.flatnonzero(np.isin(rows, flipping)))  # every listed flipping row is drawn
        rows, ps = rows[keep], ps[keep]
    return {"rows": rows.tolist(), "p": ps.tolist(), "alpha": alpha, "n": n_all - n_undefined,
            "n_below_alpha": int(n_below), "n_undefined": n_undefined, "thinned": bool(thinned),
            "p_full": v.get("p_full"), "row_kind": v.get("row_kind"),
            "flipping_rows": flipping, "n_flipping": int(n_flipping)}


def boxcox_profile(diagnostics) -> dict | None:
    """Box-Cox profile log-likelihood from the 'scale' diagnostic (values
    'profile_lambda', 'profile_loglik', 'lambda_hat', 'lambda_ci'); None when
    absent."""
    d = _find(diagnostics, "scale")
    if d is None:
        return None
    v = _values(d)
    lam, ll = v.get("profile_lambda"), v.get("profile_loglik")
    if not lam or not ll or len(lam) != len(ll):
        return None
    pairs = [(float(a), float(b)) for a, b in zip(lam, ll) if a is not None and b is not None]
    if len(pairs) < 2:
        return None
    ci = v.get("lambda_ci")
    if not ci or any(x is None for x in ci):
        ci = None
    lmax = v.get("loglik_max")
    if lmax is None:
        lmax = max(b for _, b in pairs)
    return {"lambda": [a for a, _ in pairs], "loglik": [b for _, b in pairs], "lambda_hat": v.get("lambda_hat"),
            "lambda_ci": list(ci) if ci else None, "cutoff": lmax - float(stats.chi2.ppf(0.95, 1)) / 2.0}


def boxcox_p_curve(fit: Fit, lo: float, hi: float, points: int = 81) -> dict | None:
    """Classical interaction p-value of the Box-Cox transformed response at
    ``points`` evenly spaced lambdas in [lo, hi] (0 and 1 added when inside).

    Each p is the interaction F test of the cell-means model from the cell
    counts, means and centred sums of squares of (y/g)^lambda (the same cell
    statistics path as the ``scale`` diagnostic; no model refit).  Returns
    {lambda, p, crossings} (``crossings``: lambdas where p crosses alpha, by
    linear interpolation of log p between grid points) or None in summary
    mode or for a response that is not strictly positive.
    """
    from ..core import additive_design
    from .influence import cell_sums, interaction_test

    if fit.obs is None or not (lo < hi):
        return None
    y = np.asarray(fit.obs.y_original, dtype=float)
    if y.size == 0 or not (y > 0).all():
        return None
    cells = fit.cells
    JK = cells.J * cells.K
    ly = np.log(y)
    ly = ly - ly.mean()  # scaling by the geometric mean leaves F unchanged and keeps the values moderate
    lams = np.linspace(lo, hi, points)
    lams = np.union1d(lams, [t for t in (0.0, 1.0) if lo <= t <= hi])
    ps = []
    for lam in lams:
        z = ly if abs(lam) < 1e-12 else np.expm1(lam * ly) / lam
        ps.append(float(interaction_test(*cell_sums(z, fit.obs.cell, JK), cells.J, cells.K)[3]))
    ps = np.array(ps)
    alpha = fit.alpha
    crossings = []
    with np.errstate(divide="ignore", invalid="ignore"):
        lp = np.log(ps)
    for i in range(lams.size - 1):
        a, b = ps[i], ps[i + 1]
        if not (np.isfinite(lp[i]) and np.isfinite(lp[i + 1])):
            continue
        if (a < alpha) != (b < alpha):
            t = (np.log(alpha) - lp[i]) / (lp[i + 1] - lp[i])
            crossings.append(float(lams[i] + t * (lams[i + 1] - lams[i])))
    return {"lambda": _lst(lams), "p": _lst(ps), "crossings": crossings}


def _focus_window(d: dict) -> tuple[float, float]:
    """The lambda range the Box-Cox figure shows: lambda-hat, its interval, 0 and 1,
    with a margin, inside the profile grid."""
    lam = d["lambda"]
    pts = [0.0, 1.0]
    if d.get("lambda_hat") is not None:
        pts.append(float(d["lambda_hat"]))
    if d.get("lambda_ci"):
        pts.extend(float(x) for x in d["lambda_ci"])
    a, b = min(pts), max(pts)
    pad = max(0.25, 0.15 * (b - a))
    return max(min(lam), a - pad), min(max(lam), b + pad)


def methods_p(methods, judgement, alpha: float, effect: str = "AB") -> dict | None:
    """Every method's p-value for ``effect`` (default the interaction), with its
    trust from the verdict.

    Returns {alpha, effect, rows: [{method, p, p_interval, resamples, trusted,
    reason, agrees, note}]} in the order of ``Findings.methods``, or None when
    no method ran.  ``trusted`` is None when there is no verdict; ``note`` is
    the first note of a method that gave no p (why)."""
    if not methods:
        return None
    trust = getattr(judgement, "trust", None) or ()
    agrees = getattr(judgement, "agrees", None) or ()
    rows = []
    for i, m in enumerate(methods):
        if m.effect != effect:
            continue
        t = trust[i] if i < len(trust) else None
        rows.append({
            "method": m.id, "p": _num(m.p) if m.p is not None else None,
            "p_interval": [_num(x) for x in m.p_interval] if m.p_interval else None,
            "resamples": m.resamples,
            "trusted": None if t is None else bool(t.trusted),
            "reason": None if t is None else t.reason,
            "agrees": agrees[i] if i < len(agrees) else None,
            "note": (m.notes[0] if m.notes else "no p-value") if m.p is None else None,
        })
    if not rows:
        return None
    return {"alpha": alpha, "effect": effect, "rows": rows}


def _normality_check(diagnostics) -> dict | None:
    d = _find(diagnostics, "normality")
    if d is None:
        return None
    v = _values(d)
    sev = d.get("severity") if isinstance(d, dict) else d.severity
    return {"grade": sev, "skewness": v.get("skewness"), "excess_kurtosis": v.get("excess_kurtosis")}


def model_figure_data(fit: Fit) -> dict:
    """The part of :func:`figure_data` that needs only the fitted model: ``response``,
    ``alpha``, ``row_kind``, ``cell_means``, ``spread`` and ``sd_n``."""
    return {
        "response": fit.cells.response,
        "alpha": fit.alpha,
        "row_kind": fit.obs.row_kind if fit.obs is not None else "line",
        "cell_means": cell_means_ci(fit),
        "spread": spread_vs_fitted(fit),
        "sd_n": sd_vs_n(fit),
    }


def diagnostic_figure_data(fit: Fit, diagnostics) -> dict:
    """The part of :func:`figure_data` that needs the fitted model and the checks:
    ``qq``, ``loo`` and ``boxcox``."""
    qq = qq_points(fit)
    if qq is not None:
        qq["check"] = _normality_check(diagnostics)
    bc = boxcox_profile(diagnostics)
    if bc is not None:
        lo, hi = _focus_window(bc)
        bc["window"] = [lo, hi]
        bc["p_curve"] = boxcox_p_curve(fit, lo, hi)
    return {"qq": qq, "loo": loo_points(diagnostics), "boxcox": bc}


def figure_data(fit: Fit, diagnostics, *, methods=None, judgement=None, model_part: dict | None = None,
                diagnostic_part: dict | None = None) -> dict:
    """Every coordinate the report figures draw, in one JSON-friendly dict.

    Keys: ``response``, ``alpha``, ``row_kind``, ``cell_means``, ``qq``,
    ``spread``, ``sd_n``, ``loo``, ``boxcox``, ``methods_p`` (all but the
    first six may be None).  ``methods`` and ``judgement`` (the verdict) feed
    ``methods_p``; ``qq`` carries the normality check's grade
    (``qq['check']``), ``boxcox`` the interaction p against lambda
    (``boxcox['p_curve']``) over the shown window (``boxcox['window']``).
    ``model_part`` / ``diagnostic_part``: :func:`model_figure_data` /
    :func:`diagnostic_figure_data` of the same fit and checks, when already computed.
    """
    part = model_figure_data(fit) if model_part is None else model_part
    dpart = diagnostic_figure_data(fit, diagnostics) if diagnostic_part is None else diagnostic_part
    return {
        "response": part["response"],
        "alpha": part["alpha"],
        "row_kind": part["row_kind"],
        "cell_means": part["cell_means"],
        "qq": dpart["qq"],
        "spread": part["spread"],
        "sd_n": part["sd_n"],
        "loo": dpart["loo"],
        "boxcox": dpart["boxcox"],
        "methods_p": methods_p(methods, judgement, fit.alpha),
    }
