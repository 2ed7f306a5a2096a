"""Outliers, leave-one-out influence and fragility of the interaction test.

References: statsmodels (ols + anova_lm refits, OLSInfluence), scipy.stats.t.
Invented data (orchard trial from conftest, a seed-germination scenario below)
only where the check is a property of the method.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.anova import anova_lm
from statsmodels.stats.outliers_influence import OLSInfluence

from audit.design import cells_from_summary
from audit.diagnostics.influence import (
    FRAGILITY_MAX_STEPS,
    fragility,
    influence,
    loo_interaction,
    outliers,
)
from audit.errors import OptionError
from audit.fit import fit_cells, fit_observations
from audit.intake import load
from conftest import orchard_frame

FORMULA = "yield_kg ~ C(rootstock, Sum) * C(pruning, Sum)"
AB = "C(rootstock, Sum):C(pruning, Sum)"


def _fit(frame, response="yield_kg", factors=("rootstock", "pruning"), alpha=0.05):
    return fit_observations(load(frame, response=response, factors=factors), alpha=alpha)


def _ref_ab_p(frame, typ=2):
    # reference: statsmodels ols + anova_lm, the AB row
    model = smf.ols(FORMULA, data=frame).fit()
    return float(anova_lm(model, typ=typ).loc[AB, "PR(>F)"])


def _ref_nested_p(frame, y="yield_kg", a="rootstock", b="pruning"):
    """Interaction test as the comparison additive vs cell-means model, valid with
    empty cells (m - rank df). reference: statsmodels anova_lm(additive, full)."""
    f = frame.assign(_cell=frame[a].astype(str) + "|" + frame[b].astype(str))
    add = smf.ols(f"{y} ~ C({a}) + C({b})", data=f).fit()
    full = smf.ols(f"{y} ~ C(_cell)", data=f).fit()
    return float(anova_lm(add, full).iloc[1]["Pr(>F)"])


def _json_ok(d):
    json.dumps(d.to_dict(), allow_nan=False)


# ---------------------------------------------------------------- influence

def test_loo_p_equals_statsmodels_refit_every_row(unbalanced_3x4):
    frame = unbalanced_3x4
    fit = _fit(frame)
    d = influence(fit)
    assert d.id == "influence" and d.values["available"]
    got = np.array(d.values["loo_p"], dtype=float)
    assert d.values["rows"] == list(range(len(frame)))
    ref = np.array([_ref_ab_p(frame.drop(index=frame.index[i])) for i in range(len(frame))])
    # reference: statsmodels ols(y ~ C(a, Sum)*C(b, Sum)) + anova_lm(typ=2) AB p, refit per row
    assert_allclose(got, ref, rtol=1e-9)
    # the same AB p under typ=3 (every cell filled): spot-check a few rows
    for i in (0, 17, 40):
        # reference: statsmodels anova_lm(typ=3)
        assert_allclose(got[i], _ref_ab_p(frame.drop(index=frame.index[i]), typ=3), rtol=1e-9)
    assert_allclose(d.values["p_full"], _ref_ab_p(frame), rtol=1e-10)
    _json_ok(d)


def test_loo_with_empty_cells_and_singleton_cells():
    # a 3 x 3 with one empty cell and one cell of a single observation: deleting
    # that observation empties a second cell (df of the interaction stay m - rank)
    counts = np.array([[4, 6, 1], [5, 3, 7], [6, 4, 5]])
    frame = orchard_frame(counts, seed=7, empty={(1, 1)})
    fit = _fit(frame)
    d = influence(fit)
    got = np.array(d.values["loo_p"], dtype=float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = np.array([_ref_nested_p(frame.drop(index=frame.index[i])) for i in range(len(frame))])
    # reference: statsmodels anova_lm(additive, cell-means) on each reduced dataset
    assert_allclose(got, ref, rtol=1e-9)
    single_row = int(np.flatnonzero((frame.rootstock == "stock-A") & (frame.pruning == "prune-3"))[0])
    assert d.values["rows_emptying_a_cell"] == [single_row]


def test_loo_interaction_array_api_matches_refit_on_small_design():
    # direct array interface, 2 x 3, all cells >= 2
    rng = np.random.default_rng(3)
    counts = np.array([[3, 2, 5], [4, 6, 2]])
    cell = np.repeat(np.arange(6), counts.ravel())
    y = rng.normal(size=cell.size) + 0.8 * (cell == 4)
    F, p, df1, df2 = loo_interaction(y, cell, 2, 3)
    frame = pd.DataFrame({"yield_kg": y, "rootstock": (cell // 3).astype(str), "pruning": (cell % 3).astype(str)})
    for i in range(cell.size):
        sub = frame.drop(index=i)
        model = smf.ols(FORMULA, data=sub).fit()
        row = anova_lm(model, typ=2).loc[AB]
        # reference: statsmodels anova_lm(typ=2) F, df and p of the AB row
        assert_allclose([F[i], p[i]], [row["F"], row["PR(>F)"]], rtol=1e-9)
        assert df1[i] == row["df"] and df2[i] == model.df_resid


def _ref_ab_row_lean(y, a, b, drop):
    """F and p of the interaction by comparing two least-squares fits after
    deleting row ``drop``.  reference: numpy lstsq of the additive and the
    cell-means dummy models (the model comparison that statsmodels anova_lm
    performs), used where a formula refit of a 1,200-row design is too slow."""
    keep = np.ones(y.size, bool)
    keep[drop] = False
    yy, aa, bb = y[keep], a[keep], b[keep]
    J, K = int(a.max()) + 1, int(b.max()) + 1
    Xa = np.hstack([np.eye(J)[aa], np.eye(K)[bb][:, 1:]])
    Xf = np.eye(J * K)[aa * K + bb]
    Xf = Xf[:, Xf.any(axis=0)]
    ra = yy - Xa @ np.linalg.lstsq(Xa, yy, rcond=None)[0]
    rf = yy - Xf @ np.linalg.lstsq(Xf, yy, rcond=None)[0]
    df1 = Xf.shape[1] - np.linalg.matrix_rank(Xa)
    df2 = yy.size - Xf.shape[1]
    F = ((ra @ ra - rf @ rf) / df1) / ((rf @ rf) / df2)
    return F, float(stats.f.sf(F, df1, df2)), df1, df2


def test_loo_long_design_is_fast_and_exact():
    # an L x 2 design with n = 2 per cell (L = 300, 1,200 rows): one closed-form pass,
    # no solve per row or per cell (previously minutes)
    import time

    L = 300
    rng = np.random.default_rng(12)
    a = np.repeat(np.arange(L), 4)
    b = np.tile([0, 0, 1, 1], L)
    y = 50 + 0.2 * (a % 9) + 0.4 * b + 0.3 * (a % 5 == 0) * b + rng.normal(size=a.size)
    t0 = time.perf_counter()
    F, p, df1, df2 = loo_interaction(y, a * 2 + b, L, 2)
    assert time.perf_counter() - t0 < 2.0
    assert (df1 == L - 1).all() and (df2 == y.size - 1 - 2 * L).all()
    for i in (0, 3, 517, 1199):
        Fr, pr, d1, d2 = _ref_ab_row_lean(y, a, b, i)
        # reference: comparison of the additive and cell-means least-squares fits (numpy lstsq)
        assert_allclose([F[i], p[i]], [Fr, pr], rtol=1e-9)
        assert (df1[i], df2[i]) == (d1, d2)


def test_loo_when_one_cell_carries_the_interaction():
    # a gross error makes one cell carry nearly all of the interaction SS; deleting it
    # leaves a small Q that a short update formula would lose to cancellation
    rng = np.random.default_rng(5)
    counts = np.array([[3, 4, 3], [4, 3, 5], [3, 5, 4]])
    cell = np.repeat(np.arange(9), counts.ravel())
    a, b = cell // 3, cell % 3
    y = 10.0 + rng.normal(size=cell.size)
    y[np.flatnonzero(cell == 4)[1]] += 500.0
    F, p, df1, df2 = loo_interaction(y, cell, 3, 3)
    frame = pd.DataFrame({"yield_kg": y, "rootstock": a.astype(str), "pruning": b.astype(str)})
    for i in range(cell.size):
        row = anova_lm(smf.ols(FORMULA, data=frame.drop(index=i)).fit(), typ=2).loc[AB]
        # reference: statsmodels anova_lm(typ=2) AB row of each refit
        assert_allclose([F[i], p[i]], [row["F"], row["PR(>F)"]], rtol=1e-9)


# ----------------------------------------------------------------- outliers

def test_outliers_match_statsmodels_influence(unbalanced_3x4):
    frame = unbalanced_3x4.copy()
    frame.loc[5, "yield_kg"] += 25.0  # a gross error
    fit = _fit(frame)
    d = outliers(fit)
    model = smf.ols(FORMULA, data=frame).fit()
    infl = OLSInfluence(model)
    t_ref = np.asarray(infl.resid_studentized_external)
    cook_ref = np.asarray(infl.cooks_distance[0])
    N, m = len(frame), 12
    df = N - m - 1
    # reference: scipy.stats.t.isf, Bonferroni over N two-sided tests (Cook & Weisberg 1982)
    assert_allclose(d.values["cutoff"], stats.t.isf(0.05 / (2 * N), df), rtol=1e-12)
    flagged_ref = np.flatnonzero(np.abs(t_ref) > d.values["cutoff"])
    assert [f["row"] for f in d.values["flagged"]] == [5]
    assert list(flagged_ref) == [5]
    # reference: statsmodels OLSInfluence.resid_studentized_external
    assert_allclose(d.values["flagged"][0]["t"], t_ref[5], rtol=1e-9)
    assert_allclose(d.values["max_abs_t"], np.abs(t_ref).max(), rtol=1e-9)
    # reference: statsmodels OLSInfluence.cooks_distance
    assert_allclose(d.values["max_cooks"], cook_ref.max(), rtol=1e-9)
    n_ref = int((cook_ref > 4.0 / N).sum())  # 4/N flag: common practice
    assert d.values["n_cooks_flagged"] == n_ref
    got_cook = {c["row"]: c["cooks_d"] for c in d.values["cooks_flagged"]}
    for r, v in got_cook.items():
        assert_allclose(v, cook_ref[r], rtol=1e-9)
    assert d.severity == "concern"
    _json_ok(d)


def test_outliers_single_cells_have_no_residual():
    counts = np.array([[1, 4], [5, 6]])
    frame = orchard_frame(counts, seed=11)
    d = outliers(_fit(frame))
    single = int(np.flatnonzero((frame.rootstock == "stock-A") & (frame.pruning == "prune-1"))[0])
    assert d.values["rows_without_residual"] == [single]
    assert "leverage 1" in d.summary
    _json_ok(d)


# ---------------------------------------------------------------- fragility

def _germination_with_outlier(seed=5):
    """Invented: seedling height (mm) of a growth-chamber trial, light regime x
    substrate, null effects, cells of 20, 20, 20 and 3, one gross value planted
    in the small cell."""
    rng = np.random.default_rng(seed)
    counts = {("low", "peat"): 20, ("low", "sand"): 20, ("high", "peat"): 20, ("high", "sand"): 3}
    recs = []
    for (a, b), n in counts.items():
        for _ in range(n):
            recs.append((a, b, 50.0 + rng.normal(0.0, 2.0)))
    frame = pd.DataFrame(recs, columns=["light", "substrate", "height_mm"])
    frame = frame.sample(frac=1.0, random_state=seed).reset_index(drop=True)
    planted = int(np.flatnonzero((frame.light == "high") & (frame.substrate == "sand"))[1])
    clean = frame.copy()
    frame.loc[planted, "height_mm"] += 24.0
    return clean, frame, planted


def _ab_p(frame, y="height_mm", a="light", b="substrate"):
    # reference: statsmodels ols + anova_lm(typ=2), AB row
    model = smf.ols(f"{y} ~ C({a}, Sum) * C({b}, Sum)", data=frame).fit()
    return float(anova_lm(model, typ=2).loc[f"C({a}, Sum):C({b}, Sum)", "PR(>F)"])


def test_planted_outlier_flips_with_one_deletion():
    clean, frame, planted = _germination_with_outlier()
    # preconditions, from the reference: null without the outlier, significant with it
    assert _ab_p(clean) > 0.05
    assert _ab_p(frame) < 0.05
    fit = _fit(frame, response="height_mm", factors=("light", "substrate"))
    d = fragility(fit)
    assert d.values["deletions_to_flip"] == 1
    assert d.values["rows"] == [planted]
    assert d.severity == "critical"
    # the p after the deletion equals a statsmodels refit without that row
    assert_allclose(d.values["p_path"][0], _ab_p(frame.drop(index=planted)), rtol=1e-9)
    inf = influence(fit)
    assert inf.severity == "critical" and planted in inf.values["flipping_rows"]
    assert inf.values["most_influential"][0]["row"] == planted
    out = outliers(fit)
    assert [f["row"] for f in out.values["flagged"]] == [planted]
    _json_ok(d)


def test_fragility_path_matches_refits_and_cap():
    # a modest interaction in an unbalanced 2 x 3 (invented orchard data)
    counts = np.array([[6, 9, 4], [8, 5, 7]])
    frame = orchard_frame(counts, seed=2)
    fit = _fit(frame)
    d = fragility(fit, max_steps=4)
    v = d.values
    assert v["max_steps"] == 4
    assert len(v["rows_tried"]) <= 4 and len(v["p_path"]) == len(v["rows_tried"])
    # every p on the greedy path equals a statsmodels refit after those deletions
    for k in range(len(v["rows_tried"])):
        sub = frame.drop(index=v["rows_tried"][: k + 1])
        assert_allclose(v["p_path"][k], _ref_ab_p(sub), rtol=1e-9)  # reference: statsmodels anova_lm
    if v["deletions_to_flip"] is None:
        assert v["rows"] == [] and d.severity == "clear"
    else:
        assert v["rows"] == v["rows_tried"]
    # greedy first step: the deletion with the largest leave-one-out p (significant case)
    inf = influence(fit)
    p_loo = np.array(inf.values["loo_p"], dtype=float)
    if v["p_full"] < 0.05:
        assert v["rows_tried"][0] == inf.values["rows"][int(np.argmax(p_loo))]
    else:
        assert v["rows_tried"][0] == inf.values["rows"][int(np.argmin(p_loo))]
    _json_ok(d)


def test_strong_interaction_not_fragile():
    counts = np.full((3, 3), 25)
    frame = orchard_frame(counts, seed=4)
    fit = _fit(frame)
    assert fit.anova.tables["II"].row("AB").p < 1e-4
    d = fragility(fit, max_steps=3)
    assert d.values["deletions_to_flip"] is None
    assert d.values["rows"] == [] and len(d.values["rows_tried"]) == 3
    assert d.severity == "clear"
    assert FRAGILITY_MAX_STEPS == 20


def test_fragility_rejects_bad_cap(unbalanced_3x4):
    fit = _fit(unbalanced_3x4)
    with pytest.raises(OptionError):
        fragility(fit, max_steps=0)
    with pytest.raises(OptionError):
        fragility(fit, max_steps="many")


# ------------------------------------------------------------- summary mode

def test_summary_mode_is_a_note():
    table = pd.DataFrame({"a": ["x", "x", "y", "y"], "b": ["p", "q", "p", "q"],
                          "mean": [1.0, 2.0, 3.0, 5.0], "sd": [1.0, 1.2, 0.9, 1.1], "n": [5, 6, 7, 5]})
    fit = fit_cells(cells_from_summary(table, factors=("a", "b")))
    for fn in (outliers, influence, fragility):
        d = fn(fit)
        assert d.severity == "not-run" and d.values["available"] is False
        assert "raw observations" in d.summary
        _json_ok(d)


def test_tiny_design_reports_none_not_nan():
    # one error df: deleting from the only replicated cell leaves no error term
    frame = pd.DataFrame({"y": [1.0, 2.0, 3.0, 4.0, 5.0, 6.5, 7.0], "a": list("xxxyyyy"), "b": list("pqrpqrr")})
    fit = _fit(frame, response="y", factors=("a", "b"))
    d = influence(fit)
    assert d.values["loo_p"][5] is None and d.values["loo_p"][6] is None
    assert "cannot be formed after deletion" in d.summary
    f = fragility(fit)
    assert f.values["stopped"] == "no testable deletion left" and f.values["deletions_to_flip"] is None
    assert outliers(fit).severity == "minor"
    for x in (d, f, outliers(fit)):
        _json_ok(x)


# ------------------------------------------------- outliers judged within their own cell

def _wide_cell_frame(shift_in_wide, shift_in_narrow=0.0, seed=4):
    """Invented: fruit set (%) of a pollination trial, 2 x 2 cells of 20; one cell (open, hand) has an SD
    of 6, the others 1.  A value 2.6 cell SDs out in the wide cell is genuine there but far out against
    the pooled SD."""
    rng = np.random.default_rng(seed)
    recs = []
    for a in ("bagged", "open"):
        for b in ("none", "hand"):
            sd = 6.0 if (a, b) == ("open", "hand") else 1.0
            z = rng.normal(size=20)
            z = (z - z.mean()) / z.std(ddof=1)
            for v in 40.0 + sd * z:
                recs.append((a, b, float(v)))
    frame = pd.DataFrame(recs, columns=["bagging", "hand_pollination", "fruit_set"])
    wide = int(np.flatnonzero((frame.bagging == "open") & (frame.hand_pollination == "hand"))[0])
    narrow = int(np.flatnonzero((frame.bagging == "bagged") & (frame.hand_pollination == "none"))[0])
    frame.loc[wide, "fruit_set"] = 40.0 + shift_in_wide
    frame.loc[narrow, "fruit_set"] = frame.loc[narrow, "fruit_set"] + shift_in_narrow
    return frame, wide, narrow


def _within_cell_t(frame, row):
    # reference: statsmodels OLSInfluence.resid_studentized_external of an intercept-only model on the
    # row's own cell (its studentized deleted residual against the cell's SD without it)
    a, b = frame.loc[row, "bagging"], frame.loc[row, "hand_pollination"]
    sub = frame[(frame.bagging == a) & (frame.hand_pollination == b)]
    model = smf.ols("fruit_set ~ 1", data=sub).fit()
    return float(np.asarray(OLSInfluence(model).resid_studentized_external)[list(sub.index).index(row)])


def test_outlier_of_a_wide_cell_is_explained_by_its_own_spread():
    frame, wide, _ = _wide_cell_frame(shift_in_wide=16.0)
    d = outliers(_fit(frame, response="fruit_set", factors=("bagging", "hand_pollination")))
    fl = {f["row"]: f for f in d.values["flagged"]}
    assert wide in fl and len(fl) == 1
    f = fl[wide]
    assert_allclose(f["within_cell_t"], _within_cell_t(frame, wide), rtol=1e-9)
    # reference: scipy.stats.t.isf, Bonferroni over N on the cell's n - 2 df
    assert_allclose(f["within_cell_cutoff"], stats.t.isf(0.05 / (2 * len(frame)), 20 - 2), rtol=1e-12)
    assert f["explained_by_cell"] is True and f["cell_sd_ratio"] > 1.5
    assert "its cell's own spread explains it" in d.summary and d.severity == "minor"
    _json_ok(d)


def test_outlier_extreme_in_its_own_cell_still_warns():
    frame, wide, narrow = _wide_cell_frame(shift_in_wide=0.0, shift_in_narrow=12.0)
    d = outliers(_fit(frame, response="fruit_set", factors=("bagging", "hand_pollination")))
    fl = {f["row"]: f for f in d.values["flagged"]}
    assert narrow in fl and fl[narrow]["explained_by_cell"] is False
    assert_allclose(fl[narrow]["within_cell_t"], _within_cell_t(frame, narrow), rtol=1e-9)
    assert d.severity == "concern" and f"row {narrow} stands out within its own cell too" in d.summary
