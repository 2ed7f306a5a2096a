"""Shape and scale of the interaction (METHODS.md section 8).

* :func:`shape` - ordinal or crossover interaction from the cell means, in both
  orientations (lines of A across the levels of B, and lines of B across A),
  with each crossing judged against the cell standard errors.
* :func:`scale` - the interaction test again on log(y) and at the Box-Cox
  maximum-likelihood lambda of the full model, with its 95% profile interval.

Why both: an interaction without a crossing in either plot of the cell means
may be removable by a monotone transformation of the response (Loftus 1978,
Memory & Cognition 6:312-319); a genuine crossing in either orientation cannot
be removed that way (if f(y) were additive, f(mean) orderings would be the
same at every level of the other factor, and a monotone f keeps orderings).

Box-Cox (Box & Cox 1964, JRSS B 26:211-252): with z = (y^lambda - 1)/lambda
(log y at lambda = 0) the profile log-likelihood of the full cell-means model
is l(lambda) = -(N/2) log(SSE(lambda)/N) + (lambda - 1) sum log y, and the 95%
interval is {lambda : l(lambda) >= l(lambdahat) - chi2_1(0.95)/2}.  SSE(lambda)
is the within-cell SS of the transformed data, computed per cell from the
transformed observations (no model refit).  For numerical stability y is
divided by its geometric mean g first; SSE then scales by g^(2 lambda) and
l(lambda) changes only by the constant -sum log y + ... exactly absorbed below,
so the reported l(lambda) is the stated formula on the original y.

Severity rules (written down here and in the contributor guide)
---------------------------------------------------------------
shape
    "concern": the interaction is significant at alpha and the cell means do
    not cross in either orientation (ordinal): it may be removable by a monotone
    transformation (Loftus 1978); see ``scale``.  "minor": significant, and the
    lines cross only within noise (no crossing with both opposite differences
    beyond 1.96 standard errors; pointwise 95%, unadjusted: our choice).
    "clear": a crossing beyond noise, or no significant interaction.
scale
    "concern": significant on the raw scale but not after log or Box-Cox at a
    lambda inside the 95% profile interval ("removable"; Loftus 1978).
    "minor": not significant raw but significant at such a lambda while
    lambda = 1 lies outside the interval (scale may be masking an interaction),
    or lambda = 1 outside the interval with the decision unchanged, or the
    check could not be run (non-positive data, summary mode).  "clear" otherwise.
    These gradings are our choice.

Caution: a transformation changes the question (an interaction on the log
scale is about ratios, not differences); which scale is meaningful is a
substantive decision the audit cannot make.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, stats

from ..decision import decision
from ..errors import shorten
from ..facts import ScaleFacts, ShapeFacts
from ..results import NOT_RUN, Diagnostic
from .influence import _fmt_p, _num, cell_sums, interaction_test

__all__ = ["shape", "scale", "boxcox_profile", "CROSSING_Z"]

#: a crossing counts as beyond noise when both opposite differences exceed this
#: many standard errors (pointwise 95%, unadjusted; our choice)
CROSSING_Z = 1.959963984540054

_CHI2_HALF = float(stats.chi2.ppf(0.95, 1)) / 2.0
_LAMBDA_LIMIT = 10.0


# --------------------------------------------------------------------------
# shape
# --------------------------------------------------------------------------

def _cell_se(cells) -> np.ndarray:
    """Standard error of each cell mean: s_jk / sqrt(n_jk) from the cell's own
    variance; the pooled MS_E where a cell has n = 1; NaN if neither exists."""
    n = cells.counts.astype(float)
    v = cells.variances
    pooled = cells.sse_within / cells.df_within if cells.df_within > 0 else np.nan
    v = np.where(np.isfinite(v), v, pooled)
    with np.errstate(invalid="ignore", divide="ignore"):
        se = np.sqrt(v / n)
    return np.where(n > 0, se, np.nan)


def _orientation(M: np.ndarray, S: np.ndarray, lines: tuple, across: tuple, unit: float = 1.0) -> dict:
    """Do the lines (rows of M) cross across the columns?  M, S: (L, P), in units of
    ``unit`` (the reported differences are multiplied back to the response scale)."""
    L, P = M.shape
    scale = float(np.nanmax(M) - np.nanmin(M)) if np.isfinite(M).any() else 0.0
    tol = 1e-10 * max(scale, np.nanmax(np.abs(M)) if np.isfinite(M).any() else 0.0, 1e-300)
    # every pair of lines (a < b, in that order), vectorised over blocks of lines a
    keep_parts = []
    block = max(1, 2_000_000 // max(L * P, 1))
    for a0 in range(0, L, block):
        a, b = np.nonzero(np.arange(L)[None, :] > np.arange(a0, min(a0 + block, L))[:, None])
        a = a + a0
        D = M[a] - M[b]
        se = np.sqrt(S[a] ** 2 + S[b] ** 2)
        ok = np.isfinite(D)
        pos = ok & (D > tol)
        neg = ok & (D < -tol)
        live = (ok.sum(axis=1) >= 2) & pos.any(axis=1) & neg.any(axis=1)
        if not live.any():
            continue
        a, b, D, se, ok, pos, neg = a[live], b[live], D[live], se[live], ok[live], pos[live], neg[live]
        with np.errstate(invalid="ignore", divide="ignore"):
            z = np.where(ok & (se > 0), D / se, np.where(D > 0, np.inf, -np.inf))
        kp = np.argmax(np.where(pos, z, -np.inf), axis=1)      # first largest z among positive differences
        kn = np.argmin(np.where(neg, z, np.inf), axis=1)       # first smallest among negative ones
        rows = np.arange(a.size)
        zp, zn = z[rows, kp], z[rows, kn]
        keep_parts.append((a, b, kp, kn, D[rows, kp], D[rows, kn], zp, zn))
    if keep_parts:
        a, b, kp, kn, dp, dn, zp, zn = (np.concatenate(x) for x in zip(*keep_parts))
    else:
        a = b = kp = kn = np.zeros(0, dtype=np.int64)
        dp = dn = zp = zn = np.zeros(0)
    strength = np.minimum(zp, -zn)
    key = np.where(np.isfinite(strength), strength, np.where(strength > 0, np.inf, -np.inf))
    order = np.argsort(-key, kind="stable")
    credible = bool(np.any(key > CROSSING_Z))
    crossings = [{
        "lines": [lines[a[i]], lines[b[i]]],
        "between": [across[kp[i]], across[kn[i]]],
        "difference": [float(dp[i] * unit), float(dn[i] * unit)],
        "z": [_num(zp[i]), _num(zn[i])],
        "strength": _num(strength[i]) if np.isfinite(strength[i]) else None,
    } for i in order[:20]]
    return {
        "crosses": bool(a.size),
        "beyond_noise": credible,
        "n_crossing_pairs": int(a.size),
        "crossings": crossings,
    }


def shape(fit) -> Diagnostic:
    """Ordinal or crossover interaction from the cell means, both orientations.

    Two lines cross when their difference changes sign across the levels of
    the other factor (differences within 1e-10 of the spread of the means are
    ties, not crossings).  A crossing is "beyond noise" when both opposite
    differences exceed 1.96 standard errors (cell SEs, :data:`CROSSING_Z`).

    values keys: ``shape`` ('ordinal' | 'crossover' | 'crossover within
    noise'), ``a_lines_across_b`` and ``b_lines_across_a`` (each {crosses,
    beyond_noise, n_crossing_pairs, crossings: [{lines, between, difference,
    z, strength}]}), ``interaction_p``, ``alpha``, ``means`` (J x K, original
    scale, None for empty cells), ``se`` (J x K).
    """
    cells = fit.cells
    st = cells.standardised()   # exact power-of-two units: the cell variances neither underflow nor overflow
    M = np.where(st.filled, st.means, np.nan)
    S = _cell_se(st)
    la, lb = cells.levels_a, cells.levels_b
    fa, fb = cells.factors
    o_ab = _orientation(M, S, la, lb, st.unit)          # lines = levels of A, x axis = B
    o_ba = _orientation(M.T, S.T, lb, la, st.unit)      # lines = levels of B, x axis = A
    if o_ab["beyond_noise"] or o_ba["beyond_noise"]:
        kind = "crossover"
    elif o_ab["crosses"] or o_ba["crosses"]:
        kind = "crossover within noise"
    else:
        kind = "ordinal"
    ab = fit.anova.tables["II"].row("AB")
    p = ab.p
    sig = decision(p, fit.alpha) is True
    where = []
    fa, fb = shorten(fa, 48), shorten(fb, 48)   # user names in a sentence: never their whole length
    if o_ab["crosses"]:
        where.append(f"the {fa} lines cross across {fb}" + ("" if o_ab["beyond_noise"] else " (within noise)"))
    if o_ba["crosses"]:
        where.append(f"the {fb} lines cross across {fa}" + ("" if o_ba["beyond_noise"] else " (within noise)"))
    desc = "; ".join(where) if where else "no crossing in either plot of the cell means"
    if sig and kind == "ordinal":
        sev = "concern"
        summ = (f"Shape: the significant interaction is ordinal ({desc}), so it may be removable by a "
                "monotone transformation of the response (Loftus 1978): see the scale check before "
                "reading it as a substantive interaction.")
    elif sig and kind == "crossover within noise":
        sev = "minor"
        summ = (f"Shape: the significant interaction shows crossing lines only within noise ({desc}); "
                "treat it as possibly ordinal and see the scale check.")
    elif sig:
        sev = "clear"
        summ = (f"Shape: crossover interaction ({desc}); a crossing beyond noise cannot be removed by "
                "any monotone transformation of the response.")
    else:
        sev = "clear"
        summ = (f"Shape: the interaction is not significant at alpha {fit.alpha:g}; the cell means show "
                f"{desc} (descriptive only).")
    if p is None:
        summ += " The interaction test itself could not be formed, so the shape is descriptive."
    disp = cells.display_means
    return Diagnostic(id="shape", severity=sev, summary=summ, facts=ShapeFacts(shape=kind if sig else "none"), values={
        "shape": kind,
        "a_lines_across_b": o_ab,
        "b_lines_across_a": o_ba,
        "interaction_p": p,
        "alpha": fit.alpha,
        "crossing_z": CROSSING_Z,
        "means": [[(float(disp[j, k]) if cells.filled[j, k] else None) for k in range(cells.K)]
                  for j in range(cells.J)],
        "se": [[_num(S[j, k] * st.unit) for k in range(cells.K)] for j in range(cells.J)],
    })


# --------------------------------------------------------------------------
# Box-Cox profile
# --------------------------------------------------------------------------

class _Profile:
    """Within-cell SSE of the Box-Cox transformed response, vectorised over lambda."""

    def __init__(self, y: np.ndarray, cell: np.ndarray, JK: int):
        order = np.argsort(cell, kind="stable")
        ly = np.log(np.asarray(y, dtype=float)[order])
        self.sum_log_y = float(ly.sum())
        self.N = ly.size
        self.ly = ly - self.sum_log_y / self.N          # log(y / g), g the geometric mean
        c = np.asarray(cell)[order]
        n = np.bincount(c, minlength=JK)
        self.n = n[n > 0].astype(float)
        self.starts = np.concatenate([[0], np.cumsum(n[n > 0])[:-1]]).astype(np.intp)
        self.rep = np.repeat(np.arange(self.n.size), n[n > 0])

    def transform(self, lam: np.ndarray) -> np.ndarray:
        lam = np.asarray(lam, dtype=float)[:, None]
        small = np.abs(lam) < 1e-12
        safe = np.where(small, 1.0, lam)
        z = np.expm1(safe * self.ly[None, :]) / safe
        return np.where(small, self.ly[None, :], z)

    def sse_scaled(self, lams) -> np.ndarray:
        # one lambda at a time in two reused buffers (the same operations, hence the same
        # numbers, as transforming a batch of lambdas; no (lambdas, N) temporaries)
        lams = np.atleast_1d(np.asarray(lams, dtype=float))
        out = np.empty(lams.size)
        counts = np.diff(np.append(self.starts, self.N))
        z, d = np.empty(self.N), np.empty(self.N)
        for i, lam in enumerate(lams):
            if abs(lam) < 1e-12:
                z[:] = self.ly
            else:
                np.multiply(lam, self.ly, out=z)
                np.expm1(z, out=z)
                np.divide(z, lam, out=z)
            mu = np.add.reduceat(z, self.starts) / self.n
            np.subtract(z, np.repeat(mu, counts), out=d)
            mu = mu + np.add.reduceat(d, self.starts) / self.n
            np.subtract(z, np.repeat(mu, counts), out=d)
            np.multiply(d, d, out=d)
            out[i] = np.sum(d)
        return out

    def loglik(self, lams) -> np.ndarray:
        """l(lambda) = -(N/2) log(SSE(lambda)/N) + (lambda - 1) sum log y, computed
        as -(N/2) log(SSE_(y/g)(lambda)/N) - sum log y (see module notes)."""
        lams = np.atleast_1d(np.asarray(lams, dtype=float))
        sse = self.sse_scaled(lams)
        with np.errstate(divide="ignore"):
            ls = -(self.N / 2.0) * np.log(sse / self.N)
        return ls - self.sum_log_y


def boxcox_profile(y: np.ndarray, cell: np.ndarray, JK: int):
    """Maximum-likelihood Box-Cox lambda of the full cell-means model.

    Returns (lambda_hat, (lo, hi), profile) where profile is an object with
    ``loglik(lambdas)``; lo / hi are None when the interval reaches beyond
    +-10 (not bounded in the searched range).
    """
    prof = _Profile(y, cell, JK)
    f = lambda lam: float(prof.loglik(lam)[0])  # noqa: E731
    grid = np.linspace(-3.0, 3.0, 61)
    ll = prof.loglik(grid)
    i = int(np.argmax(ll))
    if i in (0, grid.size - 1):
        grid = np.linspace(-_LAMBDA_LIMIT, _LAMBDA_LIMIT, 401)
        ll = prof.loglik(grid)
        i = int(np.argmax(ll))
    lo_b = grid[max(i - 1, 0)]
    hi_b = grid[min(i + 1, grid.size - 1)]
    res = optimize.minimize_scalar(lambda t: -f(t), bounds=(lo_b, hi_b), method="bounded",
                                   options={"xatol": 1e-10})
    lam = float(res.x)
    lmax = f(lam)
    if ll[i] > lmax:
        lam, lmax = float(grid[i]), float(ll[i])
    target = lmax - _CHI2_HALF

    def root(direction: float):
        step, prev = 0.25, lam
        while True:
            nxt = prev + direction * step
            if abs(nxt) > _LAMBDA_LIMIT + 1e-12:
                nxt = math.copysign(_LAMBDA_LIMIT, nxt)
                if f(nxt) >= target:
                    return None
            if f(nxt) < target:
                return float(optimize.brentq(lambda t: f(t) - target, min(prev, nxt), max(prev, nxt),
                                             xtol=1e-12, rtol=1e-12))
            if abs(nxt) >= _LAMBDA_LIMIT:
                return None
            prev = nxt

    return lam, (root(-1.0), root(1.0)), prof


# --------------------------------------------------------------------------
# scale
# --------------------------------------------------------------------------

def scale(fit) -> Diagnostic:
    """The interaction test on the raw scale, on log(y) and at the Box-Cox
    maximum-likelihood lambda, with the 95% profile interval for lambda.

    values keys: ``available``, ``alpha``, ``raw_p``, ``log_p``, ``boxcox_p``,
    ``lambda_hat``, ``lambda_ci`` [lo, hi] (None for a bound beyond +-10),
    ``lambda1_inside`` (no transformation is compatible with the data),
    ``lambda0_inside`` (log is), ``profile_lambda``, ``profile_loglik`` (lists
    on a grid, for the figure), ``loglik_max``, ``survives_log``,
    ``survives_boxcox`` (the raw decision at alpha is unchanged), ``removable``,
    ``removable_at`` (lambdas inside the interval where a raw-significant
    interaction is not significant), ``checked_lambdas``, ``decision_changes_at``
    (the checked lambda inside the interval nearest to 1 at which the decision
    at alpha differs from the raw one; None if none) and ``decision_changes_p``.
    The summary names each lambda: lambda = 1 (raw), lambda = 0 (log), the
    maximum-likelihood lambda-hat, the interval ends, and the lambda at which
    the decision changes.
    """
    alpha = fit.alpha
    ab = fit.anova.tables["II"].row("AB")
    raw_p = ab.p
    base = {"available": False, "alpha": alpha, "raw_p": raw_p, "log_p": None, "boxcox_p": None,
            "lambda_hat": None, "lambda_ci": [None, None], "lambda1_inside": None, "lambda0_inside": None,
            "profile_lambda": [], "profile_loglik": [], "loglik_max": None, "survives_log": None,
            "survives_boxcox": None, "removable": False, "removable_at": [], "checked_lambdas": [],
            "decision_changes_at": None, "decision_changes_p": None}
    if fit.obs is None:
        r = "needs the raw observations (only cell summaries were given)"
        return Diagnostic(id="scale", severity=NOT_RUN,
                          summary=f"Scale: the log and Box-Cox re-tests {r}, so they were not run.",
                          values={**base, "reason": r})
    obs, cells = fit.obs, fit.cells
    y = np.asarray(obs.y_original, dtype=float)
    if raw_p is None:
        r = f"the interaction test cannot be formed on the raw scale ({ab.note})"
        return Diagnostic(id="scale", severity="minor", summary=f"Scale: {r}.", values={**base, "reason": r})
    if not (y > 0).all():
        r = (f"log and Box-Cox need a strictly positive response; found minimum {float(y.min()):g} "
             f"({int((y <= 0).sum())} value(s) <= 0)")
        return Diagnostic(id="scale", severity="minor",
                          summary=f"Scale: not checked: {r}; the scale dependence of the interaction is unknown.",
                          values={**base, "reason": r})
    J, K = cells.J, cells.K
    JK = J * K
    cell = obs.cell
    if cells.df_within < 1:
        r = "no within-cell replication, so the Box-Cox likelihood of the full model is unbounded"
        return Diagnostic(id="scale", severity="minor", summary=f"Scale: not checked: {r}.",
                          values={**base, "reason": r})
    lam, (lo, hi), prof = boxcox_profile(y, cell, JK)
    if not np.isfinite(float(prof.loglik(lam)[0])):
        r = "the response is constant within every cell, so the Box-Cox likelihood is unbounded"
        return Diagnostic(id="scale", severity="minor", summary=f"Scale: not checked: {r}.",
                          values={**base, "reason": r})
    sig_raw = decision(raw_p, alpha)
    if abs(lam) >= _LAMBDA_LIMIT - 1e-6:
        r = (f"the Box-Cox profile likelihood has no maximum inside [-{_LAMBDA_LIMIT:g}, {_LAMBDA_LIMIT:g}] "
             f"(too little within-cell information: {cells.df_within} error df), so lambda is not determined")
        z = prof.transform(np.array([0.0]))[0]
        csorted = np.repeat(np.flatnonzero(cells.counts.ravel() > 0), prof.n.astype(np.int64))
        log_p = interaction_test(*cell_sums(z, csorted, JK), J, K)[3]
        return Diagnostic(id="scale", severity="minor",
                          summary=(f"Scale: {r}; on the log scale the interaction p is {_fmt_p(log_p)} "
                                   f"(raw {_fmt_p(raw_p)})."),
                          values={**base, "reason": r, "log_p": _num(log_p),
                                  "survives_log": bool(decision(log_p, alpha) == sig_raw) if np.isfinite(log_p) else None})

    def p_at(lams):
        z = prof.transform(np.atleast_1d(lams))
        # back to data order is unnecessary: cells are what matter; build sums on sorted cells
        out = []
        csorted = np.repeat(np.flatnonzero(cells.counts.ravel() > 0), prof.n.astype(np.int64))
        for row in z:
            n, mu, css = cell_sums(row, csorted, JK)
            out.append(interaction_test(n, mu, css, J, K)[3])
        return out

    log_p, box_p = p_at([0.0, lam])
    lo_eff = lo if lo is not None else -_LAMBDA_LIMIT
    hi_eff = hi if hi is not None else _LAMBDA_LIMIT
    inside = lambda t: lo_eff <= t <= hi_eff  # noqa: E731
    lam1_in = inside(1.0)
    lam0_in = inside(0.0)
    checked = sorted(set([lam] + ([0.0] if lam0_in else []) + list(np.linspace(lo_eff, hi_eff, 11))))
    checked_p = p_at(checked)
    removable_at = [float(t) for t, p in zip(checked, checked_p) if np.isfinite(p) and decision(p, alpha) is False] if sig_raw else []
    removable = bool(sig_raw and removable_at)
    masked_at = [float(t) for t, p in zip(checked, checked_p) if np.isfinite(p) and decision(p, alpha)]
    g_lo = min(-2.0, lo_eff - 0.5)
    g_hi = max(3.0, hi_eff + 0.5)
    pgrid = np.linspace(max(g_lo, -_LAMBDA_LIMIT), min(g_hi, _LAMBDA_LIMIT), 121)
    pll = prof.loglik(pgrid)
    ci_txt = f"[{_fmt_l(lo)}, {_fmt_l(hi)}]"
    # the lambda inside the interval nearest to 1 (the least transformation) at which the decision changes
    changes = [(t, p) for t, p in zip(checked, checked_p) if np.isfinite(p) and decision(p, alpha) != sig_raw]
    change_at, change_p = min(changes, key=lambda tp: abs(tp[0] - 1.0)) if changes else (None, None)
    hat = f"maximum-likelihood Box-Cox lambda-hat = {lam:.2f} (p = {_fmt_p(box_p)} there)"
    interval = f"the 95% profile interval {ci_txt} around lambda-hat"
    log = f"log scale (lambda = 0): p = {_fmt_p(log_p)}"
    raw = f"raw scale (lambda = 1, p = {_fmt_p(raw_p)})"
    if removable:
        sev = "concern"
        summ = (f"Scale: the interaction is significant on the {raw} but not at lambda = {change_at:.2f} "
                f"(p = {_fmt_p(change_p)}), the power nearest to 1 inside {interval} at which the decision "
                f"changes; {hat}; {log}.  It may be an artefact of the measurement scale (removable), not a "
                "substantive interaction.")
    elif not sig_raw and not lam1_in and masked_at:
        sev = "minor"
        summ = (f"Scale: the interaction is not significant on the {raw}, but significant at lambda = "
                f"{change_at:.2f} (p = {_fmt_p(change_p)}), the power nearest to 1 inside {interval} at which the "
                f"decision changes; that interval excludes lambda = 1; {hat}; {log}: the raw scale may be "
                "masking an interaction.")
    elif not lam1_in:
        sev = "minor"
        summ = (f"Scale: the data favour a transformation ({interval} excludes lambda = 1; {hat}), but the "
                f"interaction decision at alpha {alpha:g} is the same on the {raw}, the {log} and at lambda-hat.")
    else:
        sev = "clear"
        summ = (f"Scale: no transformation is needed (lambda = 1 lies inside {interval}; {hat}) and the "
                f"interaction decision of the {raw} holds on the {log} and at lambda-hat.")
        if decision(log_p, alpha) != sig_raw or decision(box_p, alpha) != sig_raw:
            sev = "minor"
            which = []
            if decision(log_p, alpha) != sig_raw:
                which.append(f"on the {log}")
            if decision(box_p, alpha) != sig_raw:
                which.append(f"at the {hat}")
            summ = (f"Scale: lambda = 1 lies inside {interval}, but the interaction decision of the {raw} "
                    f"changes {' and '.join(which)}.")
    facts = ScaleFacts(removable=bool(removable), lambda_hat=_num(lam), log_p=_num(log_p), boxcox_p=_num(box_p))
    return Diagnostic(id="scale", severity=sev, summary=summ, facts=facts, values={
        "available": True,
        "alpha": alpha,
        "raw_p": float(raw_p),
        "log_p": _num(log_p),
        "boxcox_p": _num(box_p),
        "lambda_hat": lam,
        "lambda_ci": [lo, hi],
        "lambda1_inside": bool(lam1_in),
        "lambda0_inside": bool(lam0_in),
        "profile_lambda": [float(t) for t in pgrid],
        "profile_loglik": [_num(v) for v in pll],
        "loglik_max": _num(prof.loglik(lam)[0]),
        "survives_log": bool(decision(log_p, alpha) == sig_raw),
        "survives_boxcox": bool(decision(box_p, alpha) == sig_raw),
        "removable": removable,
        "removable_at": removable_at,
        "checked_lambdas": [float(t) for t in checked],
        "decision_changes_at": _num(change_at),
        "decision_changes_p": _num(change_p),
    })


def _fmt_l(x) -> str:
    return "unbounded" if x is None else f"{x:.2f}"
