"""Designs with many cells: the structured additive-model solver of the core
against numpy.linalg.lstsq, and a whole audit of a 300 x 2 design against
statsmodels within a generous time bound."""

from __future__ import annotations

import time

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from audit.core import (
    additive_design,
    additive_fit_and_leverage,
    additive_residual,
    additive_wls_filled,
    type3_contrasts,
    type3_main_rdiag,
    type3_main_wald,
)
from audit.methods.wald import wald_quadratic, welch_james_a

import conftest  # noqa: F401  (puts the worktree on sys.path)


def lstsq_additive(n, t):
    """reference: numpy.linalg.lstsq of the weighted additive design (intercept,
    A and B dummies) over the filled cells; rank from numpy.linalg.matrix_rank."""
    J, K = n.shape
    X = np.hstack([np.ones((J * K, 1)), np.kron(np.eye(J), np.ones((K, 1))), np.kron(np.ones((J, 1)), np.eye(K))])
    w = n.ravel().astype(float)
    keep = w > 0
    sw = np.sqrt(w[keep])
    beta = np.linalg.lstsq(X[keep] * sw[:, None], t.ravel()[keep] * sw, rcond=None)[0]
    r = np.zeros(J * K)
    r[keep] = t.ravel()[keep] - X[keep] @ beta
    G = np.linalg.pinv((X[keep] * w[keep, None]).T @ X[keep])
    g = np.zeros(J * K)
    g[keep] = np.einsum("ij,jk,ik->i", X[keep], G, X[keep])
    return r.reshape(J, K), int(np.linalg.matrix_rank(X[keep])), g.reshape(J, K)


