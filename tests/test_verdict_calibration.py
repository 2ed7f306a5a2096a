"""The size check (audit/verdict/calibration.py): its batched statistics against
the project's single-dataset functions (themselves tested against statsmodels,
pingouin and scipy) and against statsmodels directly; its estimated sizes
against the binomial band and the published direction of the classical F's
error under unequal variances.  Invented data only, as property checks."""

import functools
import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats

from audit.core import type3_contrasts
from audit.design import cells_from_summary
from audit.errors import OptionError
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from audit.methods.classical import classical_f
from audit.methods.hc import hc_wald
from audit.methods.welch import welch_james
from audit.verdict import size_check
from audit.verdict.calibration import (
    classical_f_batch,
    hc_wald_batch,
    moderated_variances,
    welch_james_batch,
)

EFFECTS = ("A", "B", "AB")
UNBAL = np.array([[5, 9, 14], [7, 3, 11], [12, 6, 4], [8, 10, 6]])
# the unbalanced 3 x 3 design of METHODS.md section 10a
U3 = np.array([[4, 12, 8], [16, 6, 10], [9, 14, 5]])


def _frame(counts, sds, seed, *, empty=(), interaction=0.0):
    """Invented scenario: crumb firmness of loaves, oven (A) x proofing time (B)."""
    rng = np.random.default_rng(seed)
    counts = np.array(counts)
    for j, k in empty:
        counts[j, k] = 0
    J, K = counts.shape
    a = np.repeat(np.repeat(np.arange(J), K), counts.ravel())
    b = np.repeat(np.tile(np.arange(K), J), counts.ravel())
    sd = np.asarray(sds, dtype=float).reshape(J, K)[a, b]
    y = 20 + 1.5 * a - 0.8 * b + interaction * (a == 1) * (b == 1) + rng.normal(size=a.size) * sd
    return pd.DataFrame({"firmness": y, "oven": [f"oven{i}" for i in a], "proof": [f"p{i}" for i in b]})


def _fit(df):
    return fit_observations(load(df, response="firmness", factors=("oven", "proof")))


def _stack(fits):
    f = fits[0].cells.counts.ravel() > 0
    means = np.array([x.cells.means.ravel()[f] for x in fits])
    css = np.array([x.cells.css.ravel()[f] for x in fits])
    return means, css, fits[0].cells.counts.ravel()[f], f


@functools.lru_cache(maxsize=None)
def _hetero_fits(empty=()):
    sds = np.outer([1.0, 3.0, 0.5, 2.0], [1.0, 0.6, 1.7])
    return [_fit(_frame(UNBAL, sds, s, empty=empty, interaction=0.7)) for s in range(5)]


def test_batched_classical_f_equals_project_function():
    fits = _hetero_fits()
    means, css, n, _ = _stack(fits)
    out = classical_f_batch(means, css, n, 4, 3)
    for e in EFFECTS:
        F, d1, d2 = out[e]
        # reference: audit.methods.classical.classical_f (tested against statsmodels anova_lm)
        ref = [classical_f(x, effect=e) for x in fits]
        assert_allclose(F, [r.statistic for r in ref], rtol=1e-10)
        assert (d1, d2) == (ref[0].df1, ref[0].df2)
        assert_allclose(stats.f.sf(F, d1, d2), [r.p for r in ref], rtol=1e-10)


def test_batched_classical_f_with_empty_cells_equals_project_function():
    fits = _hetero_fits(empty=((0, 2), (3, 0)))
    means, css, n, filled = _stack(fits)
    out = classical_f_batch(means, css, n, 4, 3, filled=filled)
    for e in EFFECTS:
        F, d1, _ = out[e]
        # reference: audit.methods.classical.classical_f (Type II main effects with empty cells)
        ref = [classical_f(x, effect=e) for x in fits]
        assert_allclose(F, [r.statistic for r in ref], rtol=1e-9)
        assert d1 == ref[0].df1


def test_batched_classical_f_equals_statsmodels_anova_lm():
    df = _frame(UNBAL, np.ones((4, 3)), 11, interaction=1.0)
    fit = _fit(df)
    f = fit.cells.counts.ravel() > 0
    out = classical_f_batch(fit.cells.means.ravel()[f][None], fit.cells.css.ravel()[f][None],
                            fit.cells.counts.ravel(), 4, 3)
    # reference: statsmodels ols + anova_lm(typ=3) with sum-to-zero coding
    t3 = sm.stats.anova_lm(smf.ols("firmness ~ C(oven, Sum) * C(proof, Sum)", df).fit(), typ=3)
    assert_allclose([out[e][0][0] for e in EFFECTS], t3["F"].iloc[1:4].to_numpy(), rtol=1e-9)


