"""Engine parity: every intake case through the in-memory path and the DuckDB engine.

Each case is generated here (the cases of the reliability issue, and those of
test_intake.py, test_intake_odd.py and test_bad_input_corpus.py that apply to
files DuckDB reads: CSV/TSV/text and Parquet).  Both engines must either refuse
it with the same error class and message, or accept it with equal findings:
the interaction F and p of every SS type and every sum of squares to 1e-9
relative, level names and their order, how the order was chosen, the design
notes, the rows left out (counts per cell, missing factors, listed rows) and
the exit status.

reference: the in-memory path, itself tied to statsmodels / published examples in
test_anova_reference.py, test_intake*.py and test_bad_input_corpus.py; the worked
value of each case is checked there.  Inputs are invented (a seed-drying trial:
germination rate by drying method x storage room), generated in the test.

Engine wording (the only differences allowed, each justified):

* the engine adds one design note saying what it computed from every row and
  what on its sample (``Read through the duckdb engine: ...``): a fact about the
  engine, not about the data;
* a file the engine's parser cannot read (a ragged row, corrupt Parquet) names the
  parser's own reason inside the parentheses of the same sentence.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("duckdb", reason="duckdb not installed (pip install '.[duckdb]')")

import audit  # noqa: E402
from audit.errors import AuditInputError  # noqa: E402

A, B, Y = "drying", "room", "germ_rate"
METHODS = ["sun", "oven", "silica"]
ROOMS = ["cool", "warm"]
COUNTS = [[4, 3], [2, 5], [3, 4]]          # unbalanced: the SS types differ


def frame(a=METHODS, b=ROOMS, counts=COUNTS, seed=3, fmt="{:.3f}") -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for j, x in enumerate(a):
        for k, z in enumerate(b):
            for _ in range(counts[j][k]):
                v = 70.0 + 4.0 * j - 3.0 * k + 5.0 * (j == 1) * (k == 1) + rng.normal(0, 2)
                rows.append((x, z, fmt.format(v)))
    order = rng.permutation(len(rows))
    return pd.DataFrame([rows[i] for i in order], columns=[A, B, Y])


def text(f: pd.DataFrame, sep=",") -> str:
    return "".join(sep.join(map(str, r)) + "\n" for r in [list(f.columns), *f.itertuples(index=False)])


@dataclass
class Case:
    data: object
    kw: dict = field(default_factory=dict)
    note: str = ""


CASES: dict = {}


def case(name):
    def deco(fn):
        CASES[name] = fn
        return fn
    return deco


def csv_case(t, f, name="d.csv", sep=",", enc="utf-8", **kw):
    p = t / name
    p.write_bytes(text(f, sep).encode(enc))
    return Case(str(p), kw)


def parquet_case(t, f, name="d.parquet", **kw):
    pytest.importorskip("pyarrow")
    p = t / name
    f.to_parquet(p, index=False)
    return Case(str(p), kw)


# --- the reported differences ------------------------------------------------------------------

@case("boolean response (Parquet)")
def _(t):
    f = frame()
    f[Y] = [i % 2 == 0 for i in range(len(f))]
    return parquet_case(t, f)


@case("levels 15 and 15.0 merged")
def _(t):
    f = frame(a=["15", "30", "45"])
    idx = f.index[f[A] == "15"]
    f.loc[idx[1:], A] = "15.0"
    return csv_case(t, f)


for _k in (307, -310, -300, 300, -155, 120):
    def _scaled(t, k=_k):
        f = frame()
        f[Y] = [f"{float(v) / 100:.5f}e{k}" for v in f[Y]]   # about 0.7 x 10^k
        return csv_case(t, f)
    CASES[f"response times 1e{_k}"] = _scaled


@case("response around 1e307 in Parquet doubles")
def _(t):
    f = frame()
    f[Y] = f[Y].astype(float) * 1e305
    return parquet_case(t, f)


@case("response around 1e-310 in Parquet doubles (subnormal)")
def _(t):
    f = frame()
    f[Y] = f[Y].astype(float) * 1e-312
    return parquet_case(t, f)


@case("--decimal , on a ';' file")
def _(t):
    f = frame()
    f[Y] = f[Y].str.replace(".", ",")
    return csv_case(t, f, sep=";", decimal=",")


@case("decimal commas detected in a ';' file, factor with decimal commas")
def _(t):
    f = frame(b=["0,5", "1,5"])
    f[Y] = f[Y].str.replace(".", ",")
    return csv_case(t, f, sep=";")


@case("decimal commas in a tab file (refused)")
def _(t):
    f = frame()
    f[Y] = f[Y].str.replace(".", ",")
    return csv_case(t, f, name="d.tsv", sep="\t")


@case("decimal commas in a tab file with --decimal ,")
def _(t):
    f = frame()
    f[Y] = f[Y].str.replace(".", ",")
    return csv_case(t, f, name="d.tsv", sep="\t", decimal=",")


@case("--decimal ; (refused)")
def _(t):
    return csv_case(t, frame(), decimal=";")


@case("Latin-1 with --encoding latin-1")
def _(t):
    return csv_case(t, frame(a=["séché", "four", "gel de silice"]), enc="latin-1", encoding="latin-1")


@case("Latin-1 without --encoding (refused)")
def _(t):
    return csv_case(t, frame(a=["séché", "four", "gel de silice"]), enc="latin-1")


@case("cp1252 with --encoding cp1252")
def _(t):
    return csv_case(t, frame(a=["séché", "four", "gel – silice"]), enc="cp1252", encoding="cp1252")


@case("UTF-16 with byte-order mark")
def _(t):
    return csv_case(t, frame(a=["séché", "four", "gel de silice"]), enc="utf-16")


@case("UTF-8 with byte-order mark")
def _(t):
    return csv_case(t, frame(a=["séché", "four", "gel de silice"]), enc="utf-8-sig")


@case("unknown --encoding (refused)")
def _(t):
    return csv_case(t, frame(), encoding="no-such-codec")


@case("file name with glob characters e_odd[1].csv")
def _(t):
    (t / "e_odd1.csv").write_text(text(frame(seed=99)))     # a decoy the glob would match
    return csv_case(t, frame(), name="e_odd[1].csv")


@case("repeated column name (refused)")
def _(t):
    f = frame()
    p = t / "d.csv"
    p.write_text(text(f.assign(extra="1")).replace(",extra\n", f",{Y}\n", 1))
    return Case(str(p))


@case("1_000 in the response (refused)")
def _(t):
    f = frame()
    f.loc[4, Y] = "1_000"
    return csv_case(t, f)


# --- test_intake.py -----------------------------------------------------------------------------

for _sep, _suffix in ((",", ".csv"), (";", ".csv"), ("\t", ".tsv"), ("\t", ".txt"), ("|", ".csv")):
    CASES[f"delimiter {_sep!r} in {_suffix}"] = (lambda s, x: lambda t: csv_case(t, frame(), name="d" + x, sep=s))(
        _sep, _suffix)


@case("Parquet with a float dose factor")
def _(t):
    f = frame(b=["1", "0.5", "2"], counts=[[3, 3, 3]] * 3)
    f[B] = f[B].astype(float)
    f[Y] = f[Y].astype(float)
    return parquet_case(t, f)


@case("numeric-looking levels in numeric order")
def _(t):
    return csv_case(t, frame(b=["1", "0.5", "2"], counts=[[3, 3, 3]] * 3))


@case("given level order")
def _(t):
    return csv_case(t, frame(), levels={A: ["silica", "oven", "sun"], B: ["warm", "cool"]})


@case("given level order missing a level (refused)")
def _(t):
    return csv_case(t, frame(), levels={A: ["silica", "oven"]})


@case("missing values dropped and counted per cell")
def _(t):
    f = frame()
    f.loc[1, Y] = ""
    f.loc[7, Y] = "NA"
    f.loc[5, Y] = " "
    f.loc[9, A] = ""
    return csv_case(t, f)


@case("exact decimal centring (10 shared digits)")
def _(t):
    f = frame()
    f[Y] = ["7000000000" + v for v in f[Y]]
    return csv_case(t, f)


@case("non-numeric response names value and row (refused)")
def _(t):
    f = frame()
    f.loc[4, Y] = "n/a?"
    return csv_case(t, f)


@case("infinite response (refused)")
def _(t):
    f = frame()
    f.loc[3, Y] = "inf"
    return csv_case(t, f)


@case("infinite response in Parquet doubles (refused)")
def _(t):
    f = frame()
    f[Y] = f[Y].astype(float)
    f.loc[3, Y] = -np.inf
    return parquet_case(t, f)


@case("constant response (refused)")
def _(t):
    f = frame()
    f[Y] = "20"
    return csv_case(t, f)


@case("factor with one level (refused)")
def _(t):
    return csv_case(t, frame(b=["cool"], counts=[[4], [3], [5]]))


@case("same factor twice (refused)")
def _(t):
    c = csv_case(t, frame())
    c.kw["factors"] = (A, A)
    return c


@case("level with fewer than two observations (refused)")
def _(t):
    return csv_case(t, frame(counts=[[4, 3], [2, 5], [1, 0]]))


@case("unknown response column (refused)")
def _(t):
    c = csv_case(t, frame())
    c.kw["response"] = "germ"
    return c


@case("missing file (refused)")
def _(t):
    return Case(str(t / "nope.csv"))


@case("unsupported file type (refused)")
def _(t):
    (t / "d.json").write_text("{}")
    return Case(str(t / "d.json"))


@case("a folder as input (refused)")
def _(t):
    (t / "data.csv").mkdir()
    return Case(str(t / "data.csv"))


@case("a repeated header line inside the data (refused)")
def _(t):
    f = frame()
    body = text(f).splitlines(keepends=True)
    p = t / "d.csv"
    p.write_text("".join(body[:9] + body[:1] + body[9:]))   # two files joined with their headers
    return Case(str(p))


@case("a unit after some response values (refused)")
def _(t):
    f = frame()
    f.loc[[3, 8], Y] = f.loc[[3, 8], Y] + " mm"
    return csv_case(t, f)


@case("a response column of text labels (refused)")
def _(t):
    f = frame()
    f[Y] = ["low" if i % 3 else "high" for i in range(len(f))]
    return csv_case(t, f)


# --- test_intake_odd.py -------------------------------------------------------------------------

for _nm in ("None", "NA", "nan", "null", "N/A"):
    CASES[f"level named {_nm}"] = (lambda nm: lambda t: csv_case(t, frame(a=[nm, "Low", "High"])))(_nm)


@case("blank factor field and response missing tokens")
def _(t):
    f = frame()
    f.loc[0, A] = "  "
    f.loc[1, Y] = "NA"
    f.loc[2, Y] = "."
    f.loc[3, Y] = "nan"
    return csv_case(t, f)


@case("quoted newlines, then a dropped row and a bad value")
def _(t):
    f = frame()
    f["remark"] = "none"
    f.loc[2, "remark"] = "cracked\nseed coat\nseen"
    f.loc[6, Y] = ""
    p = t / "q.csv"
    f.to_csv(p, index=False)
    return Case(str(p))


@case("quoted newlines, then a non-numeric response (refused)")
def _(t):
    f = frame()
    f["remark"] = "none"
    f.loc[2, "remark"] = "cracked\nseed coat"
    f.loc[9, Y] = "twelve"
    p = t / "q.csv"
    f.to_csv(p, index=False)
    return Case(str(p))


for _lv, _nm in (({"typo": ["a", "b"]}, "unknown column"), ({B: ["cool", "warm", "cool"]}, "level listed twice"),
                 ({B: ["cool", "warm", "hot"]}, "level not in the data"), ({A: ["sun", "oven"]}, "a level left out")):
    CASES[f"levels mistake: {_nm} (refused)"] = (lambda lv: lambda t: csv_case(t, frame(), levels=lv))(_lv)


@case("spellings 15 and 15.0 beside a text level (refused)")
def _(t):
    return csv_case(t, frame(a=["15", "15.0", "ambient"]))


@case("response and a factor swapped (refused with the hint)")
def _(t):
    c = csv_case(t, frame())
    c.kw.update(response=B, factors=(A, Y))
    return c


@case("text response, another column looks like the measurement (refused with the hint)")
def _(t):
    f = frame()
    f["batch"] = f[B]
    c = csv_case(t, f)
    c.kw.update(response=B, factors=(A, "batch"))
    return c


@case("blank lines above the header")
def _(t):
    p = t / "d.csv"
    p.write_bytes(("\n  \r\n" + text(frame())).encode())
    return Case(str(p))


@case("delimiter-only row in the body, numeric levels")
def _(t):
    f = frame(b=["2", "10"])
    body = text(f).splitlines(keepends=True)
    p = t / "d.csv"
    p.write_text(body[0] + ",,\n" + "".join(body[1:]))
    return Case(str(p), {"levels": {B: ["10", "2"]}})


# --- test_bad_input_corpus.py ---------------------------------------------------------------------

@case("response that overflows float64 (1e400, refused)")
def _(t):
    f = frame()
    f.loc[3, Y] = "1e400"
    return csv_case(t, f)


@case("all-missing response (refused)")
def _(t):
    f = frame()
    f[Y] = ""
    return csv_case(t, f)


@case("empty file (refused)")
def _(t):
    (t / "e.csv").write_text("")
    return Case(str(t / "e.csv"))


@case("header only (refused)")
def _(t):
    (t / "h.csv").write_text(f"{A},{B},{Y}\n")
    return Case(str(t / "h.csv"))


@case("one row (refused)")
def _(t):
    (t / "o.csv").write_text(f"{A},{B},{Y}\nsun,cool,70.5\n")
    return Case(str(t / "o.csv"))


@case("Parquet with integer room codes")
def _(t):
    f = frame(b=[1, 2])
    f[Y] = f[Y].astype(float)
    return parquet_case(t, f)


@case("Parquet with a DECIMAL response sharing 10 digits")
def _(t):
    import decimal

    import pyarrow as pa
    import pyarrow.parquet as pq

    f = frame()
    ys = [decimal.Decimal("7000000000" + v) for v in f[Y]]
    p = t / "d.parquet"
    pq.write_table(pa.table({A: f[A], B: f[B], Y: pa.array(ys, type=pa.decimal128(20, 3))}), p)
    return Case(str(p))


@case("CRLF line ends, UTF-8 byte-order mark, trailing spaces")
def _(t):
    f = frame()
    lines = [f"{A},{B},{Y}"] + [f"{a},{b},{y}  " for a, b, y in f.itertuples(index=False)]
    p = t / "w.csv"
    p.write_bytes(("\r\n".join(lines) + "\r\n").encode("utf-8-sig"))
    return Case(str(p))


@case("whitespace around level names")
def _(t):
    f = frame()
    f.loc[f.index[:3], A] = f.loc[f.index[:3], A] + " "
    f.loc[f.index[3:5], B] = "\t" + f.loc[f.index[3:5], B]
    return csv_case(t, f)


@case("cell table given to check (refused)")
def _(t):
    f = frame()
    f[Y] = f[Y].astype(float)
    g = f.groupby([A, B], sort=False)[Y].agg(["mean", "std", "size"]).reset_index()
    g.columns = [A, B, "mean", "sd", "n"]
    c = csv_case(t, g.astype(str))
    c.kw["response"] = "mean"
    return c


@case("one empty cell")
def _(t):
    return csv_case(t, frame(counts=[[4, 3], [2, 5], [3, 0]]))


@case("zero spread in every cell")
def _(t):
    f = frame()
    f[Y] = f.groupby([A, B])[Y].transform(lambda s: f"{s.astype(float).mean():.3f}")
    return csv_case(t, f)


@case("ragged row with an extra field (refused)")
def _(t):
    p = t / "d.csv"
    body = text(frame()).splitlines(keepends=True)
    body[4] = body[4].rstrip("\n") + ",9\n"
    p.write_text("".join(body))
    return Case(str(p), note="parser wording")


@case("corrupt Parquet (refused)")
def _(t):
    (t / "d.parquet").write_bytes(b"PAR1 garbage")
    return Case(str(t / "d.parquet"), note="parser wording")


# ---------------------------------------------------------------------------------------------------
# the comparison
# ---------------------------------------------------------------------------------------------------

ENGINE_NOTE = "Read through the duckdb engine:"


def run(c: Case, engine, **opts):
    kw = dict(response=Y, factors=(A, B), resamples=0, calibration=0, seed=1, timestamp=False, **opts)
    kw.update(c.kw)
    try:
        return audit.check(c.data, engine=engine, **kw)
    except AuditInputError as exc:
        return exc


def rel(a, b):
    if a is None or b is None:
        return 0.0 if a is b else math.inf
    if a == b:
        return 0.0
    return abs(a - b) / max(abs(b), 1e-300)


def parser_sentence(msg: str) -> str:
    """The message without the parser's own reason in parentheses (engine wording)."""
    head, _, rest = msg.partition(" (")
    return head + " (...)" + rest.partition(")")[2]


