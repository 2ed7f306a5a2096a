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
from audit.render.figures import FIGURE_FILES, figure_file, write_figures
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


def _is_svg(path):
    # a well-formed SVG 1.1 document (W3C SVG 1.1: root element <svg> in the SVG namespace)
    import xml.etree.ElementTree as ET

    return ET.parse(path).getroot().tag == "{http://www.w3.org/2000/svg}svg"


def test_write_all_figures(tmp_path, fit):
    import matplotlib

    backend = matplotlib.get_backend()
    out = tmp_path / "report"
    paths = write_figures(figure_data(fit, [_fake_influence(fit), _fake_scale()]), out)
    # without method results there is no method p-value figure; every other figure is written
    assert [os.path.basename(p) for p in paths] == [v for k, v in FIGURE_FILES.items() if k != "methods_p"]
    assert all(_is_svg(p) and os.path.getsize(p) > 10_000 for p in paths)
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
    assert all(_is_svg(p) for p in paths)


def test_unusable_report_folder(tmp_path, fit):
    blocker = tmp_path / "a-file"
    blocker.write_text("x")
    with pytest.raises(OptionError, match="report folder"):
        write_figures(figure_data(fit, []), blocker / "sub")


# --------------------------------------------------------------------------- the figures' content

DEMO = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "fixtures", "demo")


@pytest.fixture(scope="module")
def reading():
    # invented demo data (fixtures/make_demo.py): one row carries the interaction
    from audit.api import check

    return check(os.path.join(DEMO, "reading_programme.csv"), response="score_gain", factors=("programme", "term"),
                 resamples=199, seed=3, figures=True, calibration=0)


def _capture(monkeypatch):
    from audit.render import figures as F

    figs = {}

    def keep(fig, name):
        figs[name] = fig
        return b""

    monkeypatch.setattr(F, "_render", keep)
    return figs


def test_every_figure_written_from_findings(tmp_path, reading):
    paths = write_figures(reading.figure_data, tmp_path)
    assert [os.path.basename(p) for p in paths] == list(FIGURE_FILES.values())
    assert all(_is_svg(p) for p in paths)


def test_png_on_request_and_same_files_twice(tmp_path, reading):
    png = write_figures(reading.figure_data, tmp_path / "png", fmt="png")
    assert [os.path.basename(p) for p in png] == [figure_file(k, "png") for k in FIGURE_FILES]
    assert all(_is_png(p) for p in png)
    # same data, same bytes (no date in the SVG metadata, fixed ids): reports can be diffed
    a = write_figures(reading.figure_data, tmp_path / "a")
    b = write_figures(reading.figure_data, tmp_path / "b")
    assert [open(p, "rb").read() for p in a] == [open(p, "rb").read() for p in b]
    with pytest.raises(OptionError, match="figure format: expected one of svg, png, found 'gif'"):
        write_figures(reading.figure_data, tmp_path / "c", fmt="gif")


def test_user_strings_never_become_svg_markup(tmp_path, reading):
    # strings are SVG text elements whose content is escaped XML character data: a hostile
    # name stays text (W3C XML 1.0 section 2.4; W3C SVG 1.1 'text' element)
    import copy
    import xml.etree.ElementTree as ET

    evil = "--><script>alert(1)</script><!--"
    fd = copy.deepcopy(reading.figure_data)
    fd["response"] = evil
    for o in fd["cell_means"]["orientations"]:
        o["x_levels"] = [evil + str(i) for i, _ in enumerate(o["x_levels"])]
    paths = write_figures(fd, tmp_path)
    for p in paths:
        root = ET.parse(p).getroot()  # well-formed
        assert not [e for e in root.iter() if e.tag.endswith("script")]
        assert b"<script" not in open(p, "rb").read()
    texts = "".join("".join(e.itertext()) for p in paths for e in ET.parse(p).getroot().iter()
                    if e.tag.endswith("text"))
    assert evil in texts  # shown to the reader as it is


def test_worker_processes_draw_the_same_bytes(tmp_path, reading):
    from audit.render.workers import FigureWorkers

    serial = write_figures(reading.figure_data, tmp_path / "serial")
    with FigureWorkers("svg", workers=2) as w:
        w.early({k: reading.figure_data[k] for k in ("response", "alpha", "row_kind", "cell_means", "spread",
                                                     "sd_n")})
        parallel = write_figures(reading.figure_data, tmp_path / "parallel", workers=w)
    assert [os.path.basename(p) for p in parallel] == [os.path.basename(p) for p in serial]
    assert [open(p, "rb").read() for p in parallel] == [open(p, "rb").read() for p in serial]


