"""Plot coordinates (audit.diagnostics.plotdata) and the PNG writer (audit.render.figures)."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from audit.diagnostics import plotdata
from audit.errors import OptionError
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from audit.diagnostics.plotdata import figure_data
from audit.render.figures import FIGURE_FILES, write_figures
from audit.results import Diagnostic

from conftest import orchard_frame

RESP, FA, FB = "yield_kg", "rootstock", "pruning"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def frame():
    return orchard_frame(np.array([[2, 5, 9, 3], [7, 4, 6, 8], [3, 9, 2, 5]]), seed=5)


@pytest.fixture(scope="module")
def fit(frame):
    return fit_observations(load(frame, response=RESP, factors=(FA, FB)))


def _fake_influence(fit, alpha=0.05):
    rows = [int(r) for r in fit.obs.rows]
    p = list(np.linspace(0.001, 0.2, len(rows)))
    p[3] = None  # a row whose deletion leaves the test undefined is listed as None
    return Diagnostic(id="influence", severity="clear", summary="s",
                      values={"alpha": alpha, "loo_p": p, "rows": rows, "p_full": 0.02})


def _fake_scale():
    lam = list(np.linspace(-2, 3, 101))
    ll = [-(x - 0.4) ** 2 * 4 for x in lam]
    return Diagnostic(id="scale", severity="minor", summary="s",
                      values={"profile_lambda": lam, "profile_loglik": ll, "lambda_hat": 0.4,
                              "lambda_ci": [-0.28, 1.08], "loglik_max": 0.0})


# --------------------------------------------------------------------------- plot data

def test_cell_means_intervals_equal_scipy_t_interval(frame, fit):
    d = plotdata.cell_means_ci(fit)
    o1, o2 = d["orientations"]
    assert o1["x_factor"] == FA and o1["trace_factor"] == FB and o2["x_factor"] == FB
    for ti, tr in enumerate(o1["traces"]):
        for xi, a in enumerate(o1["x_levels"]):
            x = frame[(frame[FA] == a) & (frame[FB] == tr["level"])][RESP].to_numpy(float)
            # reference: scipy.stats.t.interval with the cell's own SD
            lo, hi = stats.t.interval(0.95, x.size - 1, loc=x.mean(), scale=stats.sem(x))
            assert_allclose([tr["mean"][xi], tr["lower"][xi], tr["upper"][xi]], [x.mean(), lo, hi], rtol=1e-12)
            # the other orientation holds the same numbers, transposed
            assert o2["traces"][xi]["mean"][ti] == tr["mean"][xi]
            assert o2["traces"][xi]["n"][ti] == x.size


def test_qq_residuals_equal_statsmodels_studentized(frame, fit):
    smf = pytest.importorskip("statsmodels.formula.api")
    d = plotdata.qq_points(fit)
    f = frame.rename(columns={RESP: "y", FA: "a", FB: "b"})
    res = smf.ols("y ~ C(a):C(b) - 1", data=f).fit()
    # reference: statsmodels OLSInfluence.resid_studentized_internal of the cell-means model
    r = np.sort(res.get_influence().resid_studentized_internal)
    assert_allclose(d["sample"], r, rtol=1e-9, atol=1e-12)
    n = r.size
    assert_allclose(d["theoretical"], stats.norm.ppf((np.arange(1, n + 1) - 0.375) / (n + 0.25)), rtol=1e-12)
    # band: Kolmogorov critical value (source: scipy.stats.kstwo)
    dks = stats.kstwo.ppf(0.95, n)
    i = np.arange(1, n + 1)
    lo = [None if not np.isfinite(v) else v for v in stats.norm.ppf(np.clip(i / n - dks, 0, 1))]
    assert [x is None for x in d["band_lower"]] == [x is None for x in lo]
    assert "Kolmogorov" in d["band_method"]


def test_qq_band_is_simultaneous_by_simulation():
    # under normal errors, the whole residual sequence stays inside the 95% band in at least 95% of
    # datasets (the band is conservative with estimated mean and SD, Lilliefors 1967): 200 datasets
    import dataclasses

    rng = np.random.default_rng(31)
    fr = pd.DataFrame({FA: np.repeat(["x", "y"], 30), FB: np.tile(["p", "q", "r"], 20), RESP: rng.normal(size=60)})
    obs = load(fr, response=RESP, factors=(FA, FB))
    out = 0
    for _ in range(200):
        o = dataclasses.replace(obs, y=rng.normal(size=60))
        out += plotdata.qq_points(fit_observations(o))["outside"] > 0
    assert out / 200 <= 0.06


def test_qq_band_detects_skewed_residuals():
    # invented: exponential errors (skewness 2) in 120 observations leave the band
    rng = np.random.default_rng(3)
    fr = pd.DataFrame({FA: np.repeat(["x", "y"], 60), FB: np.tile(["p", "q", "r"], 40),
                       RESP: rng.exponential(size=120)})
    d = plotdata.qq_points(fit_observations(load(fr, response=RESP, factors=(FA, FB))))
    assert d["outside"] >= 1 and len(d["rows_outside"]) == min(d["outside"], 50)


def test_sd_vs_n_and_spread(frame, fit):
    d = plotdata.sd_vs_n(fit)
    g = frame.groupby([FA, FB])[RESP]
    assert sorted(d["sd"]) == pytest.approx(sorted(g.std(ddof=1)), rel=1e-12)  # reference: pandas std(ddof=1)
    assert sorted(d["n"]) == sorted(g.size())
    s = plotdata.spread_vs_fitted(fit)
    assert len(s["points"]["fitted"]) == len(frame) and not s["thinned"]
    assert s["pooled_sd"] == pytest.approx(np.sqrt(fit.anova.ms_error))


def test_plotdata_from_diagnostics(fit):
    assert plotdata.loo_points([]) is None and plotdata.boxcox_profile([]) is None
    d = plotdata.loo_points([_fake_influence(fit)])
    assert len(d["rows"]) == len(fit.obs.rows) - 1 and d["alpha"] == 0.05
    b = plotdata.boxcox_profile([_fake_scale().to_dict()])  # dict form works too
    assert b["lambda_ci"] == [-0.28, 1.08]
    assert b["cutoff"] == pytest.approx(-stats.chi2.ppf(0.95, 1) / 2)


# --------------------------------------------------------------------------- files

def _is_png(path):
    with open(path, "rb") as fh:
        return fh.read(8) == PNG_MAGIC


def test_write_all_figures(tmp_path, fit):
    import matplotlib

    backend = matplotlib.get_backend()
    out = tmp_path / "report"
    paths = write_figures(figure_data(fit, [_fake_influence(fit), _fake_scale()]), out)
    assert [os.path.basename(p) for p in paths] == list(FIGURE_FILES.values())
    assert all(_is_png(p) and os.path.getsize(p) > 10_000 for p in paths)
    assert not [n for n in os.listdir(out) if n.startswith(".tmp-")]  # atomic writes leave no temp files
    assert matplotlib.get_backend() == backend  # the caller's backend is untouched


def test_figures_skip_gracefully(tmp_path, fit):
    bad = Diagnostic(id="influence", severity="clear", summary="s", values={"available": False})
    paths = write_figures(figure_data(fit, [bad]), tmp_path)
    names = [os.path.basename(p) for p in paths]
    assert FIGURE_FILES["loo"] not in names and FIGURE_FILES["boxcox"] not in names
    assert FIGURE_FILES["residual_qq"] in names


def test_summary_mode_figures(tmp_path, fit):
    paths = write_figures(figure_data(fit_cells(fit.cells), None), tmp_path)
    assert [os.path.basename(p) for p in paths] == [FIGURE_FILES[k] for k in ("cell_means", "spread", "sd_n")]
    assert all(_is_png(p) for p in paths)


def test_unusable_report_folder(tmp_path, fit):
    blocker = tmp_path / "a-file"
    blocker.write_text("x")
    with pytest.raises(OptionError, match="report folder"):
        write_figures(figure_data(fit, []), blocker / "sub")