#: what each case did, for the report (-s prints it)
OUTCOMES: dict = {}


def assert_agree(name, c: Case, fm, fe, engine="duckdb"):
    """The engine's outcome ``fe`` equals the in-memory path's ``fm`` (see the module docstring)."""
    if isinstance(fm, Exception):
        OUTCOMES[name] = f"refused by both: {type(fm).__name__}"
        assert isinstance(fe, Exception), f"memory refused ({fm}) but {engine} accepted"
        assert type(fe) is type(fm), (type(fe).__name__, str(fe), type(fm).__name__, str(fm))
        if c.note == "parser wording":
            assert parser_sentence(str(fe)) == parser_sentence(str(fm)), (str(fe), str(fm))
        else:
            assert str(fe) == str(fm)
        return
    assert not isinstance(fe, Exception), f"memory accepted but {engine} refused: {type(fe).__name__}: {fe}"
    OUTCOMES[name] = "accepted by both"
    assert fe.mode == "moments" and fm.mode == "data"
    dm, de = fm.design.to_dict(), fe.design.to_dict()
    assert de["levels"] == dm["levels"]
    assert de["level_order"] == dm["level_order"]
    note = ENGINE_NOTE.replace("duckdb", engine)
    notes_e = [n for n in de["notes"] if not n.startswith(note)]
    assert notes_e == dm["notes"]
    assert len(notes_e) == len(de["notes"]) - 1
    assert de["dropped_rows"] == dm["dropped_rows"]
    for T in ("I", "II", "III"):
        for eff in ("A", "B", "AB", "residual"):
            a, b = fe.anova.tables[T].row(eff), fm.anova.tables[T].row(eff)
            assert a.df == b.df, (T, eff)
            assert rel(a.ss, b.ss) < 1e-9, (T, eff, a.ss, b.ss)
            assert rel(a.F, b.F) < 1e-9, (T, eff, a.F, b.F)
            assert rel(a.p, b.p) < 1e-9 or abs(a.p - b.p) < 1e-300, (T, eff, a.p, b.p)
    assert fe.exit_status() == fm.exit_status(), (fe.verdict, fm.verdict)


