"""Stage 3 of the flow: the exact classical two-way ANOVA from cell statistics.

Types I, II and III sums of squares by model comparison on cell means
(METHODS.md section 1).  Every model's residual SS is the within-cell SS plus a
weighted sum of squares of the cell means around the model's cell-level fit,
so only the between-cell parts are ever subtracted (no large SSE differences):

    SSE(model) = SSE_full + Q(model),  Q(model) = sum_jk n_jk (ybar_jk - fit_jk)^2.

No formula parser and no per-call model refit over observations: the additive
model is a weighted least-squares fit on at most J*K cell means.

References
----------
.. [1] Searle, S. R. (1987). Linear Models for Unbalanced Data. Wiley.
.. [2] Olejnik, S. & Algina, J. (2003). Generalized eta and omega squared
       statistics. Psychological Methods 8, 434-447.
.. [3] Steiger, J. H. (2004). Beyond the F test: effect size confidence
       intervals and tests of close fit. Psychological Methods 9, 164-182.
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass

import numpy as np

from .design import CellStats

__all__ = [
    "AnovaRow",
    "AnovaTable",
    "AnovaResult",
    "anova_two_way",
    "additive_cell_fit",
    "additive_design",
    "weighted_ls_residual",
    "additive_residual",
    "additive_fit_and_leverage",
    "additive_wls_filled",
    "type3_main_wald",
    "type3_main_rdiag",
    "contrast_matrix",
    "type3_contrast",
    "Type3Contrast",
    "dense_contrast",
    "structured_ss",
    "structured_rdiag",
    "structured_ss_rdiag",
    "structured_restricted_fit",
    "structured_restricted_leverage",
    "interaction_traces",
    "check_dense_budget",
    "DENSE_BUDGET",
    "partial_eta_sq_ci",
    "partial_eta_sq_interval",
    "ncf_cdf",
    "ncf_tail",
    "ncf_cdf_mixture",
    "ncf_tail_asymptotic",
    "ZERO_SS_RTOL",
]

EFFECTS = ("A", "B", "AB")


@dataclass(frozen=True, kw_only=True)
class AnovaRow:
    """One line of an ANOVA table.

    Attributes
    ----------
    effect : str
        'A', 'B', 'AB' or 'residual'.
    label : str
        The effect in the data's own names ('supp', 'dose', 'supp:dose', 'Residual').
    ss, df, ms : sums of squares, degrees of freedom, mean square.
    F, p : float or None
        None, with ``note`` saying why, when the test cannot be formed.
    partial_eta_sq : float or None
        SS_eff / (SS_eff + SS_E).
    partial_eta_sq_ci : tuple of float or None
        95% interval from the noncentral F [3].
    partial_omega_sq : float or None
        (SS_eff - df MS_E) / (SS_eff + (N - df) MS_E) [2].
    note : str or None
        Why a value is missing, or what the hypothesis means here.
    """

    effect: str
    label: str
    ss: float | None
    df: int
    ms: float | None
    F: float | None
    p: float | None
    partial_eta_sq: float | None
    partial_eta_sq_ci: tuple[float, float] | None
    partial_omega_sq: float | None
    note: str | None = None

    def to_dict(self) -> dict:
        return {
            "effect": self.effect,
            "label": self.label,
            "ss": self.ss,
            "df": self.df,
            "ms": self.ms,
            "F": self.F,
            "p": self.p,
            "partial_eta_sq": self.partial_eta_sq,
            "partial_eta_sq_ci": list(self.partial_eta_sq_ci) if self.partial_eta_sq_ci else None,
            "partial_omega_sq": self.partial_omega_sq,
            "note": self.note,
        }


@dataclass(frozen=True, kw_only=True)
class AnovaTable:
    """An ANOVA table of one sums-of-squares type ('I', 'II' or 'III')."""

    ss_type: str
    rows: tuple[AnovaRow, ...]

    def row(self, effect: str) -> AnovaRow:
        for r in self.rows:
            if r.effect == effect:
                return r
        raise KeyError(effect)

    def to_list(self) -> list[dict]:
        return [r.to_dict() for r in self.rows]


@dataclass(frozen=True, kw_only=True)
class AnovaResult:
    """The classical two-way ANOVA of every SS type.

    Attributes
    ----------
    tables : dict str -> AnovaTable
        Keys 'I', 'II', 'III'.
    interaction_terms : ndarray (J, K)
        Cell mean minus the additive model's fitted cell mean (NaN in empty
        cells).  In a balanced design these are ybar_jk - ybar_j. - ybar_.k +
        ybar_.. ; in general sum n_jk * term_jk^2 = SS_AB.
    additive_fit : ndarray (J, K)
        Fitted cell means of the additive model (relative to the offset).
    ss_error, df_error, ms_error : the full model's residual SS, df and MS
        on the response scale (ms_error None when df_error = 0; ss_error and
        ms_error None when outside the float64 range, 0.0 when zero to
        rounding, see :data:`ZERO_SS_RTOL`).
    df_interaction : int
        (J-1)(K-1) with every cell filled; m - rank(additive) otherwise.
    """

    tables: dict
    interaction_terms: np.ndarray
    additive_fit: np.ndarray
    ss_error: float | None
    df_error: int
    ms_error: float | None
    df_interaction: int

    def to_dict(self) -> dict:
        return {t: self.tables[t].to_list() for t in ("I", "II", "III")}


def contrast_matrix(L: int) -> np.ndarray:
    """(L-1) x L deviation contrasts [I | -1] (full row rank)."""
    return np.hstack([np.eye(L - 1), -np.ones((L - 1, 1))])


def additive_design(J: int, K: int, terms: tuple[str, ...] = ("A", "B")) -> np.ndarray:
    """Cell-level design matrix (J*K rows, j-major) with sum-to-zero coding:
    intercept, then A contrasts and B contrasts for the terms named."""
    cols = [np.ones((J * K, 1))]
    if "A" in terms:
        cols.append(np.kron(contrast_matrix(J).T, np.ones((K, 1))))
    if "B" in terms:
        cols.append(np.kron(np.ones((J, 1)), contrast_matrix(K).T))
    return np.hstack(cols)


def weighted_ls_residual(X: np.ndarray, w: np.ndarray, target: np.ndarray) -> tuple[np.ndarray, int]:
    """Residual of the weighted least-squares fit of ``target`` on ``X`` over the
    rows with w > 0 (zero elsewhere), with one step of iterative refinement;
    and the rank of the fit.

    A dense solve, O(rows x columns^2): for the additive model A + B on a J x K
    grid of cells use :func:`additive_residual` (structured, O(J K min(J, K))).
    """
    keep = w > 0
    sw = np.sqrt(w[keep])
    Xk = X[keep]
    Xw = Xk * sw[:, None]
    beta, _, rank, _ = np.linalg.lstsq(Xw, target[keep] * sw, rcond=None)
    r = target[keep] - Xk @ beta
    r = r - Xk @ np.linalg.lstsq(Xw, r * sw, rcond=None)[0]
    out = np.zeros_like(target, dtype=float)
    out[keep] = r
    return out, int(rank)


_BLAS = None


def one_blas_thread():
    """Context in which BLAS/LAPACK run on one thread (``threadpoolctl`` when it is
    installed, else a no-op).  The structured solver's batched k x k inverses and
    products are small: on a busy machine a threaded BLAS spends most of their time
    waiting (149 x 149 inverses measured 1.3 ms on one thread, 11-60 ms on two with
    the cores shared), so these paths ask for one thread."""
    global _BLAS
    try:
        from threadpoolctl import ThreadpoolController
    except ImportError:                       # optional: the numbers are the same without it
        return contextlib.nullcontext()
    if _BLAS is None:
        _BLAS = ThreadpoolController()
    return _BLAS.limit(limits=1, user_api="blas")


class _AdditiveSystem:
    """The normal equations of the additive model A + B on a J x K grid of cells
    with weights n (0 for an empty cell), reduced by eliminating the larger
    factor's parameters.

    Dummy coding (one column per level of the factor with more levels, one per
    level of the other minus one reference level in each connected component of
    the design) gives a full-rank system whose first block is diagonal (the
    per-level weight totals: eliminating it is taking per-level weighted means);
    what is left is the Schur complement S over the smaller factor, at most
    min(J, K) - 1 unknowns.  Levels without a filled cell drop out, and the
    connected components (scipy.sparse.csgraph on the bipartite graph of filled
    cells) give the rank: levels present minus components [1, ch. 7].
    """

    def __init__(self, n: np.ndarray):
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        n = np.asarray(n, dtype=float)
        self.swap = n.shape[0] < n.shape[1]      # the diagonal block takes the larger factor
        if self.swap:
            n = n.T
        J, K = n.shape
        self.shape = (J, K)
        self.n = n
        self.filled = filled = n > 0
        na, nb = n.sum(axis=1), n.sum(axis=0)
        ja, kb = np.nonzero(filled)
        graph = coo_matrix((np.ones(ja.size), (ja, J + kb)), shape=(J + K, J + K))
        self.components, label = connected_components(graph, directed=False)
        present_a, present_b = na > 0, nb > 0
        comps_b = label[J:]
        ref = np.zeros(K, dtype=bool)              # first present level of each component
        _, first = np.unique(np.where(present_b, comps_b, -1), return_index=True)
        ref[first[present_b[first]]] = True
        self.ia = ia = np.flatnonzero(present_a)
        self.ib = ib = np.flatnonzero(present_b & ~ref)
        self.rank = int(ia.size + ib.size)
        self.Da = na[ia]
        self.Nm = n[np.ix_(ia, ib)]
        with one_blas_thread():
            S = np.diag(nb[ib]) - self.Nm.T @ (self.Nm / self.Da[:, None])
            self.Si = np.linalg.inv(S) if ib.size else np.zeros((0, 0))

    def residual(self, v: np.ndarray) -> np.ndarray:
        """v - fit of v (in this system's orientation), 0 on empty cells; v may
        carry leading batch axes (..., J, K)."""
        J, K = self.shape
        wv = self.n * v
        ra, rb = wv.sum(axis=-1)[..., self.ia], wv.sum(axis=-2)[..., self.ib]
        beta_b = (rb - (ra / self.Da) @ self.Nm) @ self.Si.T
        alpha = np.zeros(v.shape[:-1])
        alpha[..., self.ia] = (ra - beta_b @ self.Nm.T) / self.Da
        beta = np.zeros(v.shape[:-2] + (K,))
        beta[..., self.ib] = beta_b
        return np.where(self.filled, v - alpha[..., :, None] - beta[..., None, :], 0.0)

    def refined_residual(self, t: np.ndarray) -> np.ndarray:
        t = np.where(self.filled, t, 0.0)
        r = self.residual(t)
        return self.residual(r)                  # one step of iterative refinement


def additive_residual(n: np.ndarray, t: np.ndarray) -> tuple[np.ndarray, int]:
    """Weighted least-squares residual of cell values on the additive model A + B.

    Parameters
    ----------
    n : ndarray (J, K)
        Weights (cell counts; 0 for an empty cell).
    t : ndarray (..., J, K)
        Cell values to fit (ignored where n = 0); leading axes are a batch.

    Returns
    -------
    R : ndarray (..., J, K)
        t - fit on the filled cells, 0 elsewhere (one step of iterative refinement).
    rank : int
        Rank of A + B on the filled cells: levels present minus the connected
        components of the design (J + K - 1 when connected).

    Notes
    -----
    The same fit as :func:`weighted_ls_residual` on :func:`additive_design`, in
    O(J K min(J, K) + min(J, K)^3) instead of O(J K (J + K)^2): see
    :class:`_AdditiveSystem`.
    """
    sysm = _AdditiveSystem(n)
    t = np.asarray(t, dtype=float)
    if sysm.swap:
        t = np.swapaxes(t, -1, -2)
    R = sysm.refined_residual(t)
    if sysm.swap:
        R = np.swapaxes(R, -1, -2)
    return R, sysm.rank


def additive_fit_and_leverage(n: np.ndarray, t: np.ndarray):
    """Weighted least-squares fit of the additive model A + B to cell values,
    with the leverages.

    Parameters
    ----------
    n : ndarray (J, K)
        Cell counts (the weights; 0 for an empty cell).
    t : ndarray (J, K)
        Cell values to fit (0 where empty).

    Returns
    -------
    R : ndarray (J, K)
        Residual t - fit on the filled cells (0 elsewhere).
    g : ndarray (J, K)
        Leverage of one observation of each filled cell under the additive
        model, x' (X' W X)^- x (0 elsewhere); the cell's leverage is n g.
    rank : int
        Rank of the additive model on the filled cells: levels present minus
        connected components of the design.
    cross : callable (j, k) -> ndarray (J, K)
        x' (X' W X)^- x_c for every cell against cell c = (j, k) (the cell-level
        hat matrix column of c is n_c times it).

    Notes
    -----
    The reduced normal equations of :class:`_AdditiveSystem`.  Cost
    O(J K min(J, K) + min(J, K)^3), with one step of iterative refinement of
    the residual.
    """
    sysm = _AdditiveSystem(n)
    swap = sysm.swap
    t = np.asarray(t, dtype=float)
    if swap:
        t = t.T
    J, K = sysm.shape
    filled, ia, ib = sysm.filled, sysm.ia, sysm.ib
    Da, Nm, Si = sysm.Da, sysm.Nm, sysm.Si
    R = sysm.refined_residual(t)
    # g_jk = 1/n_j. + (a_j - f_k)' S^-1 (a_j - f_k), a_j = Nm[j] / n_j., f_k the unit vector of k
    a = np.zeros((J, ib.size))
    a[ia] = Nm / Da[:, None]
    aS = np.zeros((J, K))
    aS[:, ib] = a @ Si
    Sfull = np.zeros((K, K))
    Sfull[np.ix_(ib, ib)] = Si
    dinv = np.zeros(J)
    dinv[ia] = 1.0 / Da
    q = np.einsum("ij,ij->i", aS[:, ib], a)
    g = dinv[:, None] + q[:, None] - 2.0 * aS + np.diag(Sfull)[None, :]
    g = np.where(filled, g, 0.0)

    def cross(j0: int, k0: int) -> np.ndarray:
        """x' (X' W X)^- x_c for every cell (0 where empty), c = (j0, k0)."""
        j, k = (k0, j0) if swap else (j0, k0)
        out = (dinv[j] * (np.arange(J) == j) + aS[:, ib] @ a[j] - aS[:, k])[:, None] - aS[j][None, :] + Sfull[k][None, :]
        out = np.where(filled, out, 0.0)
        return out.T if swap else out

    if swap:
        R, g = R.T, g.T
    return R, g, sysm.rank, cross


def additive_wls_filled(w: np.ndarray, t: np.ndarray, *, leverage: bool = False):
    """Weighted LS of cell values on A + B with every cell filled, batched over
    leading axes of the weights as well (w, t of shape (..., J, K), w > 0).

    The reduced normal equations of :class:`_AdditiveSystem` with the last level
    of the smaller factor as reference (a full grid is connected), one small
    solve of min(J, K) - 1 unknowns per batch element, one step of iterative
    refinement.  Returns the residual R (..., J, K) and, with ``leverage``, the
    leverages g = x' (X' W X)^-1 x (..., J, K) (None otherwise).
    """
    with one_blas_thread():
        return _additive_wls_filled(w, t, leverage)


def _additive_wls_filled(w, t, leverage):
    w = np.asarray(w, dtype=float)
    t = np.asarray(t, dtype=float)
    swap = w.shape[-2] < w.shape[-1]
    if swap:
        w, t = np.swapaxes(w, -1, -2), np.swapaxes(t, -1, -2)
    shape = np.broadcast_shapes(w.shape, t.shape)
    w = np.broadcast_to(w, shape)
    k = shape[-1] - 1
    Da = w.sum(axis=-1)                                       # (..., J)
    Nm = w[..., :k]                                           # (..., J, k)
    a = Nm / Da[..., None]
    S = -(np.swapaxes(Nm, -1, -2) @ a)                        # matmul: BLAS, not an einsum loop
    idx = np.arange(k)
    S[..., idx, idx] += w.sum(axis=-2)[..., :k]
    Si = (np.linalg.inv(S) if k else np.zeros(shape[:-2] + (0, 0))) if leverage else None

    def residual(v):
        wv = w * v
        ra, rb = wv.sum(axis=-1), wv.sum(axis=-2)[..., :k]
        rhs = rb - ((ra / Da)[..., None, :] @ Nm)[..., 0, :]
        if not k:
            beta_b = rhs
        elif Si is not None:
            beta_b = (Si @ rhs[..., None])[..., 0]
        else:
            beta_b = np.linalg.solve(S, rhs[..., None])[..., 0]
        alpha = (ra - (Nm @ beta_b[..., None])[..., 0]) / Da
        beta = np.concatenate([beta_b, np.zeros(beta_b.shape[:-1] + (1,))], axis=-1)
        return v - alpha[..., :, None] - beta[..., None, :]

    R = residual(residual(np.broadcast_to(t, shape)))
    g = None
    if leverage:
        aS = a @ Si                                           # (..., J, k)
        q = np.sum(aS * a, axis=-1)                           # (..., J)
        g = (1.0 / Da + q)[..., None] + np.zeros(shape)
        g[..., :k] += np.diagonal(Si, axis1=-2, axis2=-1)[..., None, :] - 2.0 * aS
    if swap:
        R = np.swapaxes(R, -1, -2)
        g = None if g is None else np.swapaxes(g, -1, -2)
    return R, g


def _weighted_fit(cells: CellStats, terms: tuple[str, ...], centre: float) -> tuple[np.ndarray, float, int]:
    """Weighted LS of cell means on a sub-model; returns (fit, Q, rank).

    The additive model A + B uses the structured solver
    (:func:`additive_residual`); other sub-models the dense one."""
    n = cells.counts.ravel().astype(float)
    keep = n > 0
    ybar = np.where(keep, cells.means.ravel() - centre, 0.0)
    if tuple(terms) == ("A", "B"):
        r, rank = additive_residual(cells.counts, ybar.reshape(cells.J, cells.K))
        r = r.ravel()
    else:
        r, rank = weighted_ls_residual(additive_design(cells.J, cells.K, terms), n, ybar)
    Q = float(np.sum(n * r * r))
    fit = np.where(keep, ybar - r, np.nan)
    return fit.reshape(cells.J, cells.K) + centre, Q, rank


def additive_cell_fit(cells: CellStats) -> tuple[np.ndarray, float, int]:
    """Fitted cell means of the additive model A + B, its between-cell residual SS
    Q(A+B) = sum n_jk (ybar_jk - fit_jk)^2, and its rank (J + K - 1 when connected)."""
    return _weighted_fit(cells, ("A", "B"), _grand_mean(cells))


def _grand_mean(cells: CellStats) -> float:
    n = cells.counts
    return float(np.sum(np.where(n > 0, cells.means, 0.0) * n) / n.sum())


def _q_one_way(cells: CellStats, axis: int | None) -> float:
    """Q for mu only (axis None), mu + A (axis 1 averaged: rows) or mu + B."""
    n = cells.counts.astype(float)
    ybar = np.where(n > 0, cells.means, 0.0)
    if axis is None:
        mu = np.sum(n * ybar) / n.sum()
        d = np.where(n > 0, ybar - mu, 0.0)
        return float(np.sum(n * d * d))
    tot = n.sum(axis=axis, keepdims=True)
    mu = np.sum(n * ybar, axis=axis, keepdims=True) / tot
    d = np.where(n > 0, ybar - mu, 0.0)
    return float(np.sum(n * d * d))


def _wald_ss(cells: CellStats, C: np.ndarray) -> float:
    """(C ybar)' (C D C')^-1 (C ybar) with D = diag(1/n); all cells filled.

    Dense (O(r^2 JK + r^3) for r contrasts): the Type III main effects use
    :func:`type3_main_wald`, the same number in O(JK)."""
    ybar = cells.means.ravel() - _grand_mean(cells)
    d = 1.0 / cells.counts.ravel()
    Cy = C @ ybar
    M = (C * d) @ C.T
    return float(Cy @ np.linalg.solve(M, Cy))


def _marginal_parts(v: np.ndarray, J: int, K: int, effect: str):
    """Per-level variance of the unweighted marginal mean (w) and the number of
    cells averaged (L) for the Type III hypothesis of a main effect."""
    v = np.asarray(v, dtype=float).reshape(v.shape[:-1] + (J, K))
    if effect == "A":
        return v.sum(axis=-1) / (K * K), K
    if effect == "B":
        return v.sum(axis=-2) / (J * J), J
    raise ValueError(f"effect: expected 'A' or 'B', found {effect!r}")


def type3_main_wald(means: np.ndarray, v: np.ndarray, J: int, K: int, effect: str) -> np.ndarray:
    """The Type III Wald form of a main effect with a diagonal covariance, in O(JK).

    T = (C ybar)' (C V C')^-1 (C ybar) for C = C_A (or C_B) of
    :func:`type3_contrasts`, V = diag(v), every cell filled, batched over
    leading axes of ``means`` and ``v`` (shape (..., J*K), j-major).

    C_A = C_J kron 1'/K, so C_A ybar = C_J mbar with mbar_j the unweighted mean
    of row j's cell means, and C_A V C_A' = C_J W C_J' with W = diag(w_j),
    w_j = sum_k v_jk / K^2.  C_J has full row rank J - 1 and null space span(1),
    so C_J' (C_J W C_J')^-1 C_J = W^-1 - W^-1 1 1' W^-1 / (1' W^-1 1) and
    T = sum_j (mbar_j - m*)^2 / w_j, m* = sum_j (mbar_j / w_j) / sum_j (1 / w_j):
    the residual SS of the weighted mean of the marginal means (the usual
    Wald-to-least-squares identity; Searle 1987 [1], sec. 5.5, common practice).
    Requires every v > 0 (finite); callers fall back to the dense form otherwise.
    """
    means = np.asarray(means, dtype=float)
    w, L = _marginal_parts(v, J, K, effect)
    mm = means.reshape(means.shape[:-1] + (J, K))
    mbar = mm.mean(axis=-1) if effect == "A" else mm.mean(axis=-2)
    iw = 1.0 / w
    centre = np.sum(mbar * iw, axis=-1, keepdims=True) / np.sum(iw, axis=-1, keepdims=True)
    d = mbar - centre
    return np.sum(d * d * iw, axis=-1)


def type3_main_rdiag(v: np.ndarray, J: int, K: int, effect: str) -> np.ndarray:
    """The diagonal of R = V C' (C V C')^-1 C for a Type III main effect, in O(JK).

    With the notation of :func:`type3_main_wald`, C' (C V C')^-1 C =
    G kron 1 1' / L^2 (L = K for A, J for B) with G = W^-1 - W^-1 1 1' W^-1 / s,
    s = sum 1/w, so R_jk,jk = v_jk (1/w_j - 1/(w_j^2 s)) / L^2 (shape (..., J*K)).
    """
    v = np.asarray(v, dtype=float)
    w, L = _marginal_parts(v, J, K, effect)
    iw = 1.0 / w
    G = iw - iw * iw / np.sum(iw, axis=-1, keepdims=True)
    Gc = G[..., :, None] if effect == "A" else G[..., None, :]
    vv = v.reshape(v.shape[:-1] + (J, K))
    return (vv * Gc / (L * L)).reshape(v.shape)


def type3_contrasts(J: int, K: int) -> dict[str, np.ndarray]:
    """C_A, C_B, C_AB of METHODS.md section 1 (cells j-major).

    C_A = C_J kron 1'/K, C_B = 1'/J kron C_K, C_AB = C_J kron C_K, built by
    broadcasting (the same values as numpy.kron, without its overhead)."""
    CJ, CK = contrast_matrix(J), contrast_matrix(K)
    return {
        "A": np.repeat(CJ, K, axis=1) * (np.ones(1) / K),
        "B": np.tile(CK * (np.ones(1) / J), (1, J)),
        "AB": (CJ[:, None, :, None] * CK[None, :, None, :]).reshape((J - 1) * (K - 1), J * K),
    }


#: a dense array in the number of cells (an (J-1)(K-1) x JK contrast matrix, a JK x JK
#: projection, an m x m basis) larger than this many bytes is refused with
#: :class:`audit.errors.DesignTooLargeError` instead of being allocated; every default
#: path of a full grid has a structured form and never asks for one
DENSE_BUDGET = 256 * 2**20


def check_dense_budget(nbytes: float, *, what: str, J: int, K: int | None, skip: str) -> None:
    """Refuse an allocation of ``nbytes`` that grows faster than the number of cells.

    Raises :class:`audit.errors.DesignTooLargeError` (one line: the design size,
    the stage, the bytes it would take and ``skip``, the option that avoids the
    stage) when ``nbytes`` exceeds :data:`DENSE_BUDGET`.  ``K`` None: ``J`` is the number
    of cells."""
    if nbytes > DENSE_BUDGET:
        from .errors import DesignTooLargeError

        size = f"a design with {J:,} cells" if K is None else f"a {J} x {K} design ({J * K:,} cells)"
        raise DesignTooLargeError(
            f"design too large for {what}: {size} would need "
            f"{nbytes / 2**20:,.0f} MB for a dense matrix in the number of cells (budget "
            f"{DENSE_BUDGET // 2**20} MB); {skip}")


def type3_contrast(J: int, K: int, effect: str, *, skip: str = "this stage has no structured form") -> np.ndarray:
    """The dense Type III contrast matrix of one effect (``type3_contrasts(J, K)[effect]``),
    after the memory budget check (:func:`check_dense_budget`)."""
    r = {"A": J - 1, "B": K - 1, "AB": (J - 1) * (K - 1)}[effect]
    check_dense_budget(8.0 * r * J * K, what=f"the dense Type III contrast of {effect}", J=J, K=K, skip=skip)
    CJ, CK = contrast_matrix(J), contrast_matrix(K)
    if effect == "A":
        return np.repeat(CJ, K, axis=1) * (np.ones(1) / K)
    if effect == "B":
        return np.tile(CK * (np.ones(1) / J), (1, J))
    return (CJ[:, None, :, None] * CK[None, :, None, :]).reshape(r, J * K)


class Type3Contrast:
    """The Type III contrast C of one effect on a full J x K grid, kept by its
    structure (``shape`` (r, J*K) as the matrix has) instead of as r x JK numbers.

    Consumers that have a structured form use ``J``, ``K``, ``effect`` (the Wald
    forms of :mod:`audit.methods.wald`, the resampling statistics, the size check);
    :meth:`dense` (also ``numpy.asarray``) builds the matrix after the memory budget
    check, for the few paths that need it (small designs keep the dense numbers bit
    for bit)."""

    __slots__ = ("J", "K", "effect", "shape", "_dense")
    ndim = 2

    def __init__(self, J: int, K: int, effect: str):
        self.J, self.K, self.effect = int(J), int(K), effect
        r = {"A": J - 1, "B": K - 1, "AB": (J - 1) * (K - 1)}[effect]
        self.shape = (r, self.J * self.K)
        self._dense = None

    def dense(self, skip: str = "this stage has no structured form") -> np.ndarray:
        if self._dense is None:
            self._dense = type3_contrast(self.J, self.K, self.effect, skip=skip)
        return self._dense

    def __array__(self, dtype=None, copy=None):
        d = self.dense()
        return d if dtype is None else d.astype(dtype, copy=False)

    def __repr__(self) -> str:
        return f"Type3Contrast(J={self.J}, K={self.K}, effect={self.effect!r})"


def dense_contrast(C, skip: str = "this stage has no structured form") -> np.ndarray:
    """C as a dense float array (a :class:`Type3Contrast` after the budget check)."""
    if isinstance(C, Type3Contrast):
        return C.dense(skip)
    return np.asarray(C, dtype=float)


def structured_ss(C: Type3Contrast, means: np.ndarray, v: np.ndarray) -> np.ndarray:
    """(C ybar)' (C V C')^-1 (C ybar), V = diag(v) > 0, for a Type III contrast of a full
    grid, batched over leading axes of ``means`` / ``v`` (..., J*K): a main effect by
    :func:`type3_main_wald`, the interaction as the residual SS of the additive model
    fitted with weights 1/v (C_AB spans the complement of the additive columns, so
    C'(C V C')^-1 C = V^-1 - V^-1 X (X' V^-1 X)^-1 X' V^-1; common practice)."""
    J, K = C.J, C.K
    means = np.asarray(means, dtype=float)
    v = np.asarray(v, dtype=float)
    if C.effect != "AB":
        return type3_main_wald(means, v, J, K, C.effect)
    w = 1.0 / v
    R, _ = additive_wls_filled(w.reshape(w.shape[:-1] + (J, K)), means.reshape(means.shape[:-1] + (J, K)))
    R = R.reshape(R.shape[:-2] + (J * K,))
    return np.sum(w * R * R, axis=-1)


def structured_rdiag(C: Type3Contrast, v: np.ndarray) -> np.ndarray:
    """diag R, R = V C' (C V C')^-1 C, for a Type III contrast of a full grid (v > 0,
    batched (..., J*K)): :func:`type3_main_rdiag` for a main effect, 1 - g / v (g the
    leverages of the additive fit with weights 1/v) for the interaction."""
    J, K = C.J, C.K
    v = np.asarray(v, dtype=float)
    if C.effect != "AB":
        return type3_main_rdiag(v, J, K, C.effect)
    w = 1.0 / v
    _, g = additive_wls_filled(w.reshape(w.shape[:-1] + (J, K)), np.zeros(v.shape[:-1] + (J, K)), leverage=True)
    return 1.0 - w * g.reshape(g.shape[:-2] + (J * K,))


def structured_ss_rdiag(C: Type3Contrast, means: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`structured_ss` and :func:`structured_rdiag` together (the interaction's
    additive fit solved once, with its leverages)."""
    if C.effect != "AB":
        return structured_ss(C, means, v), structured_rdiag(C, v)
    J, K = C.J, C.K
    means = np.asarray(means, dtype=float)
    w = 1.0 / np.asarray(v, dtype=float)
    R, g = additive_wls_filled(w.reshape(w.shape[:-1] + (J, K)), means.reshape(means.shape[:-1] + (J, K)),
                               leverage=True)
    R = R.reshape(R.shape[:-2] + (J * K,))
    return np.sum(w * R * R, axis=-1), 1.0 - w * g.reshape(g.shape[:-2] + (J * K,))