def test_method_p_data_come_from_the_findings(reading):
    d = reading.figure_data["methods_p"]
    ab = [(m, t) for m, t in zip(reading.methods, reading.judgement.trust) if m.effect == "AB"]
    assert [r["method"] for r in d["rows"]] == [m.id for m, _ in ab]
    for r, (m, t) in zip(d["rows"], ab):
        assert r["p"] == m.p and r["trusted"] is t.trusted and r["reason"] == t.reason
        assert r["p_interval"] == (list(m.p_interval) if m.p_interval else None)
        assert r["resamples"] == m.resamples
    assert any(r["p_interval"] for r in d["rows"]) and any(r["trusted"] is False for r in d["rows"])


def test_method_p_figure_marks_trust_by_label_and_shape(tmp_path, reading, monkeypatch):
    figs = _capture(monkeypatch)
    write_figures(reading.figure_data, tmp_path)
    ax = figs[FIGURE_FILES["methods_p"]].axes[0]
    ticks = [t.get_text() for t in ax.get_yticklabels()]
    for r, t in zip(reading.figure_data["methods_p"]["rows"], ticks):
        assert r["method"] in t and ("NOT trusted" in t) == (r["trusted"] is False)
    labels = figs[FIGURE_FILES["methods_p"]].legends[0].get_texts()
    words = " ".join(t.get_text() for t in labels)
    assert "open triangle" in words and "filled circle" in words and "Monte Carlo" in words and "alpha" in words
    assert ax.get_xscale() == "log"


def test_flipping_rows_stand_out_and_are_labelled(tmp_path, reading, monkeypatch):
    infl = reading.diagnostic("influence").values
    d = reading.figure_data["loo"]
    assert d["flipping_rows"] == infl["flipping_rows"] and d["n_flipping"] == infl["n_flipping"] > 0
    figs = _capture(monkeypatch)
    write_figures(reading.figure_data, tmp_path)
    fig = figs[FIGURE_FILES["loo"]]
    ax = fig.axes[0]
    labels = {t.get_text() for t in ax.texts} | {t.get_text() for t in fig.texts}
    text = " ".join(labels)
    for r in d["flipping_rows"]:  # each flipping row's line number is written beside its point (or listed)
        assert str(r) in labels or str(r) in text
    legend = " ".join(t.get_text() for t in fig.legends[0].get_texts())
    assert "FLIPS" in legend and f"({d['n_flipping']} of {d['n']})" in legend
    # the flagged points have their own marker (a larger diamond), ordinary rows a small grey circle
    sizes = sorted({float(c.get_sizes()[0]) for c in ax.collections if len(c.get_offsets())})
    assert len(sizes) == 2


def _text_boxes(fig, ax):
    fig.canvas.draw()
    r = fig.canvas.get_renderer()
    return [t.get_window_extent(r) for t in ax.texts]


def test_place_labels_never_overlap_in_a_crowded_6x5_design():
    from audit.render.figures import place_labels

    rng = np.random.default_rng(11)  # invented: 30 cells crowded into a small region, long labels
    anchors = [(float(x), float(y)) for x, y in zip(rng.uniform(200, 420, 30), rng.uniform(150, 300, 30))]
    sizes = [(float(w), 12.0) for w in rng.uniform(40, 110, 30)]
    bounds = (60.0, 50.0, 700.0, 460.0)
    avoid = [(x - 3, y - 3, x + 3, y + 3) for x, y in anchors]
    boxes = place_labels(anchors, sizes, bounds, avoid=avoid)
    placed = [b for b in boxes if b is not None]
    assert len(placed) >= 15
    for i, a in enumerate(placed):
        assert bounds[0] <= a[0] and a[2] <= bounds[2] and bounds[1] <= a[1] and a[3] <= bounds[3]
        assert not any(not (a[2] <= v[0] or v[2] <= a[0] or a[3] <= v[1] or v[3] <= a[1]) for v in avoid)
        for b in placed[i + 1:]:
            assert a[2] + 2 <= b[0] or b[2] + 2 <= a[0] or a[3] + 2 <= b[1] or b[3] + 2 <= a[1]
    # deterministic: the same input gives the same boxes
    assert place_labels(anchors, sizes, bounds, avoid=avoid) == boxes


