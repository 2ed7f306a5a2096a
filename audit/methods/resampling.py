"""Resampling engine shared by the permutation tests and the wild bootstrap.

Every statistic these methods need is a function of per-cell sums (and, for
the studentized statistics, per-cell sums of squares) of a resampled vector u*
of length N.  The engine therefore

* sorts the observations by cell once, so that every cell is one contiguous
  block of columns;
* draws a chunk of ``b`` resamples at a time as a (b, N) float array - a row is
  either a random permutation of u (``rng.permuted`` row by row, Fisher-Yates)
  or u times Rademacher signs (bits of the generator's raw 64-bit output);
* forms the cell sums of the whole chunk with one ``np.add.reduceat`` along the
  rows, and the statistics from those (b, m) sums with small precomputed
  matrices: no Python loop per resample and no model refit per resample.
  From :data:`LARGE_N` rows on, permutations shuffle the cell labels instead and
  sign flips are summed as matrix products (see :func:`run_jobs`, "Large N").

The chunk size is chosen from a memory budget (:data:`MEMORY_BUDGET`) that
counts, per resample, the (b, N) draws, the (b, m) cell sums and the
statistic's own intermediates (each statistic states them: they grow with the
number of cells and the size of the hypotheses), so memory stays bounded
whatever B, N and the design are.  Only the count of resampled statistics at
least as large as the observed one is kept per effect, never the B statistics.

Reproducibility: ``seed`` goes to ``np.random.default_rng(seed)``.  Both
schemes consume the generator row by row, so the same seed gives the same
resamples - and the same p-value - whatever the chunk size (checked in the
tests); across numpy versions or platforms the stream may differ.

Statistics (cells restricted to the m filled ones, n_c their sizes, C an
r x m hypothesis matrix on the cell means, z_c = S_c / sqrt(n_c)):

* classical F: SS_H = || G z ||^2 with G an orthonormal basis of the row space
  of C diag(n)^(-1/2) (this is the Wald form (C ybar)'(C D C')^-1 (C ybar),
  D = diag(1/n), i.e. the extra SS of the hypothesis), SSE = sum u*^2 - ||z||^2
  (sum u*^2 does not change under permutation or sign flips), and
  F = (SS_H / r) / (SSE / (N - m)).
* Welch-James T (HC2), its approximate p-value (used to order the studentized
  permutation) and the HC3 Wald F: cell means S/n, within-cell SS
  SQ - S^2/n, then the batch Wald form of :mod:`audit.methods.wald`.

Shared draws and sequential stopping (:func:`run_jobs`): one stream of resamples serves
several statistics (the three permutation methods share one permutation draw, the wild
bootstrap's effects one sign draw), and by default each effect stops at the first resample
where Gandy's (2009) boundaries (:class:`SequentialBoundaries`) settle its decision at alpha,
with resampling risk at most :data:`SEQUENTIAL_RISK` for every true p; B is the maximum.

p-values: p = (1 + #{stat* >= stat_obs}) / (B + 1) (Phipson & Smyth 2010), B the resamples used;
resampled statistics within a relative 1e-9 of the observed one count as ties
(>=), so rounding never decides a tie (common practice).

References
----------
.. [1] Phipson, B. & Smyth, G. K. (2010). Permutation p-values should never be
       zero. Statistical Applications in Genetics and Molecular Biology 9(1).
.. [3] Gandy, A. (2009). Sequential implementation of Monte Carlo tests with uniformly
       bounded resampling risk. Journal of the American Statistical Association 104, 1504-1511.
.. [2] Clopper, C. J. & Pearson, E. S. (1934). The use of confidence or
       fiducial limits illustrated in the case of the binomial. Biometrika 26.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy import special

from ..core import (
    Type3Contrast,
    additive_design,
    additive_residual,
    check_dense_budget,
    dense_contrast,
    structured_restricted_fit,
    structured_restricted_leverage,
    type3_main_wald,
)
from ..decision import settled
from ..errors import OptionError
from ..fit import Fit
from ..results import MethodResult

__all__ = [
    "CHUNK_BYTES",
    "MEMORY_BUDGET",
    "P_INTERVAL_LEVEL",
    "TIE_RTOL",
    "Layout",
    "layout_from_fit",
    "effect_hypothesis",
    "restricted_cell_fit",
    "restricted_leverage",
    "f_statistic_maker",
    "wald_statistic_maker",
    "wald_null_form",
    "null_space_basis",
    "resample_statistics",
    "permute_shared",
    "resampled_p",
    "p_from_count",
    "exceedances",
    "clopper_pearson",
    "check_resamples",
    "chunk_size",
    "SEQUENTIAL_RISK",
    "SPENDING_K",
    "STOPPING_RULE",
    "Job",
    "Tally",
    "SequentialBoundaries",
    "boundaries",
    "run_jobs",
]

#: memory budget (bytes) for one chunk of resamples: the (b, N) draws, the (b, m)
#: cell sums and every intermediate of the statistic (which grows with the number
#: of cells m and the hypotheses' sizes); see :func:`chunk_size`
MEMORY_BUDGET = 256 * 2**20
#: former name of :data:`MEMORY_BUDGET`
CHUNK_BYTES = MEMORY_BUDGET
#: level of the Clopper-Pearson interval reported for every resampled p
P_INTERVAL_LEVEL = 0.99
#: resampled statistics within this relative distance of the observed one count as ties
TIE_RTOL = 1e-9
#: resampling risk of the sequential stopping rule: for every true p, the probability that an
#: early-stopped decision at alpha differs from the decision of infinitely many resamples
SEQUENTIAL_RISK = 1e-3
#: k of the spending sequence eps_n = eps n / (n + k) (the choice suggested by Gandy 2009)
SPENDING_K = 1000
#: name of the stopping rule recorded in ``extra['stopping_rule']``
STOPPING_RULE = (f"sequential Monte Carlo test (Gandy 2009), resampling risk {SEQUENTIAL_RISK:g}, "
                 f"spending eps n/(n + {SPENDING_K})")
#: first chunk of a sequential run; later chunks double up to the memory budget's size
FIRST_CHUNK = 128
#: from this many observations on, :func:`run_jobs` permutes the cell labels instead of
#: the row indices and forms the sign-flipped cell sums as one matrix product (see
#: "Large N" in :func:`run_jobs`); below it every number is as before
LARGE_N = 200_000
#: rows x columns of sign bits converted to 0/1 floats at a time at large N (a 1 MB block)
_SIGN_ROWS, _SIGN_SPAN = 16, 8192


@dataclass(frozen=True, kw_only=True)
class Layout:
    """Observations sorted by cell, with the filled cells' block structure.

    Attributes
    ----------
    order : ndarray (N,)
        Indices that sort the observations by cell (stable).
    filled : ndarray (m,)
        j-major indices (0 .. J*K-1) of the non-empty cells.
    counts : ndarray (m,) of float
        Sizes of the filled cells.
    starts : ndarray (m,)
        Start of each cell's block in the sorted order.
    N : int
    """

    order: np.ndarray
    filled: np.ndarray
    counts: np.ndarray
    starts: np.ndarray
    N: int

    @property
    def m(self) -> int:
        return int(self.filled.size)

    @property
    def cell_sorted(self) -> np.ndarray:
        """Filled-cell position (0 .. m-1) of each sorted observation."""
        return np.repeat(np.arange(self.m), self.counts.astype(np.int64))


def layout_from_fit(fit: Fit) -> Layout:
    cell = np.asarray(fit.obs.cell, dtype=np.int64)
    n_all = fit.cells.counts.ravel()
    filled = np.flatnonzero(n_all > 0)
    counts = n_all[filled].astype(float)
    starts = np.concatenate([[0], np.cumsum(n_all[filled])[:-1]]).astype(np.intp)
    order = np.argsort(cell, kind="stable")
    return Layout(order=order, filled=filled, counts=counts, starts=starts, N=int(cell.size))


# --------------------------------------------------------------------------- hypotheses

def effect_hypothesis(cells, effect: str) -> tuple[np.ndarray | None, str | None]:
    """Hypothesis matrix C (r x m, on the filled cells) for effect 'A', 'B' or 'AB'.

    With every cell filled these are the Type III contrasts C_A, C_B, C_AB of
    METHODS.md section 1.  With empty cells the interaction hypothesis is
    "the filled cell means follow the additive model": C spans the orthogonal
    complement of the additive columns on the filled cells (m - J - K + 1 rows
    when connected, the df of the classical interaction F); main effects get
    None and a reason (their Type III hypotheses need every cell).
    """
    J, K = cells.J, cells.K
    filled = cells.counts.ravel() > 0
    if filled.all():
        return Type3Contrast(J, K, effect), None
    if effect != "AB":
        return None, (f"not computed: the Type III hypothesis of main effect {effect} compares unweighted "
                      f"marginal means, which need every cell filled (found {int((~filled).sum())} empty cell(s))")
    m = int(filled.sum())
    check_dense_budget(8.0 * m * (m + J + K), what="the interaction contrasts of a design with empty cells",
                       J=J, K=K, skip=_SKIP_EMPTY)
    X = additive_design(J, K)[filled]
    U, s, _ = np.linalg.svd(X, full_matrices=True)
    rank = int((s > s[0] * 1e-10).sum())
    C = U[:, rank:].T
    if C.shape[0] == 0:
        return None, ("not computed: with these empty cells no interaction contrast is estimable "
                      "(m - rank(A + B) = 0)")
    return C, None


def _row_basis(A: np.ndarray) -> np.ndarray:
    """Orthonormal basis (rows) of the row space of A (full row rank assumed)."""
    q, _ = np.linalg.qr(A.T)
    return q.T


def restricted_cell_fit(means: np.ndarray, counts: np.ndarray, C: np.ndarray) -> np.ndarray:
    """Weighted least-squares fit of the cell means under C mu = 0 (weights n).

    mu_r = ybar - D C' (C D C')^-1 C ybar with D = diag(1/n).  For the
    interaction this is the additive model's fitted cell means; for a main
    effect it is the full model with that effect removed (sum-to-zero coding).
    """
    if _structured(C):
        return structured_restricted_fit(C, means, counts)
    C = dense_contrast(C)
    d = 1.0 / counts
    Cy = C @ means
    M = (C * d) @ C.T
    return means - d * (C.T @ np.linalg.solve(M, Cy))


def restricted_leverage(counts: np.ndarray, C: np.ndarray) -> np.ndarray:
    """Leverage h_c of an observation in cell c for the restricted model {mu: C mu = 0}.

    With B a basis of the null space of C, the model's observation-level design
    has rows b_c, so h_c = b_c' (B' W B)^-1 b_c, W = diag(n).  For the
    interaction this is the additive model's leverage.
    """
    if _structured(C):
        return structured_restricted_leverage(C, counts)
    Bn = null_space_basis(dense_contrast(C))                            # (m, p_r)
    G = Bn.T @ (Bn * counts[:, None])
    return np.einsum("ij,jk,ik->i", Bn, np.linalg.inv(G), Bn)


# --------------------------------------------------------------------------- statistics

StatFn = Callable[[np.ndarray, np.ndarray | None], np.ndarray]


def f_statistic_maker(layout: Layout, Cs: list[np.ndarray], ss_total: float) -> StatFn:
    """Classical F of each hypothesis in ``Cs`` from cell sums of u*.

    ``ss_total`` = sum u^2, invariant under permutation and sign flips.
    Returns a function (S, SQ) -> (b, len(Cs)).
    """
    n = layout.counts
    rs = np.sqrt(n)
    # a large Type III contrast of a full grid: its SS by the structured forms (weights n),
    # O(cells) per resample; the others by an orthonormal row basis (small designs keep
    # their numbers bit for bit)
    big = [_structured(C) for C in Cs]
    Gs = [None if b else _row_basis(dense_contrast(C) / rs) for C, b in zip(Cs, big)]
    G = np.vstack([g for g in Gs if g is not None]) if any(g is not None for g in Gs) else np.zeros((0, layout.m))
    sizes = [C.shape[0] for C in Cs]
    df_e = layout.N - layout.m
    additive = None
    if any(b and C.effect == "AB" for C, b in zip(Cs, big)):
        C0 = next(C for C in Cs if isinstance(C, Type3Contrast))
        additive = n.reshape(C0.J, C0.K)
    inv_n = 1.0 / n
    structured = any(big)

    def fn(S, SQ=None):
        z = S / rs
        sse = ss_total - np.einsum("ij,ij->i", z, z)
        sse = np.maximum(sse, ss_total * 1e-15)
        proj = z @ G.T
        means = S / n if structured else None     # cell means, once for every structured effect
        out = np.empty((S.shape[0], len(Gs)))
        col = 0
        for e, (C, g) in enumerate(zip(Cs, Gs)):
            if g is not None:
                part = proj[:, col:col + g.shape[0]]
                col += g.shape[0]
                out[:, e] = np.einsum("ij,ij->i", part, part) / sizes[e]
            elif C.effect == "AB":
                R, _ = additive_residual(additive, means.reshape((-1,) + additive.shape))
                R = R.reshape(S.shape)
                out[:, e] = np.einsum("ij,ij->i", R * n, R) / sizes[e]
            else:
                out[:, e] = type3_main_wald(means, inv_n, C.J, C.K, C.effect) / sizes[e]
        return out / (sse / df_e)[:, None]

    fn.bytes_per_resample = 8 * (4 * layout.m + 2 * G.shape[0] + 2 * len(Gs)) + (8 * 8 * layout.m if any(big) else 0)
    return fn


#: how to avoid the dense interaction contrasts of a large design with empty cells
_SKIP_EMPTY = ("the resampling and robust methods need them; skip the alternative methods (check(methods=False), "
               "--no-methods)")


def _structured(C) -> bool:
    """A Type III contrast of a full grid large enough for the structured forms (the
    threshold of :mod:`audit.methods.wald`, so small designs keep their dense numbers)."""
    from .wald import _DENSE_WORK

    return isinstance(C, Type3Contrast) and C.shape[0] ** 2 * C.shape[1] >= _DENSE_WORK


def wald_statistic_maker(layout: Layout, Cs: list[np.ndarray], *, kind: str, scale: float) -> StatFn:
    """Wald-type statistic of each hypothesis from cell sums and sums of squares of u*.

    kind
        'hc2': the Welch-James T (v = s2 / n);
        'hc3': the HC3 Wald F = W / r (v = css / (n - 1)^2);
        'wj': -log of the Welch-James approximate p-value, i.e. T / c referred
        to F(r, r (r + 2) / (3A)) (Johansen 1980) - a monotone "prepivoted"
        form of T that corrects each resample for its own small-cell
        heaviness; larger means more extreme, as for the others.
    Every filled cell needs n >= 2.  A resample with (numerically) zero
    variance in a cell gets a tiny variance floor (1e-12 of the pooled scale),
    which makes its statistic very large: it then counts as exceeding the
    observed one (the conservative direction).
    """
    n = layout.counts
    if kind in ("hc2", "wj"):
        denom = (n - 1.0) * n
    elif kind == "hc3":
        denom = (n - 1.0) ** 2
    else:
        raise ValueError(f"kind: expected 'hc2', 'hc3' or 'wj', found {kind!r}")
    floor = max(scale, 1e-300) * 1e-12
    divide = [C.shape[0] if kind == "hc3" else 1 for C in Cs]

    from scipy import special

    from .wald import wald_and_a, wald_quadratic

    m = layout.m
    # per hypothesis: the direct r x r form, or the null-space form when the
    # hypothesis has more rows than its complement (e.g. the interaction, r = (J-1)(K-1))
    bases = [null_space_basis(dense_contrast(C)) if C.shape[0] > m - C.shape[0] and not _structured(C) else None
             for C in Cs]
    # row-wise outer products of each basis, kept when small beside the budget
    outer = [None if Z is None or 8 * m * Z.shape[1] ** 2 > MEMORY_BUDGET // 8
             else (Z[:, :, None] * Z[:, None, :]).reshape(m, -1) for Z in bases]
    need = 0
    for C, Z in zip(Cs, bases):
        r = C.shape[0]
        if _structured(C):          # the structured forms: O(cells) arrays and k x k systems
            k = min(C.J, C.K) - 1
            need = max(need, 8 * (16 * m + 4 * k * k))
        elif Z is None:
            need = max(need, 8 * (2 * r * r + (4 if kind == "wj" else 1) * r * m + 4 * r))
        else:
            q = Z.shape[1]
            need = max(need, 8 * ((3 if kind == "wj" else 1) * m * q + 3 * q * q + 6 * m))

    def fn(S, SQ):
        means = S / n
        css = np.maximum(SQ - S * means, 0.0)
        v = np.maximum(css / denom, floor / n)
        out = np.empty((S.shape[0], len(Cs)))
        for e, (C, Z, ZZ) in enumerate(zip(Cs, bases, outer)):
            if Z is None:
                if kind == "wj":
                    T, A = wald_and_a(means, v, n - 1.0, C)
                else:
                    T, A = wald_quadratic(means, v, C), None
            else:
                T, A = wald_null_form(means, v, Z, n - 1.0 if kind == "wj" else None, ZZ=ZZ)
            if kind == "wj":
                r = C.shape[0]
                c = r + 2.0 * A - 6.0 * A / (r + 2.0)
                with np.errstate(divide="ignore"):
                    out[:, e] = -np.log(special.fdtrc(r, r * (r + 2.0) / (3.0 * A), T / c))
            else:
                out[:, e] = T / divide[e]
        return out

    fn.bytes_per_resample = 8 * (6 * m + 2 * len(Cs)) + need
    return fn


def null_space_basis(C: np.ndarray) -> np.ndarray:
    """Orthonormal basis (m x (m - r)) of the null space of C (r x m, full row rank)."""
    r, m = C.shape
    check_dense_budget(8.0 * m * m, what="a null-space basis of a hypothesis", J=m, K=None,
                       skip=_SKIP_EMPTY)
    q, _ = np.linalg.qr(C.T, mode="complete")
    return np.ascontiguousarray(q[:, r:])


def wald_null_form(means: np.ndarray, v: np.ndarray, Z: np.ndarray, dfs: np.ndarray | None = None,
                   ZZ: np.ndarray | None = None):
    """The Wald form T = (C ybar)' (C V C')^-1 (C ybar), V = diag(v), and Johansen's A,
    through the null space of C instead of the r x r matrix C V C'.

    With Z a basis of {mu: C mu = 0} and W = V^-1, C' (C V C')^-1 C = W - W Z (Z' W Z)^-1 Z' W,
    so T is the weighted residual SS of the cell means on Z (weights 1/v), and the
    diagonal of R = V C' (C V C')^-1 C is 1 - h with h the leverages of that fit.
    Cost per resample O(m q^2), q = m - r, against O(r^3 + r^2 m) for the direct form.

    Parameters
    ----------
    means, v : ndarray (b, m)
        Cell means and the diagonal of their covariance, one row per resample.
    Z : ndarray (m, q)
        Basis of the null space of C (:func:`null_space_basis`).
    dfs : ndarray (m,), optional
        Degrees of freedom f_jk for Johansen's A = sum (1 - h)^2 / f; None skips A.
    ZZ : ndarray (m, q * q), optional
        Row-wise outer products of Z (precomputed once per hypothesis); turns
        the b normal-equation matrices into one matrix product.

    Returns
    -------
    T : ndarray (b,)
    A : ndarray (b,) or None
    """
    b, m = means.shape
    q = Z.shape[1]
    w = 1.0 / v
    if ZZ is not None:
        P = (w @ ZZ).reshape(b, q, q)
    else:
        P = np.einsum("mq,bm,mr->bqr", Z, w, Z, optimize=True)
    beta = np.linalg.solve(P, ((w * means) @ Z)[..., None])[..., 0]
    r = means - beta @ Z.T
    beta2 = np.linalg.solve(P, ((w * r) @ Z)[..., None])[..., 0]
    r = r - beta2 @ Z.T                                     # one step of iterative refinement
    T = np.einsum("bm,bm->b", w * r, r)
    if dfs is None:
        return T, None
    Pinv = np.linalg.inv(P)                                 # (b, q, q)
    ZP = (Z @ Pinv.transpose(1, 0, 2).reshape(q, b * q)).reshape(m, b, q)
    h = w * np.einsum("mbq,mq->bm", ZP, Z)
    return T, np.sum((1.0 - h) ** 2 / dfs, axis=1)


# --------------------------------------------------------------------------- engine

def check_resamples(resamples) -> int:
    try:
        B = int(resamples)
    except (TypeError, ValueError):
        raise OptionError(f"resamples: expected a whole number >= 1, found {resamples!r}; try 9999") from None
    if B != resamples or B < 1:
        raise OptionError(f"resamples: expected a whole number >= 1, found {resamples!r}; try 9999")
    return B


def chunk_size(N: int, B: int, *, squares: bool, budget: int = MEMORY_BUDGET, m: int = 0,
               stat_bytes: int = 0, vectors: int = 1) -> int:
    """Resamples per chunk within ``budget`` bytes.

    Per resample: the draws (one or two float rows of length N, plus an index
    row when ``vectors`` > 1 share one permutation), the cell sums (and sums of
    squares) of length m, and ``stat_bytes``, the statistic's own intermediates
    (``statistic.bytes_per_resample``, which grows with the cells and the size
    of the hypotheses).  At least one resample per chunk.
    """
    per_row = 8 * N * (3 if squares else 2) + 8 * m * (2 if squares else 1) + int(stat_bytes)
    if vectors > 1:
        per_row += 8 * N
    return int(max(1, min(B, budget // max(per_row, 1))))


def _stat_bytes(statistic) -> int:
    return int(getattr(statistic, "bytes_per_resample", 0))


def exceedances(stat_star: np.ndarray, stat_obs) -> np.ndarray:
    """Per column, the number of resampled statistics at least as large as the
    observed one (ties within a relative :data:`TIE_RTOL` count)."""
    obs = np.atleast_1d(np.asarray(stat_obs, dtype=float))
    thr = np.where(np.isfinite(obs), obs - TIE_RTOL * np.abs(obs), obs)
    return np.count_nonzero(np.asarray(stat_star).reshape(-1, obs.size) >= thr[None, :], axis=0)


def resample_statistics(
    u_sorted: np.ndarray,
    layout: Layout,
    statistic: StatFn,
    *,
    scheme: str,
    resamples: int,
    rng: np.random.Generator,
    squares: bool = False,
    budget: int = MEMORY_BUDGET,
    progress: Callable[[int, int], None] | None = None,
    observed: np.ndarray | None = None,
) -> np.ndarray:
    """Statistics of B resamples of u (sorted by cell), chunk by chunk.

    Parameters
    ----------
    u_sorted : ndarray (N,)
        The vector to resample, in cell-sorted order.
    layout : Layout
        Cell boundaries of the sorted observations.
    statistic : callable (S, SQ) -> (b, e)
        From cell sums S (b, m) and, when ``squares``, sums of squares SQ.  An
        attribute ``bytes_per_resample`` (its intermediates) enters the chunk size.
    scheme : 'permute' (u*_r = a random permutation of u, row by row) or
        'sign' (u*_r = u times independent Rademacher signs).
    resamples : int
        B, the number of resamples.
    rng : numpy.random.Generator
        Source of randomness (the same generator state gives the same results).
    squares : bool, default False
        Also accumulate per-cell sums of squares.
    budget : int, default MEMORY_BUDGET
        Memory budget in bytes for one chunk of resamples (:func:`chunk_size`).
    progress : callable (done, total), optional
    observed : ndarray (e,), optional
        The observed statistics: when given, only the counts of exceedances
        (:func:`exceedances`) are kept and returned, not the B statistics.

    Returns
    -------
    ndarray (B, e), or the counts (e,) of int when ``observed`` is given
    """
    B = resamples
    N = u_sorted.size
    b = chunk_size(N, B, squares=squares, budget=budget, m=layout.m, stat_bytes=_stat_bytes(statistic))
    starts = layout.starts
    out = None
    done = 0
    if scheme == "sign":
        nwords = (N + 63) // 64
    buf = np.empty((b, N))
    while done < B:
        bb = min(b, B - done)
        W = buf[:bb]
        if scheme == "permute":
            W[...] = u_sorted
            rng.permuted(W, axis=1, out=W)
        elif scheme == "sign":
            raw = rng.bit_generator.random_raw((bb, nwords))
            bits = np.unpackbits(raw.view(np.uint8), axis=1, count=N, bitorder="little").view(bool)
            np.copyto(W, u_sorted)
            np.negative(W, out=W, where=bits)
            del raw, bits
        else:
            raise ValueError(f"scheme: expected 'permute' or 'sign', found {scheme!r}")
        S = np.add.reduceat(W, starts, axis=1)
        SQ = None
        if squares:
            np.square(W, out=W)
            SQ = np.add.reduceat(W, starts, axis=1)
        st = statistic(S, SQ)
        if observed is not None:
            out = exceedances(st, observed) + (0 if out is None else out)
        else:
            if out is None:
                out = np.empty((B, st.shape[1]))
            out[done:done + bb] = st
        done += bb
        if progress is not None:
            progress(done, B)
    return out


def permute_shared(
    us: list[np.ndarray],
    layout: Layout,
    statistics: list[StatFn],
    *,
    resamples: int,
    rng: np.random.Generator,
    budget: int = MEMORY_BUDGET,
    progress: Callable[[int, int], None] | None = None,
    observed: list[np.ndarray] | None = None,
) -> list[np.ndarray]:
    """Like :func:`resample_statistics` with scheme 'permute', for several vectors
    that must see the same permutations (one permutation of the row indices per
    resample, then one gather per vector).

    Parameters
    ----------
    us : list of ndarray (N,)
        The vectors to permute, each in cell-sorted order.
    layout : Layout
        Cell boundaries of the sorted observations.
    statistics : list of callable (S, SQ) -> (b, e)
        One statistic per vector, from its cell sums.
    resamples : int
        B, the number of resamples.
    rng : numpy.random.Generator
        Source of randomness.  The permutations are exactly those that
        :func:`resample_statistics` draws from the same generator state, so
        the results are identical to calling it once per vector with the same
        seed; drawing them once saves the dominant cost.
    budget : int, default MEMORY_BUDGET
        Memory budget in bytes for one chunk (an index array, a value array,
        the cell sums and the largest statistic's intermediates).
    progress : callable (done, total), optional
    observed : list of ndarray (e_k,), optional
        Observed statistics per vector: when given, only counts of exceedances
        are kept and returned.

    Returns
    -------
    list of ndarray (B, e_k), or of counts (e_k,) when ``observed`` is given
    """
    B = resamples
    N = layout.N
    b = chunk_size(N, B, squares=False, budget=budget, m=layout.m,
                   stat_bytes=max((_stat_bytes(f) for f in statistics), default=0), vectors=len(us))
    starts = layout.starts
    outs: list = [None] * len(us)
    idx = np.empty((b, N), dtype=np.intp)
    W = np.empty((b, N))
    base = np.arange(N, dtype=np.intp)
    done = 0
    while done < B:
        bb = min(b, B - done)
        I = idx[:bb]
        I[...] = base
        rng.permuted(I, axis=1, out=I)
        for k, (u, fn) in enumerate(zip(us, statistics)):
            Wk = W[:bb]
            np.take(u, I, out=Wk)
            st = fn(np.add.reduceat(Wk, starts, axis=1), None)
            if observed is not None:
                outs[k] = exceedances(st, observed[k]) + (0 if outs[k] is None else outs[k])
            else:
                if outs[k] is None:
                    outs[k] = np.empty((B, st.shape[1]))
                outs[k][done:done + bb] = st
        done += bb
        if progress is not None:
            progress(done, B)
    return outs


# --------------------------------------------------------------------------- sequential stopping

class SequentialBoundaries:
    """Stopping boundaries of Gandy's (2009) sequential Monte Carlo test at level ``alpha``.

    With S_n the number of exceedances among the first n resamples, the test stops at the
    first n with S_n >= U_n (decision: p > alpha, not significant) or S_n <= L_n (decision:
    p <= alpha, significant).  The boundaries are built recursively under p = alpha from a
    spending sequence eps_n = eps n / (n + k), increasing to eps:

        U_n = min{j: P(tau >= n, S_n >= j) + P(tau < n, S_tau >= U_tau) <= eps_n},
        L_n = max{j: P(tau >= n, S_n <= j) + P(tau < n, S_tau <= L_tau) <= eps_n},

    tracking the distribution of S_n on the continuation region L_n < S_n < U_n exactly
    (a binomial step per n).  So P_alpha(hit U) <= eps and P_alpha(hit L) <= eps; as
    P_p(hit U) grows and P_p(hit L) falls with p, for every true p the probability of a
    stop on the wrong side of alpha is at most eps (Gandy 2009, theorem 1): the resampling
    risk is uniformly bounded by eps.  The arrays grow on demand (:meth:`extend`), so a run
    that stops after 300 resamples computes 300 steps.

    References: Gandy, A. (2009). Sequential implementation of Monte Carlo tests with
    uniformly bounded resampling risk. JASA 104, 1504-1511.
    """

    def __init__(self, alpha: float, risk: float = SEQUENTIAL_RISK, k: int = SPENDING_K):
        self.alpha, self.risk, self.k = float(alpha), float(risk), int(k)
        self.upper = np.array([1], dtype=np.int64)      # U_0 = 1 > S_0: no stop at n = 0
        self.lower = np.array([-1], dtype=np.int64)
        self._dist = np.ones(1)                          # P(tau > n, S_n = lo + i), n = self.n
        self._lo = 0
        self._spent = [0.0, 0.0]                         # P(stopped at U), P(stopped at L) so far

    @property
    def n(self) -> int:
        return self.upper.size - 1

    def extend(self, n_max: int) -> None:
        """Compute the boundaries up to n = ``n_max``."""
        n0 = self.n
        if n_max <= n0:
            return
        a, eps, k = self.alpha, self.risk, self.k
        U = np.empty(n_max + 1, dtype=np.int64)
        L = np.empty(n_max + 1, dtype=np.int64)
        U[:n0 + 1], L[:n0 + 1] = self.upper, self.lower
        dist, lo = self._dist, self._lo
        su, sl = self._spent
        step = np.array([1.0 - a, a])
        for n in range(n0 + 1, n_max + 1):
            new = np.convolve(dist, step)                # S_n on the continuation region of n - 1
            head = np.cumsum(new)                        # head[i] = P(S_n <= lo + i, not stopped)
            total = head[-1]
            e_n = eps * n / (n + k)
            # U_n: first i with su + P(S_n >= lo + i) <= e_n, i.e. head[i - 1] >= su + total - e_n
            iu = int(np.searchsorted(head, su + total - e_n, side="left")) + 1
            if su + total - e_n <= 0.0:
                iu = 0
            # L_n: last i with sl + head[i] <= e_n
            il = int(np.searchsorted(head, e_n - sl, side="right")) - 1
            if iu < new.size:
                su += float(total - (head[iu - 1] if iu > 0 else 0.0))
            if il >= 0:
                sl += float(head[il])
            U[n], L[n] = lo + iu, lo + il
            dist = new[il + 1:iu]
            lo += il + 1
        self.upper, self.lower, self._dist, self._lo, self._spent = U, L, dist, lo, [su, sl]

    def first_stop(self, n: np.ndarray, S: np.ndarray) -> tuple[int, bool | None]:
        """First position i where (n[i], S[i]) lies on a boundary, and the decision there
        (True: significant); (-1, None) when none does.  A stop is taken only where the
        reported p = (1 + S) / (n + 1) gives the same decision (always, for risks well
        below 1/2; the check keeps the reported p and the stop consistent)."""
        self.extend(int(n[-1]))
        p = (1.0 + S) / (n + 1.0)
        up = (S >= self.upper[n]) & (p >= self.alpha)
        low = (S <= self.lower[n]) & (p < self.alpha)
        hit = up | low
        if not hit.any():
            return -1, None
        i = int(np.argmax(hit))
        return i, bool(low[i])


_BOUNDARIES: dict[tuple[float, float, int], SequentialBoundaries] = {}


def boundaries(alpha: float, risk: float = SEQUENTIAL_RISK, k: int = SPENDING_K) -> SequentialBoundaries:
    """The (cached, shared) :class:`SequentialBoundaries` for ``alpha`` and ``risk``."""
    key = (float(alpha), float(risk), int(k))
    if key not in _BOUNDARIES:
        _BOUNDARIES[key] = SequentialBoundaries(*key)
    return _BOUNDARIES[key]


@dataclass(frozen=True, kw_only=True)
class Job:
    """One statistic to evaluate on every resample of one vector.

    u : ndarray (N,), the vector to resample (cell-sorted); statistic : (S, SQ) -> (b, e);
    observed : ndarray (e,), the observed statistics; squares : the statistic needs the
    per-cell sums of squares SQ too.
    """

    u: np.ndarray
    statistic: StatFn
    observed: np.ndarray
    squares: bool = False


@dataclass(frozen=True, kw_only=True)
class Tally:
    """What a run keeps per effect of one job: exceedances ``counts`` among the ``used``
    first resamples, whether the sequential rule ``stopped`` it early, and the largest
    ``chunk`` drawn at once."""

    counts: np.ndarray
    used: np.ndarray
    stopped: np.ndarray
    chunk: int
    exact: bool = False


def run_jobs(
    jobs: list[Job],
    layout: Layout,
    *,
    scheme: str,
    resamples: int,
    rng: np.random.Generator,
    alpha: float | None = None,
    exact: bool = False,
    risk: float = SEQUENTIAL_RISK,
    budget: int = MEMORY_BUDGET,
    progress: Callable[[int, int], None] | None = None,
) -> list[Tally]:
    """Run several statistics on ONE stream of resamples, with sequential stopping.

    Every job sees the same resamples: scheme 'permute' draws one permutation of the row
    indices per resample (``rng.permuted`` on a (b, N) block of ``arange(N)``, row by row,
    so the same seed gives the same permutations whatever the chunk size) and gathers each
    job's vector through it; scheme 'sign' draws one row of Rademacher signs per resample
    (bits of the generator's raw 64-bit output) and multiplies each job's vector by it.
    Sums of squares are invariant under sign flips, so the 'sign' scheme never recomputes them.

    Sequential (default, ``exact`` False and ``alpha`` given): after each chunk every effect
    still running is checked against :class:`SequentialBoundaries` at the first resample
    where it crosses; it is then frozen at that resample (its count and ``used`` are those of
    the first ``used`` resamples of the stream, i.e. exactly what a run with
    ``resamples=used`` would give).  A job stops drawing when all its effects are frozen, the
    run when every job has stopped or B is reached.  Chunks start at
    :data:`FIRST_CHUNK` resamples and double up to the memory budget's size, so at most
    about as many resamples are drawn past the stop as before it.

    ``exact`` (or ``alpha`` None): all B resamples for every effect.

    Large N (N >= :data:`LARGE_N`): gathering every job's vector through a (b, N) block of
    random indices reads memory at random, once per job.  Instead,

    * 'permute' shuffles the cell LABELS of the cell-sorted rows (one byte per row when
      there are at most 256 filled cells) with the same generator calls, row by row, and
      forms each job's cell sums as ``bincount(labels, weights=u)`` (sums of squares with
      weights u^2): vector u_j goes to the cell of the shuffled label at j.  If the index
      shuffle would have drawn the permutation pi, the label shuffle gives the cell sums of
      pi^-1 instead; pi -> pi^-1 is a bijection of the permutations, so every resample is
      still a uniformly random permutation, shared by all jobs, and the sequential rule and
      its guarantee are unchanged - but the resamples drawn from a given seed are not those
      drawn below LARGE_N (the p-values are other Monte Carlo draws of the same test).
    * 'sign' converts the sign bits to a 0/1 matrix once and forms, for all live jobs at
      once, S = sum(u) - 2 (bits @ u) per cell block (one matrix product per cell): the
      same signs and the same resamples as below LARGE_N; the cell sums differ only by
      rounding (summation order).
    """
    B = int(resamples)
    N = layout.N
    starts = layout.starts
    if scheme not in ("permute", "sign"):
        raise ValueError(f"scheme: expected 'permute' or 'sign', found {scheme!r}")
    sequential = not exact and alpha is not None
    rule = boundaries(alpha, risk) if sequential else None
    squares = scheme == "permute" and any(j.squares for j in jobs)
    b_max = chunk_size(N, B, squares=squares, budget=budget, m=layout.m,
                       stat_bytes=max((_stat_bytes(j.statistic) for j in jobs), default=0),
                       vectors=2 if scheme == "permute" else 1)
    counts = [np.zeros(np.size(j.observed), dtype=np.int64) for j in jobs]
    used = [np.zeros(np.size(j.observed), dtype=np.int64) for j in jobs]
    stopped = [np.zeros(np.size(j.observed), dtype=bool) for j in jobs]
    thr = []
    for j in jobs:
        obs = np.atleast_1d(np.asarray(j.observed, dtype=float))
        with np.errstate(invalid="ignore"):      # inf - inf in the branch np.where discards
            thr.append(np.where(np.isfinite(obs), obs - TIE_RTOL * np.abs(obs), obs))
    large = N >= LARGE_N
    m = layout.m
    bounds = np.append(starts, N)
    if scheme == "sign":
        nwords = (N + 63) // 64
        sq0 = [np.add.reduceat((j.u * j.u)[None, :], starts, axis=1) if j.squares else None for j in jobs]
        if large:
            tot = [np.add.reduceat(j.u, starts) for j in jobs]
    elif large:
        ldt = np.uint8 if m <= 2**8 else (np.uint16 if m <= 2**16 else np.int64)
        base = np.repeat(np.arange(m, dtype=ldt), np.diff(bounds))
        usq = [j.u * j.u if j.squares else None for j in jobs]
    else:
        base = np.arange(N, dtype=np.intp)
    b = min(b_max, FIRST_CHUNK) if sequential else b_max
    idx = W = U = U_live = buf = None
    done = 0
    largest = 0
    while done < B:
        live = [k for k in range(len(jobs)) if not stopped[k].all()]
        if not live:
            break
        bb = min(b, B - done)
        largest = max(largest, bb)
        if large and scheme == "permute":
            if idx is None or idx.shape[0] < bb:
                idx = np.empty((bb, N), dtype=base.dtype)
            I = idx[:bb]
            I[...] = base
            rng.permuted(I, axis=1, out=I)
            # row by row (the row's labels stay in cache): each live job's cell sums
            S_lab = {k: np.empty((bb, m)) for k in live}
            SQ_lab = {k: np.empty((bb, m)) for k in live if jobs[k].squares}
            for r in range(bb):
                L = I[r].astype(np.intp)
                for k in live:
                    S_lab[k][r] = np.bincount(L, weights=jobs[k].u, minlength=m)
                    if k in SQ_lab:
                        SQ_lab[k][r] = np.bincount(L, weights=usq[k], minlength=m)
        elif large:
            raw = rng.bit_generator.random_raw((bb, nwords))
            bits = np.unpackbits(raw.view(np.uint8), axis=1, count=N, bitorder="little")
            del raw
            if U is None or U_live != live:
                U, U_live = np.stack([jobs[k].u for k in live], axis=1), list(live)
            if buf is None:
                buf = np.empty(_SIGN_ROWS * _SIGN_SPAN)
            # sum over flipped rows, per cell, in blocks of rows x columns small enough for the cache
            flips = np.zeros((bb, m, len(live)))
            for r0 in range(0, bb, _SIGN_ROWS):
                r1 = min(r0 + _SIGN_ROWS, bb)
                for c in range(m):
                    for s0 in range(int(bounds[c]), int(bounds[c + 1]), _SIGN_SPAN):
                        s1 = min(s0 + _SIGN_SPAN, int(bounds[c + 1]))
                        blk = buf[:(r1 - r0) * (s1 - s0)].reshape(r1 - r0, s1 - s0)   # contiguous for BLAS
                        np.copyto(blk, bits[r0:r1, s0:s1])
                        flips[r0:r1, c, :] += blk @ U[s0:s1]
            del bits
        else:
            if W is None or W.shape[0] < bb:
                W = np.empty((bb, N))
                idx = np.empty((bb, N), dtype=np.intp) if scheme == "permute" else None
            Wb = W[:bb]
            if scheme == "permute":
                I = idx[:bb]
                I[...] = base
                rng.permuted(I, axis=1, out=I)
            else:
                raw = rng.bit_generator.random_raw((bb, nwords))
                neg = np.unpackbits(raw.view(np.uint8), axis=1, count=N, bitorder="little").view(bool)
                del raw
        for li, k in enumerate(live):
            job = jobs[k]
            if large and scheme == "permute":
                S, SQ = S_lab[k], SQ_lab.get(k)
            elif large:
                S = tot[k][None, :] - 2.0 * flips[:, :, li]
                SQ = None if sq0[k] is None else np.broadcast_to(sq0[k], S.shape)
            elif scheme == "permute":
                np.take(job.u, I, out=Wb)
                S = np.add.reduceat(Wb, starts, axis=1)
                SQ = None
                if job.squares:
                    np.square(Wb, out=Wb)
                    SQ = np.add.reduceat(Wb, starts, axis=1)
            else:
                np.copyto(Wb, job.u)
                np.negative(Wb, out=Wb, where=neg)
                S = np.add.reduceat(Wb, starts, axis=1)
                SQ = None if sq0[k] is None else np.broadcast_to(sq0[k], S.shape)
            E = np.asarray(job.statistic(S, SQ)).reshape(bb, -1) >= thr[k][None, :]
            if not sequential:
                counts[k] += np.count_nonzero(E, axis=0)
                used[k] += bb
                continue
            for e in np.flatnonzero(~stopped[k]):
                cs = counts[k][e] + np.cumsum(E[:, e], dtype=np.int64)
                ns = used[k][e] + np.arange(1, bb + 1, dtype=np.int64)
                i, _ = rule.first_stop(ns, cs)
                if i >= 0:
                    counts[k][e], used[k][e], stopped[k][e] = cs[i], ns[i], True
                else:
                    counts[k][e], used[k][e] = cs[-1], ns[-1]
        done += bb
        b = min(2 * b, b_max)
        if progress is not None:
            progress(done, B)
    if progress is not None and done < B:
        progress(B, B)
    return [Tally(counts=counts[k], used=used[k], stopped=stopped[k], chunk=largest, exact=not sequential)
            for k in range(len(jobs))]


def clopper_pearson(k: int, n: int, level: float = P_INTERVAL_LEVEL) -> tuple[float, float]:
    """Exact (Clopper-Pearson) interval for a binomial proportion k / n."""
    a = 1.0 - level
    # the beta quantiles of the exact interval, by scipy.special.betaincinv (stats.beta.ppf's
    # own routine, without its argument handling: this runs once per effect and method)
    lo = 0.0 if k == 0 else float(special.betaincinv(k, n - k + 1, a / 2))
    hi = 1.0 if k == n else float(special.betaincinv(k + 1, n - k, 1 - a / 2))
    return lo, hi


def resampled_p(stat_star: np.ndarray, stat_obs: float, *, alpha: float | None = None) -> dict:
    """p = (1 + count) / (B + 1), its Monte Carlo SE and 99% Clopper-Pearson interval.

    ``count`` = #{stat* >= stat_obs (1 - 1e-9)}.  The interval is the exact
    binomial interval of count / B, i.e. for the p-value an infinite number of
    resamples would give; the MC SE is sqrt(p (1 - p) / B).  When ``alpha`` is
    given, ``settled`` says whether the interval lies wholly on one side of it.
    """
    k = int(exceedances(np.ravel(stat_star), stat_obs)[0])
    return p_from_count(k, int(np.size(stat_star)), alpha=alpha)


def p_from_count(count: int, B: int, *, alpha: float | None = None) -> dict:
    """As :func:`resampled_p`, from the count of exceedances among B resamples."""
    k = int(count)
    p = (1.0 + k) / (B + 1.0)
    lo, hi = clopper_pearson(k, B)
    out = {"p": p, "count": k, "mc_se": float(np.sqrt(p * (1.0 - p) / B)), "p_interval": (lo, hi)}
    if alpha is not None:
        out["settled"] = settled((lo, hi), alpha)
    return out


# --------------------------------------------------------------------------- results

def seed_value(seed) -> tuple[np.random.Generator, int | list | None]:
    """A fresh generator for ``seed`` and a JSON-safe record of the seed.

    With ``seed=None`` fresh entropy is drawn and recorded, so the run can be
    repeated by passing the recorded value back.
    """
    if isinstance(seed, np.random.Generator):
        raise OptionError("seed: expected an integer (or None), found a Generator; pass an integer seed")
    if seed is None:
        seed = int(np.random.SeedSequence().entropy)
    elif isinstance(seed, (bool, float)) or not isinstance(seed, (int, np.integer)):
        raise OptionError(f"seed: expected a non-negative integer or None, found {seed!r}")
    elif seed < 0:
        raise OptionError(f"seed: expected a non-negative integer or None, found {seed!r}")
    seed = int(seed)
    return np.random.default_rng(seed), seed


def progress_fn(progress, label: str, total: int):
    """None/False: silent; True: the terminal bar; a callable: called as (done, total)."""
    if progress is None or progress is False:
        return None
    if progress is True:
        from ..progress import TerminalProgress

        return TerminalProgress(label)
    if callable(progress):
        return progress
    raise OptionError(f"progress: expected True, False, None or a callable(done, total), found {progress!r}")


def stopping_rule_text(tally=None) -> str:
    """``extra['stopping_rule']``: the sequential rule, or 'none' for a run of all B."""
    if tally is not None and getattr(tally, "exact", False):
        return "none: all B resamples drawn (exact_resamples)"
    return STOPPING_RULE


def p_notes(pinfo: dict, B: int, alpha: float, *, max_resamples: int | None = None,
            stopped_early: bool = False) -> list[str]:
    """Notes on a resampled p from ``B`` resamples (of at most ``max_resamples``)."""
    lo, hi = pinfo["p_interval"]
    notes = [f"p = (1 + {pinfo['count']}) / ({B} + 1) from {B} resamples; Monte Carlo SE {pinfo['mc_se']:.2g}; "
             f"{P_INTERVAL_LEVEL:.0%} Clopper-Pearson interval for the p-value [{lo:.4g}, {hi:.4g}]"]
    if stopped_early:
        notes.append(f"stopped early after {B} of at most {max_resamples} resamples: the decision at alpha = "
                     f"{alpha:g} is settled by the sequential rule (Gandy 2009; the probability that more "
                     f"resamples would reverse it is at most {SEQUENTIAL_RISK:g}); the p-value itself is only as "
                     "precise as its interval - use exact_resamples (--exact-resamples) for all B")
        return notes
    if not pinfo["settled"]:
        notes.append(f"the {P_INTERVAL_LEVEL:.0%} interval for the p-value straddles alpha = {alpha:g}: the decision "
                     f"is not settled at B = {B}; draw more resamples")
    if 1.0 / (B + 1) > alpha:
        notes.append(f"with B = {B} the smallest attainable p is {1.0 / (B + 1):.3g} > alpha: "
                     "use more resamples")
    return notes


def none_result(method_id: str, effect: str, reason: str, statistic_name: str, resamples: int | None = None,
                extra: dict | None = None) -> MethodResult:
    return MethodResult(id=method_id, effect=effect, statistic=None, statistic_name=statistic_name, p=None,
                        resamples=resamples, notes=(reason,), extra=extra or {})