def test_batched_welch_james_equals_project_function():
    fits = _hetero_fits()
    means, css, n, _ = _stack(fits)
    var = css / (n - 1)
    C = type3_contrasts(4, 3)
    for e in EFFECTS:
        stat, df2, p = welch_james_batch(means, var, n, C[e])
        # reference: audit.methods.welch.welch_james (tested against pingouin/statsmodels Welch ANOVA)
        ref = [welch_james(x, effect=e) for x in fits]
        assert_allclose(stat, [r.statistic for r in ref], rtol=1e-10)
        assert_allclose(df2, [r.df2 for r in ref], rtol=1e-10)
        assert_allclose(p, [r.p for r in ref], rtol=1e-10)


@pytest.mark.parametrize("kind", ["hc3", "hc4"])
def test_batched_hc_wald_equals_project_function(kind):
    fits = _hetero_fits()
    means, css, n, _ = _stack(fits)
    C = type3_contrasts(4, 3)
    for e in EFFECTS:
        F, p = hc_wald_batch(means, css, n, C[e], kind=kind)
        # reference: audit.methods.hc.hc_wald (tested against statsmodels anova_lm(robust=...))
        ref = [hc_wald(x, effect=e, kind=kind) for x in fits]
        assert_allclose(F, [r.statistic for r in ref], rtol=1e-10)
        assert_allclose(p, [r.p for r in ref], rtol=1e-10)


def _band(R, alpha, level=0.99):
    # reference: scipy.stats.binom - the central 99% range of k / R when the true size is alpha
    lo, hi = stats.binom.interval(level, R, alpha)
    return lo / R, hi / R


def test_equal_variances_balanced_classical_f_inside_binomial_band():
    fit = _fit(_frame(np.full((3, 3), 8), np.ones((3, 3)), 5))
    cal = size_check(fit, alpha=0.05, replications=2000, seed=1)
    row = cal.row("classical-f", "AB")
    lo, hi = _band(row.replications, 0.05)
    assert lo <= row.size <= hi
    assert row.status == "ok"
    assert cal.error_source == "resampled-residuals"


def test_variances_paired_negatively_with_sizes_make_classical_f_liberal():
    # SD proportional to 1/n (ratio 4): large variances in the small cells.  Published
    # direction: the classical F is liberal (Box 1954; Glass, Peckham & Sanders 1972);
    # METHODS.md 10a measured a size near 0.29 on this design.
    fit = _fit(_frame(U3, 4.0 / U3, 3))
    cal = size_check(fit, alpha=0.05, replications=2000, seed=2)
    f_row = cal.row("classical-f", "AB")
    assert f_row.status == "liberal" and f_row.interval[0] > 0.10
    assert "liberal here" in f_row.reason
    wj = cal.row("welch-james", "AB")
    assert wj.status == "ok" and 0.03 <= wj.size <= 0.09      # 10a: 0.073 on this design
    # and in the other direction (SD proportional to n) the classical F is conservative
    fit2 = _fit(_frame(U3, U3 / 4.0, 3))
    cal2 = size_check(fit2, alpha=0.05, replications=2000, seed=2)
    assert cal2.row("classical-f", "AB").status == "conservative"
    assert cal2.row("welch-james", "AB").status == "ok"


def test_same_seed_same_result_and_chunking_does_not_matter(monkeypatch):
    fit = _fit(_frame(UNBAL, np.ones((4, 3)), 7))
    a = size_check(fit, replications=500, seed=42)
    b = size_check(fit, replications=500, seed=42)
    assert a == b and a.to_dict() == b.to_dict()
    c = size_check(fit, replications=500, seed=43)
    assert c.to_dict()["rows"] != a.to_dict()["rows"]
    # the generator is consumed row by row, so the chunk size does not change the draws
    import audit.verdict.calibration as cal

    monkeypatch.setattr(cal, "_CHUNK_ELEMENTS", 3 * fit.cells.N)
    assert size_check(fit, replications=500, seed=42) == a


