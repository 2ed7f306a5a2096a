"""Heteroscedasticity-consistent Wald F tests (HC2, HC3, HC4) of the two-way effects.

OLS of the full factorial model with sum-to-zero coding; sandwich covariance
V = (X'X)^-1 X' diag(omega_i) X (X'X)^-1 with

    HC2: omega_i = e_i^2 / (1 - h_ii)
    HC3: omega_i = e_i^2 / (1 - h_ii)^2                 (MacKinnon & White 1985)
    HC4: omega_i = e_i^2 / (1 - h_ii)^delta_i, delta_i = min(4, h_ii / hbar)
                                                        (Cribari-Neto 2004)

and F = (L b)' (L V L')^-1 (L b) / q on (q, N - p) df.  The sum-coded model is
a reparametrisation of the saturated cell-means model, so with every cell
filled h_ii = 1 / n_jk, hbar = p / N = m / N, residuals are deviations from the
cell mean, and V of the cell means is diagonal:

    v_jk = css_jk / (n_jk^2 (1 - 1/n_jk)^delta_jk)     (delta = 1, 2 or the HC4 exponent)

The whole test therefore needs only cell counts and centred sums of squares
(it runs in summary mode too); HC2 gives v = s2 / n, the Welch-James S.

References
----------
.. [1] MacKinnon, J. G. & White, H. (1985). Some heteroskedasticity-consistent
       covariance matrix estimators with improved finite sample properties.
       Journal of Econometrics 29, 305-325.
.. [2] Cribari-Neto, F. (2004). Asymptotic inference under heteroskedasticity
       of unknown form. Computational Statistics & Data Analysis 45, 215-233.
.. [3] Long, J. S. & Ervin, L. H. (2000). Using heteroscedasticity consistent
       standard errors in the linear regression model. The American
       Statistician 54, 217-224.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..fit import Fit
from ..results import MethodResult
from .wald import wald_quadratic
from .welch import EFFECTS, _hyp_note, check_effect, estimable_contrast

__all__ = ["hc_cell_variances", "hc_wald_cells", "hc_wald", "hc3_wald", "hc4_wald", "hc_wald_all"]

KINDS = ("hc2", "hc3", "hc4")


def hc_cell_variances(css, counts, *, kind: str = "hc3"):
    """Diagonal of the HC covariance of the cell means in the saturated model.

    Parameters
    ----------
    css : ndarray (..., m)
        Centred within-cell sums of squares (sum of squared residuals per cell).
    counts : ndarray (m,)
        Cell sizes, every one >= 2 (h_ii = 1 / n_jk < 1).
    kind : 'hc2', 'hc3' or 'hc4'

    Returns
    -------
    ndarray (..., m)
    """
    if kind not in KINDS:
        raise ValueError(f"kind: expected one of {KINDS}, found {kind!r}")
    n = np.asarray(counts, dtype=float)
    css = np.asarray(css, dtype=float)
    h = 1.0 / n
    if kind == "hc2":
        delta = np.ones_like(n)
    elif kind == "hc3":
        delta = np.full_like(n, 2.0)
    else:
        hbar = n.size / n.sum()                       # p / N with p = m parameters
        delta = np.minimum(4.0, h / hbar)
    return css / (n * n * (1.0 - h) ** delta)


def hc_wald_cells(means, css, counts, C, *, kind: str = "hc3"):
    """Wald chi-square W = (C ybar)' (C V C')^-1 (C ybar) with the HC cell covariance.

    Batch-capable over a leading axis of ``means`` and ``css``.  F = W / r.
    """
    return wald_quadratic(means, hc_cell_variances(css, counts, kind=kind), C)


def hc_wald(fit: Fit, *, effect: str = "AB", kind: str = "hc3") -> MethodResult:
    """HC-robust Wald F of one effect (kind 'hc3', 'hc4' or 'hc2').

    Needs n_jk >= 2 in every filled cell (a cell with one observation has
    leverage 1 and no usable HC weight).  With empty cells the interaction is
    tested on its estimable contrasts in the cell-means model of the filled
    cells (p = m parameters, h_ii = 1 / n_jk); main effects then get a reason.
    ``extra``: W (chi-square form), kind, and for HC4 the range of exponents delta.
    """
    check_effect(effect)
    if kind not in KINDS:
        raise ValueError(f"kind: expected one of {KINDS}, found {kind!r}")
    mid = f"{kind}-wald"
    cells = fit.cells.standardised()   # exact power-of-two scale: squares neither underflow nor overflow
    counts = cells.counts

    def none(reason):
        return MethodResult(id=mid, effect=effect, statistic=None, statistic_name="F", p=None,
                            notes=(reason,), extra={"kind": kind})

    C, filled, reason = estimable_contrast(cells, effect)
    if reason:
        return none(reason)
    if (counts == 1).any():
        lab = [cells.cell_label(j, k) for j, k in zip(*np.nonzero(counts == 1))]
        return none(f"not computed: {len(lab)} cell(s) with one observation ({', '.join(lab[:5])}) have "
                    f"leverage h = 1, so the {kind.upper()} weight e^2 / (1 - h)^delta is 0/0; fix: collect "
                    "more observations there, or use the classical F (pooled error)")
    q = C.shape[0]
    n = counts.ravel()[filled]
    css = cells.css.ravel()[filled]
    means = cells.means.ravel()[filled]
    try:
        with np.errstate(all="ignore"):
            W = float(hc_wald_cells(means, css, n, C, kind=kind))
    except np.linalg.LinAlgError:
        W = float("nan")
    if not np.isfinite(W):
        return none("not computed: the robust covariance of this contrast is singular "
                    "(zero within-cell variation in the cells it compares)")
    df2 = float(cells.N - cells.m)
    F = W / q
    p = float(stats.f.sf(F, q, df2))
    notes = [{"A": "main effect A on unweighted marginal means (Type III hypothesis)",
              "B": "main effect B on unweighted marginal means (Type III hypothesis)",
              "AB": "interaction on all (J-1)(K-1) interaction contrasts"}[effect]
             if filled.all() else _hyp_note(effect, q, filled),
             f"{kind.upper()} sandwich covariance: allows unequal cell variances; F = W / q referred to "
             "F(q, N - p)"]
    extra = {"W": W, "kind": kind}
    if kind == "hc3":
        notes.append("HC3 is the variant recommended for small samples (Long & Ervin 2000)")
    if kind == "hc4":
        delta = np.minimum(4.0, (1.0 / n) / (n.size / n.sum()))
        extra["delta_min"] = float(delta.min())
        extra["delta_max"] = float(delta.max())
    return MethodResult(id=mid, effect=effect, statistic=F, statistic_name="F", df1=float(q), df2=df2, p=p,
                        notes=tuple(notes), extra=extra)


def hc3_wald(fit: Fit, *, effect: str = "AB") -> MethodResult:
    """HC3-robust Wald F (MacKinnon & White 1985)."""
    return hc_wald(fit, effect=effect, kind="hc3")


def hc4_wald(fit: Fit, *, effect: str = "AB") -> MethodResult:
    """HC4-robust Wald F (Cribari-Neto 2004)."""
    return hc_wald(fit, effect=effect, kind="hc4")


def hc_wald_all(fit: Fit, *, kind: str = "hc3") -> tuple[MethodResult, ...]:
    """HC Wald results for A, B and AB."""
    return tuple(hc_wald(fit, effect=e, kind=kind) for e in EFFECTS)
