"""Cell-level Wald quadratic forms shared by the Welch-type and HC-robust tests.

In the saturated (cell-means) model every linear hypothesis on the cells is
C mu = 0, and every covariance estimate considered here is diagonal over cells:
S = diag(s2_jk / n_jk) (Welch-James, = HC2), or diag(sum_i omega_i / n_jk^2)
(HC3, HC4).  These functions accept a leading batch axis so the resampling
engine can evaluate thousands of resamples at once.
"""

from __future__ import annotations

import numpy as np

__all__ = ["wald_quadratic", "welch_james_a"]


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
    M = (C * v[..., None, :]) @ C.T                   # (..., r, r)
    Minv_C = np.linalg.solve(M, np.broadcast_to(C, M.shape[:-2] + C.shape))  # (..., r, m)
    R_diag = v * np.sum(C * Minv_C, axis=-2)          # (..., m)
    return np.sum(R_diag ** 2 / dfs, axis=-1)