def test_cell_labels_do_not_overlap_in_the_drawn_figures(tmp_path, monkeypatch):
    # invented 6 x 5 design whose cells have nearly equal means and SDs (a crowded plot)
    rng = np.random.default_rng(2)
    fr = pd.DataFrame({FA: np.repeat([f"stock-{i}" for i in range(6)], 25),
                       FB: np.tile([f"prune-{k}" for k in range(5)], 30)})
    fr[RESP] = 50 + rng.normal(0, 1, len(fr))
    f = fit_observations(load(fr, response=RESP, factors=(FA, FB)))
    figs = _capture(monkeypatch)
    write_figures(figure_data(f, []), tmp_path)
    for name, which in ((FIGURE_FILES["spread"], -1), (FIGURE_FILES["sd_n"], 0)):
        fig = figs[name]
        ax = fig.axes[which]
        boxes = _text_boxes(fig, ax)
        assert boxes
        for i, a in enumerate(boxes):
            for b in boxes[i + 1:]:
                assert not a.overlaps(b), name
        shown = {t.get_text() for t in ax.texts}
        listed = " ".join(t.get_text() for t in fig.texts)
        assert len(shown) + listed.count(" x ") >= min(30, len(shown) + 1) or "more" in listed


def test_cell_means_keep_one_colour_set_per_factor(tmp_path, fit, monkeypatch):
    import matplotlib.colors as mc

    figs = _capture(monkeypatch)
    write_figures(figure_data(fit, []), tmp_path)
    ax1, ax2 = figs[FIGURE_FILES["cell_means"]].axes[:2]
    c1 = {mc.to_hex(l.get_color()) for l in ax1.get_lines() if l.get_marker() not in (None, "None", "")}
    c2 = {mc.to_hex(l.get_color()) for l in ax2.get_lines() if l.get_marker() not in (None, "None", "")}
    assert c1 and c2 and not (c1 & c2)  # the two factors never share a colour


def test_qq_counts_in_legend_and_normality_grade(tmp_path, monkeypatch):
    # invented: exponential errors leave the band; the legend counts the points outside
    rng = np.random.default_rng(3)
    fr = pd.DataFrame({FA: np.repeat(["x", "y"], 60), FB: np.tile(["p", "q", "r"], 40),
                       RESP: rng.exponential(size=120)})
    from audit.diagnostics import run_diagnostics

    f = fit_observations(load(fr, response=RESP, factors=(FA, FB)))
    fd = figure_data(f, run_diagnostics(f))
    assert fd["qq"]["check"]["grade"] in ("clear", "minor", "concern", "critical")
    figs = _capture(monkeypatch)
    write_figures(fd, tmp_path)
    fig = figs[FIGURE_FILES["residual_qq"]]
    legend = " ".join(t.get_text() for t in fig.axes[0].get_legend().get_texts())
    n, k = fd["qq"]["n"], fd["qq"]["outside"]
    assert f"OUTSIDE the band ({k} of {n})" in legend and f"inside the band ({n - k} of {n})" in legend
    assert "Normality check grade" in " ".join(t.get_text() for t in fig.texts)


def test_boxcox_p_curve_matches_statsmodels(reading):
    smf = pytest.importorskip("statsmodels.formula.api")
    import statsmodels.api as sm

    d = reading.figure_data["boxcox"]
    pc = d["p_curve"]
    lo, hi = d["window"]
    assert lo <= min(0.0, d["lambda_ci"][0]) and hi >= max(1.0, d["lambda_ci"][1])
    fr = pd.read_csv(os.path.join(DEMO, "reading_programme.csv"))
    for lam in (0.0, 1.0, 0.5):
        if not lo <= lam <= hi:
            continue
        y = fr["score_gain"].to_numpy(float)
        z = np.log(y) if lam == 0 else (y ** lam - 1) / lam
        g = fr.assign(z=z)
        # reference: statsmodels anova_lm (Type II) of the transformed response
        ref = sm.stats.anova_lm(smf.ols("z ~ C(programme) * C(term)", data=g).fit(), typ=2)
        p_ref = ref.loc["C(programme):C(term)", "PR(>F)"]
        i = int(np.argmin(np.abs(np.array(pc["lambda"]) - lam)))
        if abs(pc["lambda"][i] - lam) < 1e-12:
            assert pc["p"][i] == pytest.approx(p_ref, rel=1e-8)
    # the scale diagnostic's decision change (p crosses alpha) is among the crossings found
    alpha = reading.alpha
    for c in pc["crossings"]:
        assert lo <= c <= hi
    ps = np.array(pc["p"])
    assert bool(pc["crossings"]) == bool(((ps < alpha) != (ps[0] < alpha)).any())