def test_summary_mode_uses_normal_errors_and_says_so():
    fit = _fit(_frame(U3, 4.0 / U3, 3))
    c = fit.cells
    rows = [{"oven": c.levels_a[j], "proof": c.levels_b[k], "mean": c.means[j, k],
             "sd": math.sqrt(c.variances[j, k]), "n": c.counts[j, k]} for j in range(3) for k in range(3)]
    sfit = fit_cells(cells_from_summary(pd.DataFrame(rows), factors=("oven", "proof")))
    cal = size_check(sfit, replications=2000, seed=3)
    assert cal.error_source == "normal" and "normal errors" in cal.error_note
    assert cal.row("classical-f", "AB").status == "liberal"


def test_normal_sufficient_statistics_have_the_right_moments():
    # the cell mean of n normal draws is N(0, 1/n) and the centred SS chi2(n - 1): common practice
    from audit.verdict.calibration import _simulate_cells

    n = np.array([2, 5, 9])
    m, s = _simulate_cells(np.random.default_rng(0), n, None, 40000)
    assert_allclose(m.var(axis=0) * n, 1.0, atol=0.03)
    assert_allclose(s.mean(axis=0), n - 1, rtol=0.02)
    assert_allclose(s.var(axis=0), 2 * (n - 1), rtol=0.05)


def test_one_observation_cell_and_zero_sd_cell():
    counts = UNBAL.copy()
    counts[1, 1] = 1
    df = _frame(counts, np.ones((4, 3)), 8)
    fit = _fit(df)
    cal = size_check(fit, replications=300, seed=1)
    assert cal.row("classical-f", "AB").status in ("ok", "liberal", "conservative")
    for mth in ("welch-james", "hc3-wald", "hc4-wald"):
        r = cal.row(mth, "AB")
        assert r.status == "not-run" and "n >= 2" in r.reason and r.size is None
    # a zero-SD cell: moderated toward the pooled variance, every method runs
    df2 = _frame(UNBAL, np.ones((4, 3)), 8)
    sel = (df2.oven == "oven2") & (df2.proof == "p0")
    df2.loc[sel, "firmness"] = 21.0
    cal2 = size_check(_fit(df2), replications=300, seed=1)
    assert "zero SD" in cal2.shrinkage.note
    assert all(r.status != "not-run" for r in cal2.rows)
    # without moderation the zero-variance cell blocks the cell-variance methods
    cal3 = size_check(_fit(df2), replications=300, seed=1, prior_df=0)
    assert cal3.row("welch-james", "AB").status == "not-run"


def test_empty_cell_runs_classical_only_and_unknown_methods_are_not_run():
    fit = _fit(_frame(UNBAL, np.ones((4, 3)), 9, empty=((0, 0),)))
    cal = size_check(fit, replications=300, seed=1,
                     methods=("classical-f", "welch-james", "permutation-studentized"))
    assert cal.row("classical-f", "AB").size is not None
    assert "empty" in cal.row("welch-james", "AB").reason
    assert "rule table" in cal.row("permutation-studentized", "AB").reason


def test_options_validated_and_zero_turns_off():
    fit = _fit(_frame(UNBAL, np.ones((4, 3)), 7))
    off = size_check(fit, replications=0, seed=1)
    assert all(r.status == "not-run" for r in off.rows) and off.error_source == "none"
    for bad in (dict(replications=-1), dict(replications=1.5), dict(seed=-3), dict(alpha=2.0),
                dict(prior_df=-1), dict(prior_df="x"), dict(effects=("C",))):
        with pytest.raises(OptionError):
            size_check(fit, **{"replications": 10, "seed": 1, **bad})


def test_smyth_prior_df_recovers_a_known_prior():
    # Smyth (2004): with s2 ~ s0^2 F(d, d0) across many groups the moment estimator of d0 is
    # consistent; checked on 20,000 invented groups with d0 = 8, d = 4
    rng = np.random.default_rng(0)
    G, d, d0 = 20000, 4, 8.0
    sigma2 = d0 / rng.chisquare(d0, G)                     # scaled inverse chi2 prior, s0^2 = 1
    s2 = sigma2 * rng.chisquare(d, G) / d
    post, est, pooled = moderated_variances(s2.reshape(100, 200), np.full((100, 200), d + 1))
    assert abs(est - d0) / d0 < 0.1
    # equal variances: the spread is sampling error alone, so d0 is large or infinite
    s2 = rng.chisquare(d, G) / d
    _, est2, _ = moderated_variances(s2.reshape(100, 200), np.full((100, 200), d + 1))
    assert est2 > 100
    # the posterior lies between the cell's own variance and the pooled variance
    lo = np.minimum(s2, pooled).reshape(100, 200)
    hi = np.maximum(s2, pooled).reshape(100, 200)
    post2, _, pooled2 = moderated_variances(s2.reshape(100, 200), np.full((100, 200), d + 1), prior_df=3.0)
    lo = np.minimum(s2.reshape(100, 200), pooled2)
    hi = np.maximum(s2.reshape(100, 200), pooled2)
    assert np.all((post2 >= lo - 1e-12) & (post2 <= hi + 1e-12))


