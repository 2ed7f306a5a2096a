"""The partial eta squared interval at large error df (noncentral F inversion).

scipy.stats.ncf.cdf returns NaN for some large arguments (for example
ncf.cdf(300, 15, 1e5, 9000)); the interval must then still be finite, or None
with a note, never an exception.  Each interval is checked against one built
here by a different route: the noncentral F as the mixture of noncentral
chi-square cdfs over the denominator chi-square (its definition as a ratio of
independent chi-squares), integrated with Gauss-Legendre panels on the
probability scale and inverted by bisection; for moderate df also against
statsmodels.stats.oneway.confint_noncentrality.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from audit.core import anova_two_way, ncf_cdf, ncf_cdf_mixture, partial_eta_sq_ci
from audit.design import CellStats

F_GRID = (0.1, 3.0, 300.0, 1e4)
DF1_GRID = (1, 15)
DF2_GRID = (20, 1_000, 50_000, 100_000, 1_000_000, 10_000_000)

_NODES = {True: np.polynomial.legendre.leggauss(24), False: np.polynomial.legendre.leggauss(64)}
_EDGES = np.array([0.0, 1e-13, 1e-9, 1e-6, 1e-4, 0.01, 0.1, 0.3, 0.5, 0.7, 0.9, 0.99,
                   1 - 1e-4, 1 - 1e-6, 1 - 1e-9, 1 - 1e-13, 1.0])


def _mixture_cdf_factory(F, df1, df2):
    """reference: P(F' <= F) = E[ P(chi2'(df1, lam) <= F df1 X / df2) ], X ~ chi2(df2)
    (definition of the noncentral F; Johnson, Kotz & Balakrishnan 1995, ch. 30), by
    Gauss-Legendre quadrature over u = P(X <= x) on panels finer than the library's."""
    x, w0 = _NODES[df2 >= 1000]        # a spread-out denominator needs more nodes
    a, b = _EDGES[:-1, None], _EDGES[1:, None]
    u = (a + (b - a) * (x + 1) / 2).ravel()
    w = ((b - a) / 2 * w0).ravel()
    t = F * df1 * stats.chi2.ppf(u, df2) / df2

    def cdf(lam):
        v = stats.ncx2.cdf(t, df1, lam) if lam > 0 else stats.chi2.cdf(t, df1)
        return float(np.sum(w * v))

    return cdf


def _reference_interval(F, df1, df2, level=0.95):
    cdf = _mixture_cdf_factory(F, df1, df2)

    def solve(q):
        if cdf(0.0) <= q:
            return 0.0
        lo, hi = 0.0, max(10.0, 2.0 * F * df1)
        while cdf(hi) > q:
            lo, hi = hi, 2.0 * hi
        # a bracketing root search on the reference cdf (regula falsi, Illinois variant)
        flo, fhi = cdf(lo) - q, cdf(hi) - q
        side = 0
        for _ in range(100):
            mid = (lo * fhi - hi * flo) / (fhi - flo)
            fm = cdf(mid) - q
            if fm > 0:
                lo, flo = mid, fm
                if side == -1:
                    fhi /= 2
                side = -1
            else:
                hi, fhi = mid, fm
                if side == 1:
                    flo /= 2
                side = 1
            if abs(fm) < 1e-12 or hi - lo <= 1e-11 * hi:
                break
        return mid

    conv = lambda lam: lam / (lam + df1 + df2 + 1)  # noqa: E731
    return conv(solve((1 + level) / 2)), conv(solve((1 - level) / 2))


def test_reported_failure_case_is_finite():
    # source: the failing call reported for a 327,346-row 16 x 3 design (scipy's ncf.cdf is NaN there)
    ci = partial_eta_sq_ci(300.0, 15, 100000)
    assert ci is not None and all(math.isfinite(x) for x in ci)
    assert 0.0 < ci[0] < ci[1] < 1.0
    assert math.isfinite(ncf_cdf(300.0, 15, 1e5, 9000.0))


def test_grid_against_mixture_reference():
    # reference: the chi-square mixture route above (independent of scipy.stats.ncf), to 1e-6
    # in eta squared, for F in [0.1, 1e4] and error df up to 1e7
    for df2 in DF2_GRID:
        for df1 in DF1_GRID:
            for F in F_GRID:
                ci = partial_eta_sq_ci(F, df1, df2)
                if ci is None:     # allowed only with a note (checked through the ANOVA row below)
                    continue
                assert all(math.isfinite(x) for x in ci), (F, df1, df2, ci)
                ref = _reference_interval(F, df1, df2)
                np.testing.assert_allclose(ci, ref, rtol=0, atol=1e-6, err_msg=f"F={F} df1={df1} df2={df2}")


@pytest.mark.parametrize("F,df1,df2", [(3.0, 4, 20), (30.0, 1, 1000), (0.7, 15, 1000), (300.0, 4, 1000)])
def test_moderate_df_against_statsmodels(F, df1, df2):
    # reference: statsmodels.stats.oneway.confint_noncentrality (95%, two-sided), converted with
    # eta^2 = lambda / (lambda + df1 + df2 + 1) (Steiger 2004); its root finding is loose (about
    # 1e-3 relative in lambda, see tests/test_anova_reference.py), hence the tolerance
    oneway = pytest.importorskip("statsmodels.stats.oneway")
    lo, hi = oneway.confint_noncentrality(F, (df1, df2), alpha=0.05)
    conv = lambda lam: max(lam, 0.0) / (max(lam, 0.0) + df1 + df2 + 1)  # noqa: E731
    ci = partial_eta_sq_ci(F, df1, df2)
    np.testing.assert_allclose(ci, [conv(lo), conv(hi)], rtol=3e-3, atol=1e-6)


def test_mixture_route_matches_scipy_where_defined():
    # reference: scipy.stats.ncf.cdf (Boost), where it returns a number
    for df2 in (30, 5_000, 200_000):
        for F, df1, lam in ((1.0, 3, 2.0), (30.0, 15, 400.0), (300.0, 1, 250.0)):
            a = stats.ncf.cdf(F, df1, df2, lam)
            if np.isfinite(a):
                assert abs(ncf_cdf_mixture(F, df1, df2, lam) - a) < 1e-8


def test_anova_row_at_huge_error_df_never_raises():
    # common practice: a 16 x 3 design with about 327,000 rows (summary statistics invented)
    rng = np.random.default_rng(7)
    J, K = 16, 3
    counts = np.full((J, K), 6820)
    means = rng.normal(0.0, 0.05, (J, K)) + np.linspace(0, 1, J)[:, None]
    css = (counts - 1) * rng.uniform(0.8, 1.2, (J, K))
    cells = CellStats(factors=("A", "B"), levels_a=tuple(f"a{j}" for j in range(J)),
                      levels_b=tuple(f"b{k}" for k in range(K)), counts=counts, means=means, css=css)
    an = anova_two_way(cells)
    for t in ("I", "II", "III"):
        for r in an.tables[t].rows[:3]:
            ci = r.partial_eta_sq_ci
            assert (ci is not None and all(math.isfinite(x) for x in ci)) or (r.note and "interval" in r.note)
