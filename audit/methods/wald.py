"""Cell-level Wald quadratic forms shared by the Welch-type and HC-robust tests.

In the saturated (cell-means) model every linear hypothesis on the cells is
C mu = 0, and every covariance estimate considered here is diagonal over cells:
S = diag(s2_jk / n_jk) (Welch-James, = HC2), or diag(sum_i omega_i / n_jk^2)
(HC3, HC4).  These functions accept a leading batch axis so the resampling
engine can evaluate thousands of resamples at once.

When C is exactly one of the Type III contrasts of a full J x K grid
(:func:`audit.core.type3_contrasts`) and every variance is positive, the forms
are evaluated without the r x r system (r up to (J-1)(K-1)): a main effect
through the weighted mean of its unweighted marginal means
(:func:`audit.core.type3_main_wald`, :func:`audit.core.type3_main_rdiag`), the
interaction as the residual SS of the additive model fitted with weights 1/v
(C_AB spans the complement of the additive columns, so
C'(C V C')^-1 C = V^-1 - V^-1 X (X' V^-1 X)^-1 X' V^-1; common practice) by the
core's structured solver (:func:`audit.core.additive_wls_filled`), whose
leverages give diag R = 1 - g / v.  Same numbers to rounding, O(JK min(J, K))
instead of O(r^2 JK).  A large design's cell with zero variance (two equal values
in a cell of two) would give the interaction's structured fit an infinite weight:
such a v enters as :data:`ZERO_V_FLOOR` times the median positive v of its row, the
limit the form tends to (T changes by a relative amount of that order; the
structured solver keeps about 1e-8 of conditioning to spare), instead of a dense
(J-1)(K-1)-row system that would not fit in memory.
"""

from __future__ import annotations

import numpy as np

from ..core import (
    Type3Contrast,
    dense_contrast,
    structured_rdiag,
    structured_ss,
    structured_ss_rdiag,
    type3_contrasts,
)

__all__ = ["wald_quadratic", "welch_james_a", "wald_and_a"]


def wald_and_a(means: np.ndarray, v: np.ndarray, dfs: np.ndarray, C) -> tuple[np.ndarray, np.ndarray]:
    """:func:`wald_quadratic` and :func:`welch_james_a` together (the structured
    interaction form solves its system once for both)."""
    v = np.asarray(v, dtype=float)
    st = _structure(C, v)
    if st is not None:
        T, Rd = structured_ss_rdiag(Type3Contrast(*st), means, _floored(v, C))
        return T, np.sum(Rd ** 2 / dfs, axis=-1)
    return wald_quadratic(means, v, C), welch_james_a(v, dfs, C)


def wald_quadratic(means: np.ndarray, v: np.ndarray, C: np.ndarray) -> np.ndarray:
    """T = (C ybar)' (C V C')^-1 (C ybar) with V = diag(v).

    Parameters
    ----------
    means, v : ndarray, shape (..., m)
        Cell means and the diagonal of their covariance matrix.
    C : ndarray, shape (r, m)

    Returns
    -------
    ndarray, shape (...)
    """
    means = np.asarray(means, dtype=float)
    v = np.asarray(v, dtype=float)
    st = _structure(C, v)
    if st is not None:
        return structured_ss(Type3Contrast(*st), means, _floored(v, C))
    C = dense_contrast(C, _SKIP)
    Cy = means @ C.T                                  # (..., r)
    M = (C * v[..., None, :]) @ C.T                   # (..., r, r)
    sol = np.linalg.solve(M, Cy[..., None])[..., 0]
    return np.sum(Cy * sol, axis=-1)