def test_to_dict_is_json_safe():
    import json

    fit = _fit(_frame(UNBAL, np.ones((4, 3)), 7))
    d = size_check(fit, replications=200, seed=1).to_dict()
    s = json.dumps(d, allow_nan=False)
    assert '"rows"' in s and d["rule"]["liberal_multiple"] == 1.5


def test_two_per_cell_designs_do_not_crash_the_size_check():
    # regression: with n = 2 the pooled standardised residuals are all +-1, so simulated cells often
    # have zero variance and singular Welch-James / HC matrices; those datasets are left out (common practice)
    import numpy as np
    import pandas as pd

    import audit

    rng = np.random.default_rng(1)
    rows = [(f"r{j}", f"c{k}", 5 + 0.01 * j + k + rng.normal()) for j in range(40) for k in range(2) for _ in range(2)]
    f = audit.check(pd.DataFrame(rows, columns=["a", "b", "y"]), response="y", factors=("a", "b"), resamples=0,
                    seed=1, diagnostics=False)
    assert f.verdict is not None
    statuses = {r.method: r.status for r in f.calibration.rows if r.effect == "AB"}
    assert set(statuses) >= {"classical-f", "welch-james"}


def _summary_fit(counts, sds, seed=5):
    fit = _fit(_frame(counts, sds, seed))
    c = fit.cells
    J, K = c.counts.shape
    rows = [{"oven": c.levels_a[j], "proof": c.levels_b[k], "mean": c.means[j, k],
             "sd": float(np.asarray(sds, dtype=float).reshape(J, K)[j, k]), "n": c.counts[j, k]}
            for j in range(J) for k in range(K)]
    return fit_cells(cells_from_summary(pd.DataFrame(rows), factors=("oven", "proof")))


def test_power_pass_matches_noncentral_f_for_the_classical_f_under_equal_variances():
    # summary mode (normal errors), equal SDs in a balanced 3 x 3 of 6: the alternatives have the
    # noncentrality at which F(4, 45) has power 0.5, so the classical F's simulated power is 0.5
    # within Monte Carlo error. reference: scipy.stats.ncf (the noncentral F)
    from audit.verdict.calibration import POWER_TARGET, alternative_noncentrality

    fit = _summary_fit(np.full((3, 3), 6), np.ones((3, 3)))
    cal = size_check(fit, alpha=0.05, replications=4000, seed=2)
    lam = cal.power_noncentrality
    assert lam == pytest.approx(alternative_noncentrality(4, 45, 0.05))
    assert stats.ncf.sf(stats.f.isf(0.05, 4, 45), 4, 45, lam) == pytest.approx(POWER_TARGET, abs=1e-6)
    row = cal.row("classical-f", "AB")
    assert abs(row.power - POWER_TARGET) < 0.03          # 4 SE at R = 4,000
    # the tests that estimate the variances cell by cell lose power in cells of 6 (common practice)
    assert cal.row("welch-james", "AB").power < row.power
    assert cal.row("classical-f", "A").power is None      # alternatives are simulated for the interaction
    assert cal.to_dict()["rows"][0]["power"] is None or isinstance(cal.to_dict()["rows"][0]["power"], float)


def test_power_pass_leaves_the_null_sizes_unchanged_and_is_repeatable():
    # the alternatives are drawn after the null datasets, so sizes equal those without them
    fit = _fit(_frame(U3, 4.0 / U3, 3))
    a = size_check(fit, replications=1000, seed=9)
    b = size_check(fit, replications=1000, seed=9)
    assert a == b
    c = size_check(fit, replications=1000, seed=9, effects=("A",))
    assert c.row("classical-f", "A").size == a.row("classical-f", "A").size
