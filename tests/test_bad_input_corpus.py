"""Bad-input corpus: odd and wrong inputs a new user gives the command line.

Every case is generated into ``tmp_path`` by a small function below.  For each
case the CLI must either

* exit 0, 1 or 3 (the verdict's status) with a correct result: strict JSON (RFC 8259, no string where a number
  is promised) and the interaction F / p checked against an outside reference
  named beside the check (statsmodels ``anova_lm`` on the same data read
  independently with pandas, or an explicit least-squares model comparison), or
* exit 2 with exactly one line on stderr (``twoway-audit: error: ...``) holding
  the words that name the cause, and no traceback;

never an uncaught error, never a traceback, and the input file's bytes and mtime never
change.  Most cases run in-process through ``audit.cli.main`` (an uncaught
exception there is a traceback); a handful also run as real subprocesses.

Invented scenario: a kiln trial, glaze thickness (micrometres) by clay body
(factor A) x firing schedule (factor B).  Expected behaviours are common
practice for command-line tools unless a source is named.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import os
import subprocess
import sys
import time
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd
import pytest

from audit.cli import main
from audit.options import MAX_RESAMPLES

from conftest import strict_json_check, strict_json_loads

smf = pytest.importorskip("statsmodels.formula.api")
anova_lm = pytest.importorskip("statsmodels.stats.anova").anova_lm

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

CLAYS = ["stoneware", "porcelain", "earthenware"]
FIRINGS = ["slow", "fast"]
#: unbalanced, not proportional: Types I, II and III differ
COUNTS = [[4, 3], [2, 5], [3, 4]]
Y, A, B = "thickness_um", "clay", "firing"
FAST = ["--resamples", "0", "--no-diagnostics"]


def base_frame(clays=CLAYS, firings=FIRINGS, counts=COUNTS, *, seed=7) -> pd.DataFrame:
    """The kiln trial with an interaction; values rounded to 0.001 as written to text."""
    rng = np.random.default_rng(seed)
    rows = []
    for j, c in enumerate(clays):
        for k, f in enumerate(firings):
            mu = 120.0 + 6.0 * j - 4.0 * k + 5.0 * (j == 1) * (k == 1)
            for _ in range(counts[j][k]):
                rows.append((c, f, round(mu + rng.normal(0.0, 2.0), 3)))
    order = rng.permutation(len(rows))
    return pd.DataFrame([rows[i] for i in order], columns=[A, B, Y])


def to_csv(frame: pd.DataFrame, path, *, sep=",", fmt=repr) -> str:
    lines = [sep.join(frame.columns)]
    for r in frame.itertuples(index=False):
        lines.append(sep.join(fmt(v) if isinstance(v, float) else str(v) for v in r))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


# ---------------------------------------------------------------------------
# references
# ---------------------------------------------------------------------------

def sm_interaction(frame, y=Y, a=A, b=B):
    """reference: statsmodels ols('y ~ C(a) * C(b)') + anova_lm(typ=2), interaction row (F, p)."""
    d = pd.DataFrame({"y": frame[y].astype(float).to_numpy(), "fa": frame[a].astype(str).to_numpy(),
                      "fb": frame[b].astype(str).to_numpy()})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = anova_lm(smf.ols("y ~ C(fa) * C(fb)", data=d).fit(), typ=2)
    return float(t.loc["C(fa):C(fb)", "F"]), float(t.loc["C(fa):C(fb)", "PR(>F)"])


def lstsq_interaction(frame, y=Y, a=A, b=B):
    """reference: explicit model comparison with numpy.linalg.lstsq, additive model against the
    cell-means model over the filled cells (valid with empty cells); returns (F, df1, df2)."""
    yy = frame[y].to_numpy(float)
    fa = pd.Categorical(frame[a].astype(str))
    fb = pd.Categorical(frame[b].astype(str))
    cell = pd.Categorical([f"{u}|{v}" for u, v in zip(fa, fb)])
    full = np.eye(len(cell.categories))[cell.codes]
    add = np.column_stack([np.ones(len(yy)), np.eye(len(fa.categories))[fa.codes][:, 1:],
                           np.eye(len(fb.categories))[fb.codes][:, 1:]])

    def rss(X):
        beta = np.linalg.lstsq(X, yy, rcond=None)[0]
        return float(np.sum((yy - X @ beta) ** 2)), np.linalg.matrix_rank(X)

    r_full, p_full = rss(full)
    r_add, p_add = rss(add)
    df1, df2 = p_full - p_add, len(yy) - p_full
    return ((r_add - r_full) / df1) / (r_full / df2), df1, df2


def anova_row(d, effect="AB", typ="II"):
    return next(r for r in d["anova"][typ] if r["effect"] == effect)


def assert_interaction_matches(d, frame, **kw):
    F, p = sm_interaction(frame, **kw)
    row = anova_row(d)
    assert row["F"] == pytest.approx(F, rel=1e-9), (row["F"], F)
    assert row["p"] == pytest.approx(p, rel=1e-9, abs=1e-15), (row["p"], p)


# ---------------------------------------------------------------------------
# cases
# ---------------------------------------------------------------------------

@dataclass
class Case:
    argv: list[str]
    expect: str                         # "ok", "error" or "either" (behaviour recorded, not yet decided)
    fragments: tuple[str, ...] = ()     # words the one-line error must hold
    check: Callable | None = None       # check(json_dict or stdout text) for exit 0
    inputs: list[str] = field(default_factory=list)   # files whose bytes and mtime must not change
    json_out: bool = True               # exit-0 stdout is the findings JSON
    max_seconds: float | None = None


def check_args(data, *extra, response=Y, factors=(A, B), fast=True, json_out=True):
    argv = ["check", str(data), "--response", response, "--factors", *factors]
    if fast:
        argv += FAST
    if json_out:
        argv += ["--json", "-"]
    return argv + list(extra)


def ok_vs_reference(frame, **kw):
    return lambda d: assert_interaction_matches(d, frame, **kw)


CASES: dict[str, Callable] = {}


def case(name):
    def deco(fn):
        CASES[name] = fn
        return fn
    return deco


# --- outputs never touch an input --------------------------------------------------------------

@case("json onto the input file")
def _(t):
    p = to_csv(base_frame(), t / "v.csv")
    return Case(check_args(p, json_out=False) + ["--json", p], "error", ("--json",), inputs=[p])


@case("report folder holding the input")
def _(t):
    (t / "rdir").mkdir()
    p = to_csv(base_frame(), t / "rdir" / "report.txt")
    return Case(check_args(p, json_out=False) + ["--report", str(t / "rdir")], "error", ("--report",), inputs=[p])


@case("json through a symlink to the input")
def _(t):
    p = to_csv(base_frame(), t / "v.csv")
    os.symlink(p, t / "out.json")
    return Case(check_args(p, json_out=False) + ["--json", str(t / "out.json")], "error", ("--json",), inputs=[p])


@case("json onto an existing folder")
def _(t):
    p = to_csv(base_frame(), t / "v.csv")
    (t / "somedir").mkdir()

    return Case(check_args(p, json_out=False) + ["--json", str(t / "somedir")], "error", ("somedir",), inputs=[p])


@case("report into a folder of other files")
def _(t):
    p = to_csv(base_frame(), t / "v.csv")
    (t / "mine").mkdir()
    (t / "mine" / "thesis.tex").write_text("keep me\n")
    return Case(check_args(p, json_out=False) + ["--report", str(t / "mine")], "error", ("mine",),
                inputs=[p, str(t / "mine" / "thesis.tex")])


# --- missing values and level names --------------------------------------------------------------

def _levels_like_missing(t):
    f = base_frame(clays=["None", "NA", "High"])
    p = to_csv(f, t / "na.csv")
    # reference frame read independently: pandas with no NA tokens (every text is data)
    ref = pd.read_csv(p, keep_default_na=False)
    assert len(ref) == len(f)

    def chk(d):
        assert d["design"]["n"] == len(f) and d["design"]["dropped_rows"]["total"] == 0
        assert d["design"]["levels"][A] == ["High", "None", "NA"]
        assert_interaction_matches(d, ref)
    return p, chk


@case("levels named None and NA")
def _(t):
    p, chk = _levels_like_missing(t)
    return Case(check_args(p, "--levels", f"{A}=High,None,NA"), "ok", check=chk, inputs=[p])


@case("quoted newline then a bad response: the file line is reported")
def _(t):
    f = base_frame()
    f["remark"] = "none"
    f.loc[2, "remark"] = "crazing on\nthe rim\nof two pots"
    f[Y] = f[Y].map(repr)
    f.loc[9, Y] = "twelve"
    p = t / "q.csv"
    f.to_csv(p, index=False)
    # reference: Python's csv module, a record starts on the line after the previous record ended
    text = p.read_text()
    reader = csv.reader(io.StringIO(text, newline=""))
    starts, prev = [], 0
    for _row in reader:
        starts.append(prev + 1)
        prev = reader.line_num
    line = starts[10]          # data row 9 is record 10 (after the header)
    assert line == 10 + 1 + 2  # two extra physical lines from the quoted remark
    return Case(check_args(p), "error", ("'twelve'", f"line {line}"), inputs=[str(p)])


@case("quoted newline then a blank response: dropped row is the file line")
def _(t):
    f = base_frame()
    f["remark"] = "none"
    f.loc[1, "remark"] = "glaze ran\ninto the kiln shelf"
    f[Y] = f[Y].map(repr)
    f.loc[12, Y] = ""
    p = t / "q.csv"
    f.to_csv(p, index=False)
    text = p.read_text()
    reader = csv.reader(io.StringIO(text, newline=""))  # reference: Python's csv module
    starts, prev = [], 0
    for _row in reader:
        starts.append(prev + 1)
        prev = reader.line_num
    kept = pd.read_csv(p).dropna(subset=[Y])

    def chk(d):
        assert d["design"]["dropped_rows"]["rows"] == [starts[13]] == [15]
        assert_interaction_matches(d, kept)
    return Case(check_args(p), "ok", check=chk, inputs=[str(p)])


@case("response missing tokens are dropped and counted")
def _(t):
    f = base_frame()
    f[Y] = f[Y].map(repr)
    f.loc[[0, 5], Y] = ["NA", "nan"]
    p = t / "m.csv"
    f.to_csv(p, index=False)
    kept = pd.read_csv(p).dropna(subset=[Y])   # reference: pandas' default NA tokens for a number column

    def chk(d):
        assert d["design"]["dropped_rows"]["total"] == 2
        assert_interaction_matches(d, kept)
    return Case(check_args(p), "ok", check=chk, inputs=[str(p)])


# --- --levels mistakes -----------------------------------------------------------------------------

def _levels_case(t, specs, fragments):
    p = to_csv(base_frame(), t / "d.csv")
    extra = [x for s in specs for x in ("--levels", s)]
    return Case(check_args(p, *extra), "error", fragments, inputs=[p])


CASES["levels: unknown column"] = lambda t: _levels_case(t, ["typo=a1,a2"], ("'typo'", "--levels"))
CASES["levels: column given twice"] = lambda t: _levels_case(t, [f"{B}=slow,fast", f"{B}=fast,slow"],
                                                             ("given twice",))
CASES["levels: level listed twice"] = lambda t: _levels_case(t, [f"{B}=slow,fast,slow"], ("'slow'", "twice"))
CASES["levels: level not in the data"] = lambda t: _levels_case(t, [f"{B}=slow,fast,medium"], ("'medium'",))
CASES["levels: a level left out"] = lambda t: _levels_case(t, [f"{A}=stoneware,porcelain"], ("'earthenware'",))
CASES["levels: no levels after ="] = lambda t: _levels_case(t, [f"{A}="], ("--levels",))
CASES["levels: empty name between commas"] = lambda t: _levels_case(t, [f"{A}=stoneware,,porcelain"],
                                                                    ("empty level",))


@case("levels: correct order is used")
def _(t):
    f = base_frame()
    p = to_csv(f, t / "d.csv")

    def chk(d):
        assert d["design"]["levels"][A] == ["earthenware", "porcelain", "stoneware"]
        assert_interaction_matches(d, f)
    return Case(check_args(p, "--levels", f"{A}=earthenware,porcelain,stoneware"), "ok", check=chk, inputs=[p])


# --- numeric range: response times 10^k -------------------------------------------------------------

_UNSCALED: dict = {}


def _scaled_case(t, k):
    f = base_frame()
    g = f.copy()
    # scale by string exponent, so the written value is the decimal number times 10^k
    g[Y] = [float(f"{v!r}e{k}") for v in f[Y]]
    p = to_csv(g, t / f"scaled_{k}.csv")
    F_ref, p_ref = sm_interaction(f)   # reference: statsmodels on the unscaled data

    def chk(d):
        row = anova_row(d)
        assert row["F"] == pytest.approx(F_ref, rel=1e-9)
        assert row["p"] == pytest.approx(p_ref, rel=1e-9, abs=1e-12)
        assert row["partial_eta_sq"] is not None
        base = _unscaled_findings(t, f)
        # every analytic method's p and every diagnostic grade as for the unscaled data
        # (common practice: tests of location and spread are invariant under rescaling)
        got = {(m["id"], m["effect"]): m["p"] for m in d["methods"]}
        want = {(m["id"], m["effect"]): m["p"] for m in base["methods"]}
        assert got.keys() == want.keys()
        for key, pv in want.items():
            if pv is None:
                assert got[key] is None, key
            else:
                assert got[key] == pytest.approx(pv, rel=1e-9, abs=1e-12), key
        assert ({x["id"]: x["severity"] for x in d["diagnostics"]}
                == {x["id"]: x["severity"] for x in base["diagnostics"]})
    argv = ["check", p, "--response", Y, "--factors", A, B, "--resamples", "0", "--json", "-"]
    return Case(argv, "ok", check=chk, inputs=[p])


def _unscaled_findings(t, f):
    if "d" not in _UNSCALED:
        p = to_csv(f, t / "unscaled.csv")
        code, out, err = _in_process(["check", p, "--response", Y, "--factors", A, B, "--resamples", "0",
                                      "--json", "-"])
        assert code in (0, 1, 3), err
        _UNSCALED["d"] = strict_json_loads(out)
    return _UNSCALED["d"]


for _k in (-300, -155, -150, -80, 75, 77, 100, 120, 300):
    CASES[f"response times 1e{_k}"] = (lambda k: lambda t: _scaled_case(t, k))(_k)


@case("zero spread in every cell")
def _(t):
    f = base_frame()
    f[Y] = f.groupby([A, B])[Y].transform("mean").round(3)
    p = to_csv(f, t / "z.csv")

    def chk(d):
        row = anova_row(d)
        # common practice: with no residual variation the F ratio is undefined (null with a note);
        # partial eta squared SS_AB / (SS_AB + 0) is 1 by its definition while SS_AB is clearly nonzero
        assert row["F"] is None and row["p"] is None and "no variation within cells" in row["note"]
        assert row["ss"] > 1.0 and row["partial_eta_sq"] == 1.0
    return Case(check_args(p, fast=False) + ["--resamples", "0"], "ok", check=chk, inputs=[p])


@case("zero spread in every cell and additive cell means")
def _(t):
    f = base_frame()
    j = f[A].map({c: i for i, c in enumerate(CLAYS)})
    k = f[B].map({c: i for i, c in enumerate(FIRINGS)})
    f[Y] = 120.0 + 6.0 * j - 4.0 * k          # exact in binary: the interaction SS is 0 to rounding
    p = to_csv(f, t / "z.csv")

    def chk(d):
        row = anova_row(d)
        # degenerate effect size (0/0): null with a note, never 1.000 (issue 7)
        assert row["F"] is None and row["partial_eta_sq"] is None and row["note"]
    return Case(check_args(p, fast=False) + ["--resamples", "0"], "ok", check=chk, inputs=[p])


@case("infinite response")
def _(t):
    f = base_frame()
    f[Y] = f[Y].map(repr)
    f.loc[3, Y] = "inf"
    p = t / "i.csv"
    f.to_csv(p, index=False)
    return Case(check_args(p), "error", ("infinite", "row 5"), inputs=[str(p)])


@case("response that overflows float64 (1e400)")
def _(t):
    f = base_frame()
    f[Y] = f[Y].map(repr)
    f.loc[3, Y] = "1e400"
    p = t / "o.csv"
    f.to_csv(p, index=False)
    return Case(check_args(p), "error", ("infinite value ('1e400') at row 5",), inputs=[str(p)])


@case("constant response")
def _(t):
    f = base_frame()
    f[Y] = 12.5
    return Case(check_args(to_csv(f, t / "c.csv")), "error", ("constant",), inputs=[str(t / "c.csv")])


@case("all-missing response")
def _(t):
    f = base_frame()
    f[Y] = ""
    p = t / "m.csv"
    f.to_csv(p, index=False)
    return Case(check_args(p), "error", ("is empty",), inputs=[str(p)])


# --- shape of the file ----------------------------------------------------------------------------

@case("empty file")
def _(t):
    (t / "e.csv").write_text("")
    return Case(check_args(t / "e.csv"), "error", ("empty",), inputs=[str(t / "e.csv")])


@case("header only")
def _(t):
    (t / "h.csv").write_text(f"{A},{B},{Y}\n")
    return Case(check_args(t / "h.csv"), "error", ("no data rows",), inputs=[str(t / "h.csv")])


@case("one row")
def _(t):
    (t / "o.csv").write_text(f"{A},{B},{Y}\nstoneware,slow,120.5\n")
    return Case(check_args(t / "o.csv"), "error", ("level",), inputs=[str(t / "o.csv")])


@case("a single level of one factor")
def _(t):
    f = base_frame(firings=["slow"], counts=[[4], [3], [5]])
    return Case(check_args(to_csv(f, t / "s.csv")), "error", ("at least 2",), inputs=[str(t / "s.csv")])


@case("a directory as input")
def _(t):
    (t / "data.csv").mkdir()
    return Case(check_args(t / "data.csv"), "error", ("is a folder",))


@case("missing file")
def _(t):
    return Case(check_args(t / "nope.csv"), "error", ("not found",))


@case("unsupported file type")
def _(t):
    (t / "d.json").write_text("{}")
    return Case(check_args(t / "d.json"), "error", ("unsupported file type",), inputs=[str(t / "d.json")])


@case("corrupt workbook")
def _(t):
    (t / "d.xlsx").write_bytes(b"PK\x03\x04 not really a zip archive")
    return Case(check_args(t / "d.xlsx"), "error", ("xlsx",), inputs=[str(t / "d.xlsx")])


@case("corrupt parquet")
def _(t):
    (t / "d.parquet").write_bytes(b"PAR1 garbage")
    return Case(check_args(t / "d.parquet"), "error", ("Parquet",), inputs=[str(t / "d.parquet")])


@case("parquet with integer firing codes")
def _(t):
    pytest.importorskip("pyarrow")
    f = base_frame(firings=[1, 2])
    p = t / "d.parquet"
    f.to_parquet(p)
    return Case(check_args(p), "ok", check=ok_vs_reference(f), inputs=[str(p)])


@case("CRLF line ends, UTF-8 byte-order mark, trailing spaces after numbers")
def _(t):
    f = base_frame()
    text = "\r\n".join([f"{A},{B},{Y}"] + [f"{a},{b},{y!r}  " for a, b, y in f.itertuples(index=False)]) + "\r\n"
    p = t / "w.csv"
    p.write_bytes(text.encode("utf-8-sig"))
    return Case(check_args(p), "ok", check=ok_vs_reference(f), inputs=[str(p)])


@case("repeated column name")
def _(t):
    f = base_frame()
    f["dup"] = 1.0
    p = t / "r.csv"
    p.write_text(f.to_csv(index=False).replace(",dup\n", f",{Y}\n", 1))
    return Case(check_args(p), "error", (f"'{Y}' appears twice",), inputs=[str(p)])


# --- workbooks ------------------------------------------------------------------------------------

def _workbook(path, sheets, merge=None):
    openpyxl = pytest.importorskip("openpyxl")
    wb = openpyxl.Workbook()
    wb.remove(wb.active)
    for name, rows in sheets.items():
        ws = wb.create_sheet(name)
        for r in rows:
            ws.append(r)
        for rng in merge or ():
            ws.merge_cells(rng)
    wb.save(path)
    return str(path)


def _sheet_rows(f):
    return [list(f.columns)] + [list(r) for r in f.itertuples(index=False)]


@case("workbook with two sheets, no --sheet")
def _(t):
    f = base_frame()
    p = _workbook(t / "wb.xlsx", {"notes": [["kiln log"], ["cone 6"]], "trial": _sheet_rows(f)})
    return Case(check_args(p), "error", ("--sheet", "'notes'", "'trial'"), inputs=[p])


@case("workbook with two sheets, --sheet trial")
def _(t):
    f = base_frame()
    p = _workbook(t / "wb.xlsx", {"notes": [["kiln log"], ["cone 6"]], "trial": _sheet_rows(f)})
    return Case(check_args(p, "--sheet", "trial"), "ok", check=ok_vs_reference(f), inputs=[p])


@case("workbook with merged clay cells")
def _(t):
    f = base_frame().sort_values([A, B], kind="stable").reset_index(drop=True)
    rows = _sheet_rows(f)
    merges, start = [], 2
    for clay, grp in f.groupby(A, sort=False):
        n = len(grp)
        for i in range(1, n):
            rows[start - 1 + i][0] = None
        merges.append(f"A{start}:A{start + n - 1}")
        start += n
    p = _workbook(t / "m.xlsx", {"trial": rows}, merge=merges)
    return Case(check_args(p), "error", ("merged",), inputs=[p])


# --- encodings and odd characters --------------------------------------------------------------------

def _accented():
    return base_frame(clays=["grès", "porcelaine", "faïence"])


@case("Latin-1 file without --encoding")
def _(t):
    p = t / "l.csv"
    p.write_bytes(_accented().to_csv(index=False).encode("latin-1"))
    return Case(check_args(p), "error", ("--encoding latin-1",), inputs=[str(p)])


@case("Latin-1 file with --encoding latin-1")
def _(t):
    f = _accented()
    p = t / "l.csv"
    p.write_bytes(f.to_csv(index=False).encode("latin-1"))

    def chk(d):
        assert d["design"]["levels"][A] == ["grès", "porcelaine", "faïence"] or \
            sorted(d["design"]["levels"][A]) == sorted(["grès", "porcelaine", "faïence"])
        assert_interaction_matches(d, f)
    return Case(check_args(p, "--encoding", "latin-1"), "ok", check=chk, inputs=[str(p)])


@case("UTF-16 file with byte-order mark")
def _(t):
    f = _accented()
    p = t / "u16.csv"
    p.write_bytes(f.to_csv(index=False).encode("utf-16"))
    return Case(check_args(p), "ok", check=ok_vs_reference(f), inputs=[str(p)])


@case("unknown --encoding")
def _(t):
    p = to_csv(base_frame(), t / "d.csv")
    return Case(check_args(p, "--encoding", "no-such-codec"), "error", ("encoding",), inputs=[p])


@case("newline in a column name")
def _(t):
    f = base_frame().rename(columns={Y: "thickness\num"})
    p = t / "n.csv"
    f.to_csv(p, index=False)      # pandas quotes the name with its newline
    return Case(check_args(p), "error", ("\\n",), inputs=[str(p)])


@case("newline and ANSI codes in level names: escaped in the text report")
def _(t):
    f = base_frame(clays=["stone\nware", "\x1b[2J\x1b[31mporcelain", "earthen\x1b]0;x\x07ware"])
    p = t / "esc.csv"
    f.to_csv(p, index=False)

    def chk(out):
        assert "\x1b" not in out and "\x07" not in out
        assert "\\x1b" in out and "stone\\nware" in out
    return Case(check_args(p, json_out=False), "ok", check=chk, inputs=[str(p)], json_out=False)


@case("newline in a level name and a bad level in --levels: one-line error")
def _(t):
    f = base_frame(clays=["stone\nware", "porcelain", "earthenware"])
    p = t / "esc.csv"
    f.to_csv(p, index=False)
    return Case(check_args(p, "--levels", f"{A}=porcelain,earthenware"), "error", ("stone\\nware",),
                inputs=[str(p)])


# --- options ---------------------------------------------------------------------------------------

def _opt_case(t, extra, fragments, fast=False):
    p = to_csv(base_frame(), t / "d.csv")
    return Case(check_args(p, fast=fast, json_out=False) + list(extra), "error", fragments, inputs=[p])


CASES["--resamples -1"] = lambda t: _opt_case(t, ["--resamples", "-1"], ("resamples",))
CASES["--resamples -1 with --no-methods"] = lambda t: _opt_case(t, ["--resamples", "-1", "--no-methods"],
                                                                ("resamples",))
CASES["--resamples above the maximum"] = lambda t: _opt_case(t, ["--resamples", str(MAX_RESAMPLES + 1)],
                                                             ("resamples", f"{MAX_RESAMPLES:,}"))
CASES["--resamples 1e9 (not a whole number)"] = lambda t: _opt_case(t, ["--resamples", "1e9"], ("--resamples",))
CASES["--seed -5 with --resamples 0"] = lambda t: _opt_case(t, ["--seed", "-5"], ("seed",), fast=True)
CASES["--seed 2**63"] = lambda t: _opt_case(t, ["--seed", str(2**63)], ("seed",), fast=True)
CASES["--alpha 5"] = lambda t: _opt_case(t, ["--alpha", "5"], ("alpha",), fast=True)
CASES["--alpha nan"] = lambda t: _opt_case(t, ["--alpha", "nan"], ("alpha",), fast=True)
CASES["--decimal ;"] = lambda t: _opt_case(t, ["--decimal", ";"], ("decimal",), fast=True)
CASES["--sheet on a text file"] = lambda t: _opt_case(t, ["--sheet", "2"], ("sheet",), fast=True)


@case("--factors a,b")
def _(t):
    p = to_csv(base_frame(), t / "d.csv")
    return Case(["check", p, "--response", Y, "--factors", f"{A},{B}"], "error",
                ("--factors", "separated by a space"), inputs=[p])


@case("response and a factor swapped")
def _(t):
    p = to_csv(base_frame(), t / "d.csv")
    return Case(check_args(p, response=B, factors=(A, Y)), "error", ("swapped",), inputs=[p])


@case("response also named as a factor")
def _(t):
    p = to_csv(base_frame(), t / "d.csv")
    return Case(check_args(p, response=A, factors=(A, B)), "error", ("also named as a factor",), inputs=[p])


@case("unknown response column")
def _(t):
    p = to_csv(base_frame(), t / "d.csv")
    return Case(check_args(p, response="thickness"), "error", ("thickness", Y), inputs=[p])


@case("text in the response column")
def _(t):
    f = base_frame()
    f[Y] = f[Y].map(repr)
    f.loc[0, Y] = "thin"
    p = t / "d.csv"
    f.to_csv(p, index=False)
    return Case(check_args(p), "error", ("'thin'", "line 2"), inputs=[str(p)])


# --- intake guesses --------------------------------------------------------------------------------

@case("decimal commas with ; delimiters (detected)")
def _(t):
    f = base_frame(firings=["0,5", "1,5"])           # firing hours written with a decimal comma
    p = t / "dc.csv"
    p.write_text(f.assign(**{Y: f[Y].map(lambda v: repr(v).replace(".", ","))}).to_csv(index=False, sep=";"))
    ref = pd.read_csv(p, sep=";", decimal=",", dtype={B: str})   # reference: pandas' decimal=","

    def chk(d):
        assert any("decimal" in n for n in d["design"]["notes"]), d["design"]["notes"]
        assert_interaction_matches(d, ref)
    return Case(check_args(p), "ok", check=chk, inputs=[str(p)])


@case("decimal commas with --decimal ,")
def _(t):
    f = base_frame()
    p = t / "dc.csv"
    p.write_text(f.assign(**{Y: f[Y].map(lambda v: repr(v).replace(".", ","))}).to_csv(index=False, sep=";"))
    return Case(check_args(p, "--decimal", ","), "ok", check=ok_vs_reference(f), inputs=[str(p)])


@case("decimal commas in a tab file (hint)")
def _(t):
    f = base_frame()
    p = t / "dc.tsv"
    p.write_text(f.assign(**{Y: f[Y].map(lambda v: repr(v).replace(".", ","))}).to_csv(index=False, sep="\t"))
    return Case(check_args(p), "error", ("--decimal ,",), inputs=[str(p)])


@case("levels 15 and 15.0 merged")
def _(t):
    f = base_frame(clays=["15", "30", "45"])
    g = f.copy()
    first = g.index[g[A] == "15"][0]
    g.loc[(g[A] == "15") & (g.index != first), A] = "15.0"
    p = to_csv(g, t / "d.csv")

    def chk(d):
        assert sorted(d["design"]["levels"][A]) == ["15", "30", "45"]
        assert any("merged" in n for n in d["design"]["notes"])
        assert_interaction_matches(d, f)
    return Case(check_args(p), "ok", check=chk, inputs=[p])


@case("levels 15 and 15.0 beside a text level")
def _(t):
    f = base_frame(clays=["15", "15.0", "ambient"])
    p = to_csv(f, t / "d.csv")
    return Case(check_args(p), "error", ("'15'", "'15.0'"), inputs=[p])


@case("--order column all blank")
def _(t):
    f = base_frame()
    f["run"] = ""
    p = t / "d.csv"
    f.to_csv(p, index=False)
    return Case(check_args(p, "--order", "run", fast=False) + ["--no-methods"], "error", ("'run' is empty",),
                inputs=[str(p)])


@case("cell table (mean, sd, n per cell) given to check")
def _(t):
    # a one-row-per-cell table with columns named like cell statistics is refused with a hint
    # towards check-summary (common practice: cell means are not observations)
    f = base_frame()
    g = f.groupby([A, B], sort=False)[Y].agg(["mean", "std", "size"]).reset_index()
    g.columns = [A, B, "mean", "sd", "n"]
    p = to_csv(g, t / "cells.csv")
    return Case(check_args(p, response="mean"), "error", ("check-summary", "--mean mean --sd sd --n n"), inputs=[p])


@case("one observation per cell: additive F against statsmodels")
def _(t):
    f = base_frame(counts=[[1, 1], [1, 1], [1, 1]])
    p = to_csv(f, t / "d.csv")

    def chk(d):
        # reference: statsmodels ols('y ~ C(a) + C(b)') + anova_lm(typ=2), main effects tested
        # against the interaction mean square (common practice for n = 1 per cell)
        ref = anova_lm(smf.ols("y ~ C(fa) + C(fb)", data=pd.DataFrame(
            {"y": f[Y], "fa": f[A], "fb": f[B]})).fit(), typ=2)
        got = {m["effect"]: m for m in d["methods"] if m["id"] == "additive-f"}
        assert got["A"]["statistic"] == pytest.approx(ref.loc["C(fa)", "F"], rel=1e-9)
        assert got["B"]["p"] == pytest.approx(ref.loc["C(fb)", "PR(>F)"], rel=1e-9)
    return Case(check_args(p, fast=False) + ["--resamples", "0"], "ok", check=chk, inputs=[p])


@case("one empty cell: interaction on the estimable contrasts")
def _(t):
    f = base_frame(counts=[[4, 3], [2, 5], [3, 0]])
    p = to_csv(f, t / "d.csv")
    F, df1, df2 = lstsq_interaction(f)

    def chk(d):
        row = anova_row(d)
        assert row["df"] == df1 == 1
        assert row["F"] == pytest.approx(F, rel=1e-9)   # reference: lstsq model comparison above
        wj = next(m for m in d["methods"] if m["id"] == "welch-james" and m["effect"] == "AB")
        assert wj["p"] is not None                       # issue: robust lines no longer silenced
    return Case(check_args(p, fast=False) + ["--resamples", "0", "--no-diagnostics"], "ok", check=chk,
                inputs=[p])


@case("whitespace around level names")
def _(t):
    f = base_frame()
    g = f.copy()
    g.loc[g.index[:3], A] = g.loc[g.index[:3], A] + " "
    p = to_csv(g, t / "d.csv")

    def chk(d):
        # the padded spelling does not become a level of its own
        assert len(d["design"]["levels"][A]) == 3, d["design"]["levels"][A]
        assert_interaction_matches(d, f)
    # recorded behaviour: spaces around a field are stripped (common practice for delimited text)
    return Case(check_args(p), "ok", check=chk, inputs=[p])


# --- run time -------------------------------------------------------------------------------------

@case("leave-one-out on a 100 x 2 design with n = 2 (was 15 s)")
def _(t):
    rng = np.random.default_rng(3)
    rows = [(f"kiln{j:03d}", f, 120 + j % 7 + 3 * (f == "fast") + rng.normal(0, 2)) for j in range(100)
            for f in FIRINGS for _ in range(2)]
    f = pd.DataFrame(rows, columns=[A, B, Y])
    p = to_csv(f, t / "big.csv")
    return Case(check_args(p, fast=False) + ["--resamples", "0", "--no-methods"], "ok",
                check=ok_vs_reference(f), inputs=[p], max_seconds=20.0)


# ---------------------------------------------------------------------------
# runners
# ---------------------------------------------------------------------------

def stamp(path):
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest(), os.stat(path).st_mtime_ns


_QUIET_BY_DEFAULT = (DeprecationWarning, PendingDeprecationWarning, ImportWarning, ResourceWarning)


def _in_process(argv):
    """Run the CLI in this process; returns (code, stdout, stderr).  Warnings that a
    subprocess would print on stderr are appended to stderr."""
    out, err = io.StringIO(), io.StringIO()
    old = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = out, err
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                code = main(argv)
            except SystemExit as exc:   # argparse errors
                code = exc.code
    finally:
        sys.stdout, sys.stderr = old
    shown = [w for w in caught if not issubclass(w.category, _QUIET_BY_DEFAULT)]
    extra = "".join(f"{w.filename}:{w.lineno}: {w.category.__name__}: {w.message}\n" for w in shown)
    return code, out.getvalue(), err.getvalue() + extra


def _subprocess(argv):
    env = dict(os.environ, PYTHONPATH=ROOT)
    r = subprocess.run([sys.executable, "-m", "audit", *argv], capture_output=True, text=True, cwd=ROOT,
                       env=env, timeout=120)
    return r.returncode, r.stdout, r.stderr


#: what a case did, for the record (printed with -s)
OUTCOMES: dict[str, int] = {}


def _judge(name, c: Case, code, out, err, seconds):
    OUTCOMES[name] = code
    assert "Traceback" not in err, err
    # a finished audit exits with its verdict's status (0 holds, 1 does not / fragile /
    # not reproducible, 3 cannot judge); 2 is a one-line input error; never a traceback
    assert code in (0, 1, 2, 3), (code, out[-2000:], err[-2000:])
    if c.expect == "ok":
        assert code in (0, 1, 3), err
    elif c.expect == "error":
        assert code == 2, (out[-500:], err)
    if code == 2:
        lines = err.rstrip("\n").split("\n")
        assert len(lines) == 1, err
        assert lines[0].startswith("twoway-audit: error: "), err
        assert ".tmp-" not in lines[0], lines[0]
        if c.expect == "error":
            for frag in c.fragments:
                assert frag in lines[0], (frag, lines[0])
    else:
        assert err == "", err       # a successful run prints nothing on stderr (issue: no warnings)
        if c.json_out:
            d = strict_json_loads(out)
            strict_json_check(d)
            if c.check:
                c.check(d)
        elif c.check:
            c.check(out)
        if c.max_seconds is not None:
            assert seconds < c.max_seconds, seconds


def _run_case(name, tmp_path, runner):
    c = CASES[name](tmp_path)
    before = {p: stamp(p) for p in c.inputs}
    t0 = time.perf_counter()
    code, out, err = runner(c.argv)
    seconds = time.perf_counter() - t0
    after = {p: stamp(p) for p in c.inputs}
    assert after == before, "an input file was modified"
    _judge(name, c, code, out, err, seconds)


@pytest.mark.parametrize("name", list(CASES))
def test_corpus_case(name, tmp_path):
    _run_case(name, tmp_path, _in_process)


SUBPROCESS_CASES = [
    "json onto the input file",
    "levels named None and NA",
    "response times 1e300",
    "Latin-1 file without --encoding",
    "newline and ANSI codes in level names: escaped in the text report",
    "--resamples above the maximum",
    "decimal commas with ; delimiters (detected)",
    "a directory as input",
]


@pytest.mark.parametrize("name", SUBPROCESS_CASES)
def test_corpus_case_subprocess(name, tmp_path):
    _run_case(name, tmp_path, _subprocess)


def test_corpus_size():
    # issue acceptance: at least the cases listed in its "Why" section; kept as a floor
    assert len(CASES) >= 70, len(CASES)
    assert set(SUBPROCESS_CASES) <= set(CASES)


def test_math_markup_level_names_in_figures(tmp_path):
    # a level name that the plotting library would read as math markup is drawn as text
    f = base_frame(clays=["$\\undefinedmacro$", "$x$", "plain"])
    p = to_csv(f, tmp_path / "mk.csv")
    before = stamp(p)
    code, out, err = _subprocess(["check", p, "--response", Y, "--factors", A, B, "--resamples", "0",
                                  "--no-methods", "--report", str(tmp_path / "rep")])
    assert stamp(p) == before
    assert code in (0, 1, 3) and err == "", err
    d = strict_json_loads((tmp_path / "rep" / "findings.json").read_text())
    strict_json_check(d)
    assert_interaction_matches(d, f)
    assert any(name.endswith(".svg") for name in os.listdir(tmp_path / "rep"))