def structured_restricted_fit(C: Type3Contrast, means: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Weighted LS fit of the cell means (m,) under C mu = 0, weights n (full grid):
    mu_r = ybar - D C' (C D C')^-1 C ybar, D = diag(1/n), in O(JK min(J, K)).

    Interaction: the additive model's fit.  Main effect A: C_A' (C_A D C_A')^-1 C_A =
    G kron 1 1' / K^2 with G = W^-1 - W^-1 1 1' W^-1 / s (w_j = sum_k d_jk / K^2,
    s = sum 1/w; :func:`type3_main_wald`), so (D P ybar)_jk = d_jk (mbar_j - m*) / (w_j K)."""
    J, K = C.J, C.K
    means = np.asarray(means, dtype=float)
    n = np.asarray(counts, dtype=float)
    if C.effect == "AB":
        R, _ = additive_wls_filled(n.reshape(J, K), means.reshape(J, K))
        return means - R.ravel()
    d = 1.0 / n
    w, L = _marginal_parts(d, J, K, C.effect)
    mm = means.reshape(J, K)
    mbar = mm.mean(axis=1) if C.effect == "A" else mm.mean(axis=0)
    iw = 1.0 / w
    centre = np.sum(mbar * iw) / np.sum(iw)
    g = (mbar - centre) * iw / L
    corr = d.reshape(J, K) * (g[:, None] if C.effect == "A" else g[None, :])
    return means - corr.ravel()


def structured_restricted_leverage(C: Type3Contrast, counts: np.ndarray) -> np.ndarray:
    """Observation leverage of each cell under the restricted model {C mu = 0}, weights n
    (full grid): h = (1 - diag R) / n with R = D C'(C D C')^-1 C, D = diag(1/n) (the
    restricted fit's cell-level hat diagonal over n); the additive leverage for the
    interaction."""
    n = np.asarray(counts, dtype=float)
    return (1.0 - structured_rdiag(C, 1.0 / n)) / n


def interaction_traces(n: np.ndarray, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """tr(P T) and tr((P T)^2) for the interaction of a full J x K grid, P = C' (C D C')^-1 C
    (C = C_AB, D = diag(1/n)), T = diag(t), batched over leading axes of ``t`` (..., J, K);
    no JK x JK or (J-1)(K-1)-row matrix.

    C_AB spans the complement of the additive columns X, so P = N - N H N with N = diag(n),
    H = X M^-1 X', M = X' N X (the additive model's normal equations, J + K - 1 unknowns).
    With g = diag H (the additive leverages per unit weight) and U = diag(n^2 t):

        tr(P T)     = sum n t - sum n^2 t g
        tr((P T)^2) = sum n^2 t^2 - 2 sum n^3 t^2 g + tr((M^-1 G)^2),  G = X' U X.

    In dummy coding (every level of the larger factor, the other's levels but its last)
    M^-1 = E + Y S^-1 Y' (E = diag(1/n_j., 0), Y = [-N_m / n_j. ; I], S the Schur
    complement) and G = diag + [[0, U_m], [U_m', 0]], so M^-1 G is a diagonal plus a
    rank-2k product (k = min(J, K) - 1) and its squared trace needs only k x k and
    J x k products: O(J K min(J, K)) per t."""
    with one_blas_thread():
        return _interaction_traces(n, t)


def _interaction_traces(n, t):
    n = np.asarray(n, dtype=float)
    t = np.asarray(t, dtype=float)
    if n.shape[0] < n.shape[1]:                  # the diagonal block takes the larger factor
        n, t = n.T, np.swapaxes(t, -1, -2)
    J, K = n.shape
    k = K - 1
    _, g = additive_wls_filled(n, np.zeros_like(n), leverage=True)
    nt = n * t
    tr1 = np.sum(nt, axis=(-2, -1)) - np.sum(nt * n * g, axis=(-2, -1))
    base = np.sum(nt * nt, axis=(-2, -1)) - 2.0 * np.sum(nt * nt * n * g, axis=(-2, -1))
    Da = n.sum(axis=1)
    Nm = n[:, :k]
    Ya = -Nm / Da[:, None]                                   # (J, k)
    S = np.diag(n.sum(axis=0)[:k]) + Nm.T @ Ya
    Si = np.linalg.inv(S) if k else np.zeros((0, 0))
    U = n * nt                                               # n^2 t
    Ua = U.sum(axis=-1)                                      # (..., J)
    Ub = U.sum(axis=-2)[..., :k]                             # (..., k)
    Um = U[..., :k]                                          # (..., J, k)
    # Y' G = [Ya' diag(Ua) + Um',  Ya' Um + diag(Ub)]  (k x (J + k)); W = S^-1 Y' G
    YGa = Ya.T * Ua[..., None, :] + np.swapaxes(Um, -1, -2)          # (..., k, J)
    YGb = np.einsum("jk,...jl->...kl", Ya, Um)                       # (..., k, k)
    idx = np.arange(k)
    YGb[..., idx, idx] += Ub
    Wa = Si @ YGa                                                    # (..., k, J)
    Wb = Si @ YGb                                                    # (..., k, k)
    delta = Ua / Da                                                  # (..., J)
    cross = np.einsum("jk,...kj->...j", Ya, Wa)                      # Y[i] . W[:, i], i < J
    Bm = Wa @ (Um / Da[:, None])                                     # (..., k, k)
    Cm = Wa @ Ya + Wb
    tr_mg2 = (np.sum(delta * delta, axis=-1) + 2.0 * np.sum(delta * cross, axis=-1)
              + 2.0 * np.trace(Bm, axis1=-2, axis2=-1) + np.sum(Cm * np.swapaxes(Cm, -1, -2), axis=(-2, -1)))
    return tr1, base + tr_mg2


#: an SS at or below this fraction of the uncorrected total SS (sum of the
#: squared responses about the intake offset) is rounding noise: each value
#: carries a rounding error of at most eps |y|, so any SS formed from exactly
#: equal or exactly additive data is of order eps^2 sum y^2 (a factor 1e3 on
#: eps leaves room for the accumulation over cells; our choice).  Such an
#: effect SS is reported as 0 and a residual SS at or below it counts as "no
#: variation within cells".
ZERO_SS_RTOL = (1e3 * np.finfo(float).eps) ** 2

#: scipy.stats.ncf (Boost's noncentral beta) is called only inside this box of
#: arguments (checked BEFORE the call).  Outside it scipy returns NaN or numbers
#: outside [0, 1] (ncf.sf(3, 2, 1e20, 10) = 15.4), takes up to a second a call
#: (noncentralities of 1e12 and more), or aborts the whole process from C++
#: (ncf.sf(6.0e17, 1, 4e15, 6.0e17): a std::out_of_range raised while Boost formats
#: its "series did not converge" message), which no Python code can catch.
#: Probed on a grid (df1 1-200, df2 5-1e18, lambda to 1e13, F from 1e-3 to 1e3
#: times the numerator's centre): inside the box every call is fast and the only
#: failures are NaN, which the fallbacks below catch.
NCF_SCIPY_MAX_LAMBDA = 1e6
NCF_SCIPY_MAX_DF = 1e9
NCF_SCIPY_MAX_F = 1e12
#: above this df1 + lambda the noncentral chi-square is taken from Sankaran's
#: normal approximation (its error is below 1e-8 here, 7e-11 at 1e6; Sankaran
#: 1963, Biometrika 50, 199-204, from memory), below it from scipy's ncx2
_SANKARAN_MIN = 1e5
#: above this many df the denominator chi-square is taken from the Wilson-Hilferty
#: cube-root normal form (error about 1e-8 at 1e6 df and falling; scipy's chi2
#: loses accuracy beyond about 1e7 df)
_WH_MIN_DF = 1e6

#: 1 - cdf is used where the noncentral F cdf is not a number; beyond this many
#: error df, or where neither is a number, the cdf is the expectation of the
#: noncentral chi-square cdf over the denominator chi-square (quadrature)
_NCF_QUAD_PANELS = np.array([0.0, 1e-12, 1e-8, 1e-5, 1e-3, 0.02, 0.2, 0.5, 0.8, 0.98,
                             1 - 1e-3, 1 - 1e-5, 1 - 1e-8, 1 - 1e-12, 1.0])
_NCF_QUAD_NODES = 32

#: how the noncentral F was evaluated (:func:`ncf_tail`)
NCF_ROUTE_SCIPY = "noncentral F"
NCF_ROUTE_MIXTURE = "noncentral F (chi-square mixture by quadrature)"
NCF_ROUTE_APPROX = "noncentral F (large-argument normal approximations, Sankaran / Wilson-Hilferty)"


def _quad_nodes():
    x, w = np.polynomial.legendre.leggauss(_NCF_QUAD_NODES)
    a, b = _NCF_QUAD_PANELS[:-1, None], _NCF_QUAD_PANELS[1:, None]
    return (a + (b - a) * (x + 1.0) / 2.0).ravel(), ((b - a) / 2.0 * w).ravel()


def _in_scipy_box(F: float, df1: float, df2: float, lam: float) -> bool:
    return (lam <= NCF_SCIPY_MAX_LAMBDA and df1 <= NCF_SCIPY_MAX_DF and math.isfinite(df2)
            and df2 <= NCF_SCIPY_MAX_DF and F <= NCF_SCIPY_MAX_F)


def _prob_or_nan(v) -> float:
    v = float(v)
    return v if math.isfinite(v) and 0.0 <= v <= 1.0 else math.nan


def ncf_tail(F: float, df1: float, df2: float, lam: float, *, upper: bool = False) -> tuple[float, str | None]:
    """P(F' <= F) (``upper``: P(F' > F)) for the noncentral F(df1, df2, lam) and
    the route used; (NaN, None) when the arguments are not numbers in range or
    every route fails.  Never raises on numbers and never calls scipy outside
    the box where it is safe (:data:`NCF_SCIPY_MAX_LAMBDA`, ...).

    Inside the box: scipy's ``ncf`` (the other tail as 1 - it where a tail is
    NaN), then the chi-square mixture (:func:`ncf_cdf_mixture`).  Outside it
    (huge F, df or noncentrality; df2 may be infinite, the noncentral chi-square
    limit): :func:`ncf_tail_asymptotic`.
    """
    from scipy import stats

    try:
        F, df1, df2, lam = float(F), float(df1), float(df2), float(lam)
    except (TypeError, ValueError, OverflowError):
        return math.nan, None
    if not (math.isfinite(df1) and df1 > 0 and df2 > 0 and not math.isnan(df2) and math.isfinite(lam)
            and lam >= 0 and not math.isnan(F)):
        return math.nan, None
    if F <= 0:
        return (1.0 if upper else 0.0), NCF_ROUTE_SCIPY
    if math.isinf(F):
        return (0.0 if upper else 1.0), NCF_ROUTE_SCIPY
    if _in_scipy_box(F, df1, df2, lam):
        first, other = ("sf", "cdf") if upper else ("cdf", "sf")
        with np.errstate(all="ignore"):
            try:
                if lam <= 0:
                    c = _prob_or_nan(getattr(stats.f, first)(F, df1, df2))
                    if math.isfinite(c):
                        return c, NCF_ROUTE_SCIPY
                c = _prob_or_nan(getattr(stats.ncf, first)(F, df1, df2, lam))
                if math.isfinite(c):
                    return c, NCF_ROUTE_SCIPY
                c = _prob_or_nan(1.0 - float(getattr(stats.ncf, other)(F, df1, df2, lam)))
                if math.isfinite(c):
                    return c, NCF_ROUTE_SCIPY
            except (ArithmeticError, ValueError):
                pass
        c = ncf_cdf_mixture(F, df1, df2, lam)
        if math.isfinite(c):
            return (1.0 - c if upper else c), NCF_ROUTE_MIXTURE
        return math.nan, None
    c = ncf_tail_asymptotic(F, df1, df2, lam, upper=upper)
    return (c, NCF_ROUTE_APPROX) if math.isfinite(c) else (math.nan, None)


def ncf_cdf(F: float, df1: float, df2: float, lam: float) -> float:
    """P(F' <= F) for the noncentral F(df1, df2, lam), NaN-free where possible.

    scipy.stats.ncf.cdf returns NaN for some large arguments (for example
    F = 300, df1 = 15, df2 = 1e5, lam = 9000); then 1 - ncf.sf is used, and
    where that fails too, the defining mixture
    P(F' <= F) = E[ P(chi2'(df1, lam) <= F df1 X / df2) ], X ~ chi2(df2),
    by Gauss-Legendre quadrature over the probability scale of X.  Outside the
    box where scipy is safe, :func:`ncf_tail_asymptotic` (see :func:`ncf_tail`).
    Returns NaN only if every route fails.
    """
    return ncf_tail(F, df1, df2, lam)[0]


def ncf_cdf_mixture(F: float, df1: float, df2: float, lam: float) -> float:
    """P(F' <= F) as E[ncx2.cdf(F df1 X / df2; df1, lam)], X ~ chi2(df2), by
    Gauss-Legendre quadrature on 14 panels of u = P(X <= x), dense in the tails
    (the definition of the noncentral F as a ratio of independent chi-squares;
    agrees with scipy.stats.ncf.cdf to about 1e-9 where that is defined).
    Meant for the box of :func:`ncf_tail` (lam up to 1e6); NaN when a value is
    not a number."""
    from scipy import stats

    u, ww = _quad_nodes()
    try:
        with np.errstate(all="ignore"):
            X = stats.chi2.ppf(u, df2) / df2
            v = _ncx2_cdf(F * df1 * X, df1, lam)
    except (ArithmeticError, ValueError):
        return float("nan")
    ok = np.isfinite(v)
    if not ok.all():
        return float("nan")
    return float(np.clip(np.sum(ww * v), 0.0, 1.0))


def _ncx2_cdf(x: np.ndarray, k: float, lam: float, upper: bool = False) -> np.ndarray:
    """scipy's noncentral (or central) chi-square tail, with arguments far in the
    upper tail (where scipy's ncx2.sf overflows inside Boost's tgamma) answered
    as 1 / 0 without a call: beyond k + lam + 1000 SD + 1000 the upper tail is
    below 1e-300."""
    from scipy import stats

    x = np.asarray(x, dtype=float)
    far = x > k + lam + 1000.0 * math.sqrt(2.0 * (k + 2.0 * lam)) + 1000.0
    xs = np.where(far, k + lam, x)
    with np.errstate(all="ignore"):
        if upper:
            v = stats.ncx2.sf(xs, k, lam) if lam > 0 else stats.chi2.sf(xs, k)
        else:
            v = stats.ncx2.cdf(xs, k, lam) if lam > 0 else stats.chi2.cdf(xs, k)
    return np.where(far, 0.0 if upper else 1.0, v)


def _sankaran(k: float, lam: float):
    """(h, mu - 1, sigma): ((chi2'(k, lam) / (k + lam))^h - mu) / sigma is about
    standard normal (Sankaran 1963; from memory, checked against scipy's ncx2 in
    tests/test_ncf_guard.py)."""
    kl, k2 = k + lam, k + 2.0 * lam
    h = 1.0 - (2.0 / 3.0) * kl * (k + 3.0 * lam) / (k2 * k2)
    p = k2 / (kl * kl)
    m = (h - 1.0) * (1.0 - 3.0 * h)
    dmu = h * p * (h - 1.0 - 0.5 * (2.0 - h) * m * p)
    sig = h * math.sqrt(2.0 * p) * (1.0 + 0.5 * m * p)
    return h, dmu, sig


def ncf_tail_asymptotic(F: float, df1: float, df2: float, lam: float, *, upper: bool = False) -> float:
    """P(F' <= F) (``upper``: P(F' > F)) for arguments beyond scipy's safe box.

    F' = (N / df1) / (X / df2), N ~ chi2'(df1, lam), X ~ chi2(df2), so F' <= F
    exactly when log(N / (df1 + lam)) - log(X / df2) <= a, a = log(F df1 / (df1 + lam)).
    The probability is the expectation, over the more concentrated of N / (df1 + lam)
    and X / df2 (smaller relative SD; the other's tail is then smooth across it), of
    the other's tail, by Gauss-Legendre quadrature on the probability scale (14
    panels, dense in the tails).  N is taken from scipy's ncx2 when df1 + lam <=
    1e5, else from Sankaran's normal form; X from scipy's chi2 up to 1e6 df, else
    Wilson-Hilferty, as infinite df2 by X / df2 = 1 (the noncentral chi-square
    limit).  Every small difference is formed as such (log1p / expm1), so the
    result holds at any magnitude of F and lam that float64 holds.  NaN if a
    value is not a number.
    """
    from scipy import special, stats

    k, nu = float(df1), float(df2)
    kl = k + lam
    a = math.log(F) + math.log(k) - math.log(kl)
    approx_n = kl > _SANKARAN_MIN
    rn = math.sqrt(2.0 * (k + 2.0 * lam)) / kl
    rx = math.sqrt(2.0 / nu) if math.isfinite(nu) else 0.0
    wh = math.isfinite(nu) and nu > _WH_MIN_DF
    c9 = 2.0 / (9.0 * nu) if math.isfinite(nu) else 0.0
    u, w = _quad_nodes()
    try:
        with np.errstate(all="ignore"):
            if approx_n:
                h, dmu, sig = _sankaran(k, lam)
            if rx == 0.0 or rx <= rn or not approx_n:
                # over X: P(log(N / kl) <= a + lx)
                if rx == 0.0:
                    lx, w = np.zeros(1), np.ones(1)
                elif wh:
                    lx = 3.0 * np.log1p(-c9 + special.ndtri(u) * math.sqrt(c9))
                else:
                    lx = np.log(stats.chi2.ppf(u, nu) / nu)
                t = a + lx
                if approx_n:
                    z = (np.expm1(h * t) - dmu) / sig
                    v = special.ndtr(-z) if upper else special.ndtr(z)
                else:
                    v = _ncx2_cdf(np.exp(math.log(F) + math.log(k) + lx), k, lam, upper)
            else:
                # over N: P(log(X / nu) >= log(N / kl) - a)
                ln = np.log1p(dmu + sig * special.ndtri(u)) / h
                t = ln - a
                if wh:
                    zx = (np.expm1(t / 3.0) + c9) / math.sqrt(c9)
                    v = special.ndtr(zx) if upper else special.ndtr(-zx)
                else:
                    xq = nu * np.exp(t)
                    v = stats.chi2.cdf(xq, nu) if upper else stats.chi2.sf(xq, nu)
            v = np.asarray(v, dtype=float)
    except (ArithmeticError, ValueError):
        return math.nan
    if not np.isfinite(v).all():
        return math.nan
    return float(np.clip(np.sum(w * v), 0.0, 1.0))


#: largest noncentrality searched (about the float64 range; eta^2 is then 1 to
#: double precision)
_LAMBDA_MAX = 1e300
#: the bracket for a bound is doubled at most this many times (the upper bound
#: exceeds 2 F df1 by the reciprocal of a small quantile of chi2(df2) / df2: a
#: factor of about 1e3 for df2 = 1, 2^10)
_CI_MAX_DOUBLINGS = 200
#: each bound's root search stops after this many cdf evaluations
_CI_MAX_ITER = 100
#: and a whole interval after this many seconds (a safety net: each evaluation
#: is bounded, so the limit is not reached in practice)
CI_TIME_LIMIT = 5.0


def partial_eta_sq_interval(F: float, df1: float, df2: float, *, level: float = 0.95
                            ) -> tuple[tuple[float, float] | None, str | None]:
    """Confidence interval for partial eta^2 and a note: (interval, None), or
    (interval, what approximation was used), or (None, why it is missing).

    Finds lambda_lo, lambda_hi with P(F' <= F_obs; lambda) = (1 + level)/2 and
    (1 - level)/2, then eta^2 = lambda / (lambda + df1 + df2 + 1) [3].  The cdf
    comes from :func:`ncf_tail` (scipy's noncentral F inside its safe box, with
    fallbacks; large-argument approximations outside it), the root from a
    bracketing search (doubling from max(10, 2 F df1), at most
    :data:`_CI_MAX_DOUBLINGS` times and up to lambda = 1e300, then Brent's
    method with at most :data:`_CI_MAX_ITER` iterations), all within
    :data:`CI_TIME_LIMIT` seconds.  Never raises on numbers.
    """
    import time

    from scipy import optimize

    try:
        F, df1, df2 = float(F), float(df1), float(df2)
    except (TypeError, ValueError, OverflowError):
        return None, "the F statistic or its df are not numbers"
    if not (math.isfinite(F) and F >= 0 and math.isfinite(df1) and df1 > 0 and math.isfinite(df2) and df2 > 0):
        return None, "the F statistic or its df are not finite positive numbers"
    hi_q = (1 + level) / 2
    lo_q = (1 - level) / 2
    deadline = time.monotonic() + CI_TIME_LIMIT
    routes: set = set()

    class _Fail(Exception):
        pass

    def cdf(lam: float) -> float:
        if time.monotonic() > deadline:
            raise _Fail(f"the noncentral F inversion did not finish within {CI_TIME_LIMIT:g} s")
        c, route = ncf_tail(F, df1, df2, lam)
        if not math.isfinite(c):
            raise _Fail("the noncentral F could not be evaluated at these values")
        routes.add(route)
        return c

    def solve(q: float) -> float:
        if cdf(0.0) <= q:
            return 0.0
        lower, upper = 0.0, min(max(10.0, 2.0 * F * df1), _LAMBDA_MAX)
        steps = 0
        while cdf(upper) > q:
            if upper >= _LAMBDA_MAX or steps >= _CI_MAX_DOUBLINGS:
                raise _Fail("no noncentrality up to 1e300 reaches the observed F")
            lower, upper = upper, min(upper * 2.0, _LAMBDA_MAX)
            steps += 1
        g = lambda lam: cdf(lam) - q  # noqa: E731
        return float(optimize.brentq(g, lower, upper, xtol=1e-10, rtol=1e-12, maxiter=_CI_MAX_ITER))

    try:
        lam_lo, lam_hi = solve(hi_q), solve(lo_q)
    except _Fail as e:
        return None, str(e)
    except (ValueError, RuntimeError, ArithmeticError):
        return None, "the noncentral F inversion did not converge"
    conv = lambda lam: lam / (lam + df1 + df2 + 1)  # noqa: E731
    note = None
    if NCF_ROUTE_APPROX in routes:
        note = ("the interval of partial eta squared uses large-argument normal approximations of the "
                "noncentral F (Sankaran 1963; Wilson-Hilferty), as scipy's noncentral F is unreliable at "
                "these values")
    return (conv(lam_lo), conv(lam_hi)), note


def partial_eta_sq_ci(F: float, df1: int, df2: int, *, level: float = 0.95) -> tuple[float, float] | None:
    """Confidence interval for partial eta^2 by inverting the noncentral F
    (:func:`partial_eta_sq_interval` without its note).

    Finds lambda_lo, lambda_hi with P(F' <= F_obs; lambda) = (1 + level)/2 and
    (1 - level)/2, then eta^2 = lambda / (lambda + df1 + df2 + 1) [3].  Returns
    None when the interval cannot be computed (the caller states why, or use
    :func:`partial_eta_sq_interval` for the reason).
    """
    return partial_eta_sq_interval(F, df1, df2, level=level)[0]

@dataclass(frozen=True)
class _Scale:
    """What a row needs besides its own SS (all SS in standardised units)."""

    ms_error: float | None     # None: no error df; 0.0: no within-cell variation
    df_error: int
    N: int
    unit: float                # standardised SS x unit^2 = response-scale SS
    zero: float                # SS at or below this is rounding noise


_RANGE_NOTE = ("the {what} is outside the float64 range on the response's scale ({val}); it is "
               "left blank, while F, p and the effect sizes are computed on the standardised "
               "response and are unaffected")


def _restore(x: float | None, unit: float, what: str, notes: list) -> float | None:
    """x * unit^2 (unit an exact power of two) or None with a note when the
    product overflows or underflows the normal float64 range."""
    if x is None:
        return None
    with np.errstate(all="ignore"):
        v = float(x) * unit * unit
    if x == 0.0 or (math.isfinite(v) and abs(v) >= np.finfo(float).tiny):
        return v
    e = math.log10(abs(x)) + 2.0 * math.log2(unit) * math.log10(2.0) if x and math.isfinite(x) else math.nan
    val = f"about 1e{e:.0f}" if math.isfinite(e) else "beyond what float64 holds"
    notes.append(_RANGE_NOTE.format(what=what, val=val))
    return None


def _join(*notes) -> str | None:
    out = [n for n in notes if n]
    return "; ".join(out) if out else None


def _row(effect, label, ss, df, sc: _Scale, note=None) -> AnovaRow:
    ms_error, df_error, N = sc.ms_error, sc.df_error, sc.N
    if ss is None or df <= 0:
        return AnovaRow(effect=effect, label=label, ss=None, df=df, ms=None, F=None, p=None,
                        partial_eta_sq=None, partial_eta_sq_ci=None, partial_omega_sq=None,
                        note=note or "no degrees of freedom left for this effect in the filled cells")
    notes: list[str] = []
    ss = max(float(ss), 0.0)
    if ss <= sc.zero and ss > 0.0:
        ss = 0.0
        notes.append("the effect SS is zero to rounding (at or below 5e-26 of the sum of squared "
                     "responses, ZERO_SS_RTOL) and is reported as 0")
    ms = ss / df
    ss_d = _restore(ss, sc.unit, "sum of squares", notes)
    ms_d = _restore(ms, sc.unit, "mean square", [])
    if ms_error is None:
        return AnovaRow(effect=effect, label=label, ss=ss_d, df=df, ms=ms_d, F=None, p=None,
                        partial_eta_sq=None, partial_eta_sq_ci=None, partial_omega_sq=None,
                        note=_join(note or "no within-cell error term (one observation per cell): F and p "
                                           "cannot be formed", *notes))
    sse = ms_error * df_error
    if ms_error <= 0:
        if ss > 0:
            eta, why = 1.0, None
        else:
            eta, why = None, ("partial eta squared is 0/0 (no variation within cells and none for this "
                              "effect) and is left blank")
        return AnovaRow(effect=effect, label=label, ss=ss_d, df=df, ms=ms_d, F=None, p=None,
                        partial_eta_sq=eta, partial_eta_sq_ci=None, partial_omega_sq=None,
                        note=_join(note or "no variation within cells (every observation equals its cell "
                                           "mean, to rounding): the F ratio is undefined", why, *notes))
    from scipy import stats

    F = ms / ms_error
    p = float(stats.f.sf(F, df, df_error))
    eta = ss / (ss + sse)
    omega = (ss - df * ms_error) / (ss + (N - df) * ms_error)
    ci, ci_note = partial_eta_sq_interval(F, df, df_error)
    if ci is None:
        notes.append(f"the confidence interval of partial eta squared could not be computed ({ci_note})")
    elif ci_note:
        notes.append(ci_note)
    return AnovaRow(effect=effect, label=label, ss=ss_d, df=df, ms=ms_d, F=float(F), p=p,
                    partial_eta_sq=float(eta), partial_eta_sq_ci=ci, partial_omega_sq=float(omega),
                    note=_join(note, *notes))


def anova_two_way(cells: CellStats) -> AnovaResult:
    """Classical two-way ANOVA with interaction, SS Types I, II and III.

    Parameters
    ----------
    cells : CellStats
        Cell counts, means and centred sums of squares.

    Returns
    -------
    AnovaResult

    Notes
    -----
    Type I enters A, then B, then AB.  Type II tests each main effect after the
    other, and AB after both.  Type III uses sum-to-zero hypotheses on
    unweighted marginal means (Wald form on cell means).  With every cell filled
    SS_AB is identical under all three.  With empty cells the interaction has
    m - rank(A+B) df and Type III main effects are reported as not estimable
    in the usual sense [1].
    """
    cells = cells.standardised()          # every SS below in units of cells.unit^2
    u = cells.unit
    J, K, N = cells.J, cells.K, cells.N
    a_name, b_name = cells.factors
    labels = {"A": a_name, "B": b_name, "AB": f"{a_name}:{b_name}"}
    df_e = cells.df_within
    n_all = cells.counts
    uncorrected = float(np.sum(np.where(n_all > 0, cells.means, 0.0) ** 2 * n_all) + cells.sse_within)
    zero = ZERO_SS_RTOL * uncorrected
    sse = cells.sse_within
    sse_note = None
    if 0.0 < sse <= zero:
        sse = 0.0
        sse_note = ("the residual SS is zero to rounding (at or below 5e-26 of the sum of squared "
                    "responses, ZERO_SS_RTOL) and is reported as 0")
    ms_e = sse / df_e if df_e > 0 else None
    sc = _Scale(ms_error=ms_e, df_error=df_e, N=N, unit=u, zero=zero)
    centre = _grand_mean(cells)

    q_mu = _q_one_way(cells, None)
    q_a = _q_one_way(cells, 1)
    q_b = _q_one_way(cells, 0)
    add_fit, q_ab_model, rank_add = _weighted_fit(cells, ("A", "B"), centre)
    rank_a = J  # every level observed (validated at intake)
    rank_b = K
    df_ab = cells.m - rank_add
    ss_ab = q_ab_model

    tables = {}
    # Type I: A, B | A, AB | A, B
    tables["I"] = AnovaTable(ss_type="I", rows=(
        _row("A", labels["A"], q_mu - q_a, rank_a - 1, sc),
        _row("B", labels["B"], q_a - q_ab_model, rank_add - rank_a, sc),
        _row("AB", labels["AB"], ss_ab, df_ab, sc),
        _residual(sse, df_e, ms_e, u, sse_note),
    ))
    tables["II"] = AnovaTable(ss_type="II", rows=(
        _row("A", labels["A"], q_b - q_ab_model, rank_add - rank_b, sc),
        _row("B", labels["B"], q_a - q_ab_model, rank_add - rank_a, sc),
        _row("AB", labels["AB"], ss_ab, df_ab, sc),
        _residual(sse, df_e, ms_e, u, sse_note),
    ))
    if cells.m == J * K:
        rows3 = [
            _row(e, labels[e], float(type3_main_wald(cells.means.ravel() - centre, 1.0 / n_all.ravel(), J, K, e)),
                 (J - 1, K - 1)[i], sc) for i, e in enumerate(("A", "B"))
        ]
    else:
        reason = ("not estimable in the usual sense: with empty cells the unweighted marginal means "
                  "that Type III compares are undefined (see Types I and II)")
        rows3 = [_row(e, labels[e], None, 0, sc, note=reason) for e in ("A", "B")]
        rows3 = [AnovaRow(**{**r.__dict__, "df": df}) for r, df in zip(rows3, (J - 1, K - 1))]
    ab_note = None
    if cells.m < J * K:
        ab_note = (f"empty cells: interaction tested on {df_ab} df (filled cells minus the additive "
                   "model's rank; m - J - K + 1 in a connected design), the same under every SS type")
    rows3.append(_row("AB", labels["AB"], ss_ab, df_ab, sc, note=ab_note))
    rows3.append(_residual(sse, df_e, ms_e, u, sse_note))
    tables["III"] = AnovaTable(ss_type="III", rows=tuple(rows3))
    if ab_note:
        for t in ("I", "II"):
            rows = list(tables[t].rows)
            rows[2] = AnovaRow(**{**rows[2].__dict__, "note": ab_note})
            tables[t] = AnovaTable(ss_type=t, rows=tuple(rows))

    terms = np.where(cells.filled, cells.means - add_fit, np.nan)
    res = tables["III"].rows[-1]
    return AnovaResult(
        tables=tables,
        interaction_terms=terms * u,
        additive_fit=add_fit * u,
        ss_error=res.ss,
        df_error=df_e,
        ms_error=res.ms,
        df_interaction=df_ab,
    )


def _residual(sse: float, df_e: int, ms_e: float | None, unit: float, note: str | None = None) -> AnovaRow:
    notes: list[str] = [note] if note else []
    ss = _restore(sse, unit, "residual sum of squares", notes)
    ms = _restore(ms_e, unit, "residual mean square", [])
    return AnovaRow(effect="residual", label="Residual", ss=ss, df=df_e, ms=ms, F=None, p=None,
                    partial_eta_sq=None, partial_eta_sq_ci=None, partial_omega_sq=None,
                    note=_join(None if df_e > 0 else "no within-cell replication", *notes))