@pytest.mark.parametrize("name", list(CASES))
def test_engines_agree(name, tmp_path):
    c = CASES[name](tmp_path)
    assert_agree(name, c, run(c, "memory"), run(c, "duckdb"))


def test_enough_cases():
    # the acceptance: at least about 30 intake cases, refusals and acceptances both
    assert len(CASES) >= 30, len(CASES)


def test_cli_passes_decimal_and_encoding(tmp_path):
    # the command line hands --decimal and --encoding to the engine (issue 18)
    import contextlib
    import io
    import json

    from audit.cli import main

    f = frame(a=["séché", "four", "gel de silice"])
    f[Y] = f[Y].str.replace(".", ",")
    p = tmp_path / "d.tsv"
    p.write_bytes(text(f, "\t").encode("latin-1"))
    outs = {}
    for engine in ("memory", "duckdb"):
        out = io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
            code = main(["check", str(p), "--response", Y, "--factors", A, B, "--engine", engine, "--decimal", ",",
                         "--encoding", "latin-1", "--resamples", "0", "--no-diagnostics", "--json", "-"])
        assert code in (0, 1, 3)
        outs[engine] = json.loads(out.getvalue())
    row = {e: next(r for r in d["anova"]["II"] if r["effect"] == "AB") for e, d in outs.items()}
    assert row["duckdb"]["F"] == pytest.approx(row["memory"]["F"], rel=1e-9)
    assert outs["duckdb"]["design"]["levels"] == outs["memory"]["design"]["levels"]


def test_transcoding_streams_in_chunks(tmp_path, monkeypatch):
    # a UTF-16 file larger than one chunk is transcoded piecewise, never read whole
    from audit.engines import textfile

    monkeypatch.setattr(textfile, "CHUNK", 1000)
    f = frame(counts=[[40, 30], [20, 50], [30, 40]])
    c = csv_case(tmp_path, f, enc="utf-16")
    assert os.path.getsize(c.data) > 5000
    fm, fe = run(c, "memory"), run(c, "duckdb")
    assert fe.anova.tables["II"].row("AB").F == pytest.approx(fm.anova.tables["II"].row("AB").F, rel=1e-9)