def welch_james_a(v: np.ndarray, dfs: np.ndarray, C: np.ndarray) -> np.ndarray:
    """Johansen's A = 1/2 sum_jk [tr((R Q_jk)^2) + tr(R Q_jk)^2] / f_jk.

    With R = S C' (C S C')^-1 C and Q_jk the single-1 selector, both traces
    reduce to the diagonal element R_jk,jk, so A = sum_jk R_jk,jk^2 / f_jk,
    where f_jk = n_jk - 1 (or h_jk - 1 for trimmed means).
    """
    v = np.asarray(v, dtype=float)
    st = _structure(C, v)
    if st is not None:
        return np.sum(structured_rdiag(Type3Contrast(*st), _floored(v, C)) ** 2 / dfs, axis=-1)
    C = dense_contrast(C, _SKIP)
    M = (C * v[..., None, :]) @ C.T                   # (..., r, r)
    Minv_C = np.linalg.solve(M, np.broadcast_to(C, M.shape[:-2] + C.shape))  # (..., r, m)
    R_diag = v * np.sum(C * Minv_C, axis=-2)          # (..., m)
    return np.sum(R_diag ** 2 / dfs, axis=-1)


#: below this many multiply-adds the dense form is used as it is (small designs
#: keep their numbers bit for bit; the structured forms agree to rounding)
_DENSE_WORK = 2_000_000

#: how to avoid a dense Wald form that does not fit the memory budget
_SKIP = ("a cell with zero variance leaves no structured Welch-James/HC form; skip the alternative methods "
         "(check(methods=False), --no-methods)")


#: a zero cell variance in the structured interaction form enters as this fraction of
#: the median positive variance (see the module docstring)
ZERO_V_FLOOR = 1e-8


def _floored(v: np.ndarray, C) -> np.ndarray:
    """v with zeros raised to :data:`ZERO_V_FLOOR` x the median positive v (per row), for
    the interaction's structured form; v unchanged otherwise."""
    if np.all(v > 0) or getattr(C, "effect", None) != "AB":
        return v
    pos = np.where(v > 0, v, np.nan)
    floor = ZERO_V_FLOOR * np.nanmedian(pos, axis=-1, keepdims=True)
    return np.where(v > 0, v, floor)


def _structure(C: np.ndarray, v: np.ndarray):
    """(J, K, effect) when C is exactly the Type III contrast of ``effect`` on a
    full J x K grid, every v is positive and finite, and the dense form would
    cost more than :data:`_DENSE_WORK`; else None.  A :class:`audit.core.Type3Contrast`
    says so by its type (never compared entry by entry)."""
    if isinstance(C, Type3Contrast):
        r, m = C.shape
        if r * r * m < _DENSE_WORK or not (np.all(np.isfinite(v)) and np.all(v >= 0)):
            return None
        if not np.all(v > 0):
            if C.effect == "AB" and not np.all(np.any(v > 0, axis=-1)):
                return None
            if C.effect != "AB":                # a main effect needs every marginal variance > 0
                vv = v.reshape(v.shape[:-1] + (C.J, C.K)).sum(axis=-1 if C.effect == "A" else -2)
                if not np.all(vv > 0):
                    return None
        return C.J, C.K, C.effect
    C = np.asarray(C)
    if C.ndim != 2:
        return None
    r, m = C.shape
    if r * r * m < _DENSE_WORK:
        return None
    cands = []
    for e, L in (("A", r + 1), ("B", r + 1)):
        if m % L == 0 and m // L >= 2:
            cands.append((L, m // L, e) if e == "A" else (m // L, L, e))
    s = m - r + 1                                  # J + K for the interaction
    disc = s * s - 4 * m
    if disc >= 0:
        root = int(round(disc ** 0.5))
        if root * root == disc and (s + root) % 2 == 0:
            big, small = (s + root) // 2, (s - root) // 2
            if small >= 2:
                cands += [(big, small, "AB"), (small, big, "AB")]
    for J, K, e in cands:
        if np.array_equal(C, type3_contrasts(J, K)[e]):
            if not (np.all(np.isfinite(v)) and np.all(v > 0)):
                return None
            return J, K, e
    return None
