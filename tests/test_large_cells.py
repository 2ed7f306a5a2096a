"""Designs with many cells: the structured forms (nothing dense in the number of
cells) against the dense computations they replace and against statsmodels, on
small designs (3 x 4 and 6 x 7, to 1e-10); a 60 x 60 audit with every dense
allocation forbidden; the memory-budget error.

Inputs are generated in the tests (invented data, property checks)."""

import tracemalloc

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats

import audit
import audit.core as core
import audit.methods.wald as wald
from audit.diagnostics import assumptions
from audit.errors import AuditInputError, DesignTooLargeError
from audit.fit import fit_observations
from audit.intake import load
from audit.methods import resampling
from audit.methods.hc import hc_wald_all
from audit.methods.welch import welch_james_all
from audit.verdict import calibration

SHAPES = [(3, 4), (6, 7)]


def _frame(J, K, seed, nmin=2, nmax=7):
    rng = np.random.default_rng(seed)
    n = rng.integers(nmin, nmax + 1, size=(J, K))
    a = np.repeat(np.repeat(np.arange(J), K), n.ravel())
    b = np.repeat(np.tile(np.arange(K), J), n.ravel())
    sd = 0.5 + (a % 3) * 0.7 + (b % 2) * 0.4
    y = 10 + 0.3 * a - 0.2 * b + 0.4 * ((a * b) % 3 == 1) + rng.normal(size=a.size) * sd
    return pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})


def _fit(df):
    return fit_observations(load(df, response="y", factors=("a", "b")))


@pytest.fixture
def structured_everywhere(monkeypatch):
    """The structured forms on every size (they are used only above wald._DENSE_WORK
    otherwise, so small designs keep their dense numbers bit for bit)."""
    monkeypatch.setattr(wald, "_DENSE_WORK", 0)


def _dense_P(n, C):
    """P = C' (C D C')^-1 C, D = diag(1/n): the dense form the structured traces replace."""
    return C.T @ np.linalg.solve((C / n) @ C.T, C)


@pytest.mark.parametrize("J,K", SHAPES + [(7, 3), (2, 2)])
def test_interaction_traces_equal_dense_projection(J, K):
    rng = np.random.default_rng(J * 10 + K)
    n = rng.integers(2, 9, size=(J, K)).astype(float)
    t = rng.gamma(2.0, 1.0, size=(4, J, K))
    P = _dense_P(n.ravel(), core.type3_contrasts(J, K)["AB"])
    tr1, tr2 = core.interaction_traces(n, t)
    for i in range(t.shape[0]):
        # reference: the dense definition (common practice): tr(P T) and tr((P T)^2)
        PT = P * t[i].ravel()[None, :]
        assert_allclose(tr1[i], np.trace(PT), rtol=1e-10)
        assert_allclose(tr2[i], np.trace(PT @ PT), rtol=1e-10)
        # reference: the eigenvalues of (C D C')^-1 (C S C') (Box 1954), via numpy
        C = core.type3_contrasts(J, K)["AB"]
        lam = np.linalg.eigvals(np.linalg.solve((C / n.ravel()) @ C.T, (C * t[i].ravel()) @ C.T)).real
        assert_allclose(tr2[i], np.sum(lam ** 2), rtol=1e-9)


