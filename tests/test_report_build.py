"""The report model: built from the findings, decides nothing, repeats nothing.

The interaction F and p the report shows are checked against statsmodels' anova_lm
(reference: statsmodels, an independent general-purpose library); the rest checks the
layout promises (common practice: one p style, every abbreviation explained).
"""

from __future__ import annotations

import os
import re

import numpy as np
import pandas as pd
import pytest

import audit
from audit.report import build_report
from audit.report.build import FIGURE_CAPTIONS, figure_caption
from audit.render.terminal import render_terminal
from audit.render.text import render_report_text

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FIXTURE = os.path.join(ROOT, "fixtures", "bakery_loaf_volume.csv")


@pytest.fixture(scope="module")
def bakery():
    return audit.check(FIXTURE, response="loaf_volume_ml", factors=("flour", "hydration"), resamples=199,
                       seed=1, calibration=200)


def test_to_frame_is_tidy_and_matches_statsmodels(bakery):
    smf = pytest.importorskip("statsmodels.formula.api")
    from statsmodels.stats.anova import anova_lm

    fr = bakery.to_frame()
    assert tuple(fr.columns) == bakery.FRAME_COLUMNS
    assert len(fr) == len(bakery.methods) and set(fr["effect"]) == {"A", "B", "AB"}
    row = fr[(fr.method == "classical-f") & (fr.effect == "AB")].iloc[0]
    d = pd.read_csv(FIXTURE).dropna(subset=["loaf_volume_ml"])
    # reference: statsmodels anova_lm; the interaction row is the same under every SS type
    ref = anova_lm(smf.ols("loaf_volume_ml ~ C(flour) * C(hydration)", data=d).fit(), typ=2)
    ab = ref.loc["C(flour):C(hydration)"]
    assert row["statistic"] == pytest.approx(ab["F"], rel=1e-9)
    assert row["p"] == pytest.approx(ab["PR(>F)"], rel=1e-7)
    assert row["df1"] == 4 and row["df2"] == 70 and 0 < row["partial_eta_sq"] < 1
    assert fr["trusted"].dtype == "boolean" and not fr.loc[fr.method == "rank-transform", "trusted"].any()
    # and the report prints that F in APA style
    text = bakery.to_text()
    assert f"F(4, 70) = {ab['F']:.2f}, p < .001" in text


def test_one_p_style_and_T_over_c_explained(bakery):
    text = bakery.to_text()
    # no p-value printed as 0.0300, <.0001 or 1.5e-05 anywhere in the report
    assert not re.search(r"\bp\s*(=|<)?\s*0\.\d", text), re.search(r".{40}\bp\s*(=|<)?\s*0\.\d.{20}", text)
    assert not re.search(r"\bp\s*(=|<)?\s*\d(\.\d+)?e-\d", text)
    assert "<.0001" not in text
    assert "T/c: the Welch-James statistic" in text
    assert "1/(B + 1)" in text


def test_the_flip_fact_is_stated_once(bakery):
    rep = build_report(bakery)
    term = render_terminal(rep)
    # the deletions that flip the decision appear once among the checks (fragility), and the
    # old extra fragility line under the checks is gone
    assert term.count("deletions flip") == 1
    full = render_report_text(rep)
    assert "Fragility: deleting" not in full and full.count("flips the interaction decision") <= 1


def test_captions_for_known_and_unknown_figures(bakery):
    rep = build_report(bakery, figures={"methods_p": "methods-p.png", "cell_means": "cell-means.png",
                                        "future_plot": "future-plot.png"})
    keys = [f.key for f in rep.figures]
    assert set(keys) == {"methods_p", "cell_means", "future_plot"}
    assert rep.section("claim").blocks[-1].key == "methods_p"
    assert figure_caption("future_plot") == "Figure: future plot."
    assert all(figure_caption(k) == v for k, v in FIGURE_CAPTIONS.items())
    assert any(s.id == "more-figures" for s in rep.sections)


def test_renderers_never_compute(bakery):
    # every number a renderer shows comes formatted from the model: the model's strings are all
    # the renderers get (a smoke check that the model holds only strings where it shows text)
    rep = build_report(bakery)
    for r in rep.methods:
        assert all(isinstance(getattr(r, k), str) for k in ("statistic", "df", "p", "p_short", "agrees"))


def test_summary_mode_and_no_methods_render():
    t = pd.DataFrame({"flour": ["w", "w", "s", "s"], "hyd": ["65", "80", "65", "80"],
                      "mean": [1450, 1640, 1420, 1580], "sd": [60, 40, 65, 40], "n": [8, 7, 9, 12]})
    f = audit.check_summary(t, factors=("flour", "hyd"), response="volume")
    rep = build_report(f)
    assert "not run" in render_terminal(rep)
    d = pd.DataFrame({"a": np.repeat(["x", "y"], 6), "b": np.tile(["u", "v"], 6),
                      "y": np.arange(12, dtype=float) % 5})
    g = audit.check(d, response="y", factors=("a", "b"), methods=False, diagnostics=False)
    out = render_terminal(build_report(g))
    assert "Verdict: none" in out and g.to_frame().empty