def random_design(rng, J, K, p_empty, *, block=False):
    n = rng.integers(1, 6, size=(J, K))
    n[rng.random((J, K)) < p_empty] = 0
    if block:                                    # two disconnected blocks
        n[: J // 2, K // 2:] = 0
        n[J // 2:, : K // 2] = 0
    for j in range(J):                           # keep every level observed
        if n[j].sum() == 0:
            n[j, rng.integers(K)] = 1
    for k in range(K):
        if n[:, k].sum() == 0:
            n[rng.integers(J), k] = 1
    return n


@pytest.mark.parametrize("J,K,p_empty,block", [
    (2, 2, 0.0, False), (3, 5, 0.3, False), (7, 3, 0.4, False), (6, 6, 0.5, False),
    (4, 6, 0.0, True), (8, 5, 0.3, True), (12, 2, 0.2, False), (2, 9, 0.3, False), (1, 4, 0.0, False),
])
def test_structured_solver_equals_lstsq(J, K, p_empty, block):
    # reference: numpy.linalg.lstsq (residual), matrix_rank (rank), pinv of the normal equations (leverage)
    rng = np.random.default_rng(J * 100 + K)
    for _ in range(5):
        n = random_design(rng, J, K, p_empty, block=block)
        t = np.where(n > 0, rng.normal(size=(J, K)) * 10.0, 0.0)
        r_ref, rank_ref, g_ref = lstsq_additive(n, t)
        r, rank = additive_residual(n, t)
        R, g, rank2, _ = additive_fit_and_leverage(n, t)
        assert rank == rank2 == rank_ref
        scale = np.sqrt(np.sum(n * t * t))
        assert_allclose(r, r_ref, rtol=0, atol=1e-12 * scale)
        assert_allclose(R, r_ref, rtol=0, atol=1e-12 * scale)
        assert_allclose(g, g_ref, rtol=1e-9, atol=1e-12)


def test_single_cell_per_level_and_bridge():
    # reference: numpy.linalg.lstsq; a design whose only link between two blocks is one cell
    n = np.array([[2, 3, 0, 0], [1, 0, 0, 0], [0, 1, 4, 2], [0, 0, 2, 0]])
    t = np.where(n > 0, np.arange(16.0).reshape(4, 4) ** 1.5, 0.0)
    r_ref, rank_ref, g_ref = lstsq_additive(n, t)
    R, g, rank, _ = additive_fit_and_leverage(n, t)
    assert rank == rank_ref
    assert_allclose(R, r_ref, atol=1e-10)
    assert_allclose(g, g_ref, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("J,K", [(2, 2), (5, 3), (3, 8), (30, 30), (300, 2)])
def test_filled_batched_solver_and_type3_forms(J, K):
    # reference: dense Wald forms (C y)'(C V C')^-1 (C y) and V C'(C V C')^-1 C (numpy.linalg.solve)
    rng = np.random.default_rng(J + 7 * K)
    w = rng.uniform(0.2, 4.0, (3, J, K))
    t = rng.normal(size=(3, J, K))
    R, g = additive_wls_filled(w, t, leverage=True)
    for i in range(3):
        r_ref, _, g_ref = lstsq_additive(w[i], t[i])
        assert_allclose(R[i], r_ref, atol=1e-11)
        assert_allclose(g[i], g_ref, rtol=1e-9)
    C = type3_contrasts(J, K)
    means, v = t.reshape(3, J * K), 1.0 / w.reshape(3, J * K)
    dfs = np.full(J * K, 3.0)
    for e in ("A", "B", "AB"):
        Cy = means @ C[e].T
        M = (C[e] * v[:, None, :]) @ C[e].T
        T_ref = np.sum(Cy * np.linalg.solve(M, Cy[..., None])[..., 0], axis=-1)
        Rd_ref = v * np.sum(C[e] * np.linalg.solve(M, np.broadcast_to(C[e], M.shape[:-2] + C[e].shape)), axis=-2)
        assert_allclose(wald_quadratic(means, v, C[e]), T_ref, rtol=1e-10)
        assert_allclose(welch_james_a(v, dfs, C[e]), np.sum(Rd_ref ** 2 / dfs, axis=-1), rtol=1e-10)
        if e != "AB":
            assert_allclose(type3_main_wald(means, v, J, K, e), T_ref, rtol=1e-10)
            assert_allclose(type3_main_rdiag(v, J, K, e), Rd_ref, rtol=1e-10, atol=1e-15)


def greenhouse(L, seed=11):
    """Invented scenario: leaf area by seed lot (L levels) x irrigation (2 levels), n = 2."""
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(L), 4)
    b = np.tile([0, 0, 1, 1], L)
    y = 60 + 2.0 * (a % 7) + 8.0 * b + 3.0 * (a % 9 == 0) * b + rng.gamma(6.0, 1.0, a.size)
    return pd.DataFrame({"leaf": y, "lot": [f"lot-{i:03d}" for i in a], "water": np.where(b == 0, "low", "high")})


def test_long_design_full_check_fast_and_equal_to_statsmodels():
    import audit

    smf = pytest.importorskip("statsmodels.formula.api")
    sm_anova = pytest.importorskip("statsmodels.stats.anova")
    frame = greenhouse(300)
    t0 = time.perf_counter()
    f = audit.check(frame, response="leaf", factors=("lot", "water"), resamples=0, seed=3, calibration=0)
    elapsed = time.perf_counter() - t0
    assert elapsed < 20.0, f"300 x 2 full check took {elapsed:.1f} s"  # generous bound on a loaded 2-core machine
    assert {d.id for d in f.diagnostics} >= {"scale", "shape", "influence", "fragility", "homogeneity"}
    # reference: statsmodels ols + anova_lm(typ=2), treatment coding (Type II SS do not depend on coding)
    model = smf.ols("leaf ~ C(lot) * C(water)", data=frame).fit()
    tab = sm_anova.anova_lm(model, typ=2)
    names = {"A": "C(lot)", "B": "C(water)", "AB": "C(lot):C(water)", "residual": "Residual"}
    ours = f.anova.tables["II"]
    for e, nm in names.items():
        row = ours.row(e)
        assert_allclose(row.ss, tab.loc[nm, "sum_sq"], rtol=1e-9)
        assert row.df == int(round(tab.loc[nm, "df"]))
        if e != "residual":
            assert_allclose(row.F, tab.loc[nm, "F"], rtol=1e-9)
            assert_allclose(row.p, tab.loc[nm, "PR(>F)"], rtol=1e-7, atol=1e-300)