def _old_box_level(fit, draws=2000, seed=20240611):
    """The former dense computation of the homogeneity check's Box level (kept here as
    the reference the structured form must reproduce)."""
    c = fit.cells
    n = c.counts.ravel().astype(float)
    s2 = c.variances.ravel().astype(float)
    C = core.type3_contrasts(c.J, c.K)["AB"]
    r = C.shape[0]
    P = _dense_P(n, C)

    def many(s2m):
        s2m = np.atleast_2d(s2m)
        t = s2m / n
        tr = t @ np.diag(P)
        tr2 = np.sum((t @ (P * P)) * t, axis=1)
        dfe = float(n.sum() - n.size)
        w = (n - 1.0) * s2m
        b = (tr / r) / (w.sum(axis=1) / dfe)
        h1 = tr * tr / tr2
        h2 = w.sum(axis=1) ** 2 / np.sum((n - 1.0) * s2m * s2m, axis=1)
        return stats.f.sf(float(stats.f.isf(fit.alpha, r, dfe)) / b, h1, h2), b, h1, h2

    lv, b, h1, h2 = many(s2)
    m = n.size
    draws = int(max(50, min(draws, 20_000_000 // (m * m))))
    rng = np.random.default_rng(seed)
    null = rng.chisquare(np.broadcast_to(n - 1.0, (draws, m))) / (n - 1.0)
    lo, hi = np.quantile(many(null)[0], [0.025, 0.975])
    return {"level": lv[0], "bias_ratio": b[0], "df1_eff": h1[0], "df2_eff": h2[0], "null_lo": lo, "null_hi": hi}


@pytest.mark.parametrize("J,K", SHAPES)
def test_box_level_and_bias_ratio_equal_the_dense_forms(J, K):
    fit = _fit(_frame(J, K, seed=J + K))
    new = assumptions._box_level(fit)
    old = _old_box_level(fit)
    for key in old:
        assert_allclose(new[key], old[key], rtol=1e-10, atol=1e-14)
    fb, _ = assumptions._f_bias_ratio(fit)
    assert_allclose(fb, old["bias_ratio"], rtol=1e-10)


def test_null_draws_in_blocks_are_one_draw(monkeypatch):
    """Blocks of rows from the generator give the values of one (draws, m) draw."""
    n = np.arange(2, 52, dtype=float)
    whole = assumptions.sd_ratio_null_quantile(n)
    monkeypatch.setattr(assumptions, "_NULL_BLOCK", 7 * n.size)
    assert assumptions.sd_ratio_null_quantile(n) == whole


@pytest.mark.parametrize("J,K", SHAPES)
def test_structured_wald_forms_equal_statsmodels(J, K, structured_everywhere):
    df = _frame(J, K, seed=3 * J + K)
    fit = _fit(df)
    hc = hc_wald_all(fit, kind="hc3")
    wj = welch_james_all(fit)
    FORMULA = "y ~ C(a, Sum) * C(b, Sum)"
    # reference: statsmodels anova_lm(typ=3, robust="hc3") on a sum-to-zero coded OLS fit
    t3 = sm.stats.anova_lm(smf.ols(FORMULA, df).fit(), typ=3, robust="hc3")
    assert_allclose([r.statistic for r in hc], t3["F"].iloc[1:4].to_numpy(), rtol=1e-10)
    # reference: statsmodels OLS cov_type="HC2" wald_test chi-square = the Welch-James T
    mh = smf.ols(FORMULA, df).fit(cov_type="HC2")
    names = mh.model.exog_names
    for r in wj:
        pick = {"A": lambda x: x.startswith("C(a") and ":" not in x,
                "B": lambda x: x.startswith("C(b") and ":" not in x, "AB": lambda x: ":" in x}[r.effect]
        idx = [i for i, x in enumerate(names) if pick(x)]
        L = np.zeros((len(idx), len(names)))
        L[np.arange(len(idx)), idx] = 1.0
        w = mh.wald_test(L, use_f=False, scalar=True)
        assert_allclose(r.extra["T"], float(w.statistic), rtol=1e-10)


@pytest.mark.parametrize("J,K", SHAPES)
def test_restricted_fit_and_leverage_equal_statsmodels(J, K):
    df = _frame(J, K, seed=5 * J + K)
    fit = _fit(df)
    st = fit.cells.standardised()
    n = st.counts.ravel().astype(float)
    means = st.means.ravel()
    CJ, CK = core.contrast_matrix(J), core.contrast_matrix(K)
    a = df["a"].str[1:].astype(int).to_numpy()
    b = df["b"].str[1:].astype(int).to_numpy()
    cell = a * K + b
    ones = np.ones((df.shape[0], 1))
    XA, XB = CJ.T[a], CK.T[b]
    XAB = (XA[:, :, None] * XB[:, None, :]).reshape(len(a), -1)
    designs = {"AB": np.hstack([ones, XA, XB]), "A": np.hstack([ones, XB, XAB]), "B": np.hstack([ones, XA, XAB])}
    y = df["y"].to_numpy()
    for e, X in designs.items():
        C = core.Type3Contrast(J, K, e)
        # reference: statsmodels OLS of the restricted model (sum-to-zero coding without the
        # effect's columns): fitted cell means and the hat diagonal
        ols = sm.OLS(y, X).fit()
        h = ols.get_influence().hat_matrix_diag
        assert_allclose(core.structured_restricted_leverage(C, n)[cell], h, rtol=1e-10, atol=1e-13)
        assert_allclose(resampling.restricted_leverage(n, C)[cell], h, rtol=1e-10, atol=1e-13)
        dense = resampling.restricted_cell_fit(means, n, np.asarray(C))
        assert_allclose(core.structured_restricted_fit(C, means, n), dense, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("J,K", SHAPES)
def test_resampling_statistics_structured_equal_dense(J, K, monkeypatch):
    fit = _fit(_frame(J, K, seed=7 * J + K))
    layout = resampling.layout_from_fit(fit)
    rng = np.random.default_rng(1)
    u = rng.normal(size=layout.N)
    us = np.vstack([rng.permutation(u) for _ in range(5)])
    S = np.add.reduceat(us, layout.starts, axis=1)
    SQ = np.add.reduceat(us * us, layout.starts, axis=1)
    Cs = [resampling.effect_hypothesis(fit.cells, e)[0] for e in ("A", "B", "AB")]
    dense_f = resampling.f_statistic_maker(layout, [np.asarray(C) for C in Cs], float(u @ u))(S)
    dense_w = {k: resampling.wald_statistic_maker(layout, [np.asarray(C) for C in Cs], kind=k, scale=1.0)(S, SQ)
               for k in ("hc2", "hc3", "wj")}
    monkeypatch.setattr(wald, "_DENSE_WORK", 0)
    # reference: the dense row-basis / null-space forms of the same statistics
    assert_allclose(resampling.f_statistic_maker(layout, Cs, float(u @ u))(S), dense_f, rtol=1e-10)
    for k, d in dense_w.items():
        assert_allclose(resampling.wald_statistic_maker(layout, Cs, kind=k, scale=1.0)(S, SQ), d, rtol=1e-10)


@pytest.mark.parametrize("J,K", SHAPES)
def test_size_check_batches_structured_equal_dense(J, K, monkeypatch):
    rng = np.random.default_rng(J * K)
    n = rng.integers(2, 8, size=J * K).astype(float)
    R = 40
    means = rng.normal(size=(R, J * K)) / np.sqrt(n)
    css = rng.chisquare(n - 1.0, size=(R, J * K))
    var = css / (n - 1.0)
    dense_f = calibration.classical_f_batch(means, css, n, J, K)
    Cm = {e: core.type3_contrasts(J, K)[e] for e in ("A", "B", "AB")}
    dense_wj = {e: calibration.welch_james_batch(means, var, n, Cm[e]) for e in Cm}
    dense_hc = {e: calibration.hc_wald_batch(means, css, n, Cm[e], kind="hc4") for e in Cm}
    monkeypatch.setattr(wald, "_DENSE_WORK", 0)
    new_f = calibration.classical_f_batch(means, css, n, J, K)
    for e in ("A", "B", "AB"):
        # reference: the dense SVD projection / r x r forms of the same batches
        assert_allclose(new_f[e][0], dense_f[e][0], rtol=1e-10)
        T = core.Type3Contrast(J, K, e)
        for a, b in zip(calibration.welch_james_batch(means, var, n, T), dense_wj[e]):
            assert_allclose(a, b, rtol=1e-10)
        for a, b in zip(calibration.hc_wald_batch(means, css, n, T, kind="hc4"), dense_hc[e]):
            assert_allclose(a, b, rtol=1e-10)
    # reference: statsmodels anova_lm(typ=3) on one dataset built from the first batch row
    row = 0
    y, a, b = [], [], []
    for c in range(J * K):
        k = int(n[c])
        z = rng.normal(size=k)
        z = (z - z.mean()) / np.sqrt(np.sum((z - z.mean()) ** 2)) * np.sqrt(css[row, c]) + means[row, c]
        y += list(z)
        a += [f"a{c // K}"] * k
        b += [f"b{c % K}"] * k
    t3 = sm.stats.anova_lm(smf.ols("y ~ C(a, Sum) * C(b, Sum)", pd.DataFrame({"y": y, "a": a, "b": b})).fit(),
                           typ=3)
    assert_allclose([new_f[e][0][row] for e in ("A", "B", "AB")], t3["F"].iloc[1:4].to_numpy(), rtol=1e-9)


def test_zero_variance_cell_keeps_the_structured_form():
    """A 40 x 40 interaction with three zero cell variances: the floored structured form
    against the exact dense r x r form (numpy), to the floor's order."""
    rng = np.random.default_rng(2)
    C = core.Type3Contrast(40, 40, "AB")
    Cd = C.dense()
    means = rng.normal(size=1600)
    v = rng.gamma(2.0, 1.0, 1600)
    v[[3, 100, 777]] = 0.0
    M = (Cd * v) @ Cd.T
    Cy = Cd @ means
    # reference: the dense Wald form with the zero variances (numpy solve)
    assert_allclose(wald.wald_quadratic(means, v, C), Cy @ np.linalg.solve(M, Cy), rtol=1e-6)


def _square(J, n, seed=11):
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(J), J * n)
    b = np.tile(np.repeat(np.arange(J), n), J)
    y = 20 + 0.05 * a + 0.03 * b + rng.gamma(4.0, 1.0, a.size)
    return pd.DataFrame({"y": y, "a": [f"a{i:02d}" for i in a], "b": [f"b{i:02d}" for i in b]})


def test_60_by_60_audit_allocates_nothing_dense_in_cells(monkeypatch):
    """The whole audit of a 60 x 60 design (n = 2) with every dense allocation in the
    number of cells forbidden (its C_AB alone would be 100 MB), and a bounded peak."""
    monkeypatch.setattr(core, "DENSE_BUDGET", 4 * 2**20)
    df = _square(60, 2)
    tracemalloc.start()
    try:
        f = audit.check(df, response="y", factors=("a", "b"), resamples=199, calibration=200, seed=3)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 300 * 2**20, peak / 2**20
    homog = next(d for d in f.diagnostics if d.id == "homogeneity")
    assert homog.values["f_level"] is not None and homog.values["f_bias_ratio"] is not None
    assert {m.id for m in f.methods} >= {"welch-james", "hc3-wald", "permutation-studentized", "wild-bootstrap"}
    ab = [m for m in f.methods if m.effect == "AB" and m.id in ("welch-james", "hc3-wald")]
    assert all(m.p is not None for m in ab)


def test_dense_stage_refused_with_a_typed_one_line_error():
    """Empty cells leave no structured interaction contrasts: a 150 x 150 design would
    need a 22,500-row dense basis, refused before allocating."""
    df = _square(150, 1).iloc[1:]                  # cell a00 x b00 empty
    cells = _fit(df).cells
    with pytest.raises(DesignTooLargeError) as exc:
        resampling.effect_hypothesis(cells, "AB")
    msg = str(exc.value)
    assert isinstance(exc.value, AuditInputError) and "\n" not in msg
    assert "150 x 150" in msg and "22,500 cells" in msg and "--no-methods" in msg


def test_n_one_or_two_per_cell_runs_in_bounded_memory(monkeypatch):
    """n = 1-2 per cell (the reported failure's shape) at 50 x 50: no dense allocation."""
    monkeypatch.setattr(core, "DENSE_BUDGET", 4 * 2**20)
    rng = np.random.default_rng(4)
    n = rng.integers(1, 3, size=(50, 50))
    a = np.repeat(np.repeat(np.arange(50), 50), n.ravel())
    b = np.repeat(np.tile(np.arange(50), 50), n.ravel())
    df = pd.DataFrame({"y": rng.normal(size=a.size), "a": a.astype(str), "b": b.astype(str)})
    f = audit.check(df, response="y", factors=("a", "b"), resamples=99, calibration=100, seed=1)
    assert next(d for d in f.diagnostics if d.id == "homogeneity").values["f_level"] is None
