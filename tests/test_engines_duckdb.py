"""The DuckDB engine path against the in-memory path and NIST StRD.

The engine's ANOVA of every SS type, Welch-James and HC3/HC4 must equal the
in-memory path's to 1e-9 relative on the same rows (reference: the in-memory
path, itself tied to statsmodels in test_anova_reference.py / test_methods_*.py);
NIST SmLs01-09 through the engine keep LRE >= 9 (source: NIST StRD certified
values; McCullough 1998).  200,000 generated rows here keep the suite fast;
benchmarks/bench_out_of_core.py runs 1,000,000 and more.
"""

from __future__ import annotations

import math
import os
import sys

import numpy as np
import pytest

duckdb = pytest.importorskip("duckdb", reason="duckdb not installed (pip install '.[duckdb]')")

import audit  # noqa: E402
from audit.engines.duckdb_engine import DuckDBBackend  # noqa: E402
from audit.engines.scan import run_scan  # noqa: E402
from audit.errors import AuditInputError  # noqa: E402

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "benchmarks"))
from make_big_parquet import write  # noqa: E402

from test_nist import MIN_LRE, SETS, lre, read_strd  # noqa: E402

ROWS = 200_000
EXACT = ("classical-f", "welch-james", "hc3-wald", "hc4-wald")


@pytest.fixture(scope="module")
def parquet_path(tmp_path_factory):
    return str(write(str(tmp_path_factory.mktemp("big") / "rows.parquet"), ROWS, chunk=100_000, seed=11))


def rel(a, b):
    if a is None or b is None:
        return 0.0 if a is b else math.inf
    return abs(a - b) / max(abs(b), 1e-300)


def compare(fe, fm, tol=1e-9):
    for T in ("I", "II", "III"):
        for e in ("A", "B", "AB", "residual"):
            a, b = fe.anova.tables[T].row(e), fm.anova.tables[T].row(e)
            assert a.df == b.df
            assert rel(a.ss, b.ss) < tol, (T, e, a.ss, b.ss)
            if b.F is not None:
                assert rel(a.F, b.F) < tol and rel(a.p, b.p) < tol or abs(a.p - b.p) < 1e-300
    mm = {(r.id, r.effect): r for r in fm.methods}
    for r in fe.methods:
        if r.id in EXACT:
            o = mm[(r.id, r.effect)]
            assert rel(r.statistic, o.statistic) < tol, (r.id, r.effect, r.statistic, o.statistic)
            assert r.df1 == pytest.approx(o.df1, rel=tol) and r.df2 == pytest.approx(o.df2, rel=tol)


def test_duckdb_equals_memory_every_ss_type_welch_hc(parquet_path):
    # reference: the in-memory path on the same file (same rows), to 1e-9 relative
    kw = dict(response="strength", factors=("resin", "angle"), seed=5, resamples=0, calibration=0)
    fe = audit.check(parquet_path, engine="duckdb", sample_per_cell=200, **kw)
    fm = audit.check(parquet_path, engine="memory", **kw)
    assert fe.mode == "moments" and fe.provenance["engine"]["name"] == "duckdb"
    assert fe.cells.N == ROWS
    compare(fe, fm)
    # skewness / kurtosis pooled from cell moments equal those of every residual (common practice)
    ne = next(d for d in fe.diagnostics if d.id == "normality").values
    nm = next(d for d in fm.diagnostics if d.id == "normality").values
    assert ne["skewness"] == pytest.approx(nm["skewness"], rel=1e-8, abs=1e-12)
    assert ne["excess_kurtosis"] == pytest.approx(nm["excess_kurtosis"], rel=1e-8)
    # Levene / Brown-Forsythe / kurtosis-adjusted Bartlett from moments equal the row-level tests
    he = next(d for d in fe.diagnostics if d.id == "homogeneity").values
    hm = next(d for d in fm.diagnostics if d.id == "homogeneity").values
    for key in ("levene_mean", "brown_forsythe", "bartlett_adjusted"):
        assert he[key]["statistic"] == pytest.approx(hm[key]["statistic"], rel=1e-8), key
    # the sample-based checks say so, with size and seed
    for d in fe.diagnostics:
        if d.id in ("outliers", "influence", "fragility", "scale") and d.severity != "not-run":
            assert d.values["sample"]["seed"] == 5 and "sample of 4,000 rows" in d.summary


def test_sample_is_repeatable_and_sized(parquet_path):
    b = DuckDBBackend(parquet_path)
    s1 = run_scan(b, response="strength", factors=("resin", "angle"), sample_per_cell=300, seed=9, progress=False)
    s2 = run_scan(b, response="strength", factors=("resin", "angle"), sample_per_cell=300, seed=9, progress=False)
    s3 = run_scan(b, response="strength", factors=("resin", "angle"), sample_per_cell=300, seed=10, progress=False)
    assert np.array_equal(s1.sample_rows, s2.sample_rows) and np.array_equal(s1.sample_y, s2.sample_y)
    assert not np.array_equal(s1.sample_rows, s3.sample_rows)
    counts = np.bincount(s1.sample_a * 5 + s1.sample_b, minlength=20)
    assert (counts == np.minimum(300, s1.moments.cells.counts.ravel())).all()


@pytest.mark.parametrize("name", SETS)
def test_nist_through_duckdb_csv(name, tmp_path):
    # source: NIST StRD certified values (lines 41-47 of the file); LRE >= 9 (McCullough 1998)
    frame, cert = read_strd(name)
    path = tmp_path / f"{name}.csv"
    path.write_text("A,B,y\n" + "".join(f"{a},{b},{y}\n" for a, b, y in frame.itertuples(index=False)))
    f = audit.check(str(path), response="y", factors=("A", "B"), engine="duckdb", diagnostics=False, methods=False,
                    calibration=0, seed=1)
    t1 = f.anova.tables["I"]
    between = sum(t1.row(e).ss for e in ("A", "B", "AB"))
    within = t1.row("residual").ss
    assert lre(between, cert["ss_between"]) >= MIN_LRE
    assert lre(within, cert["ss_within"]) >= MIN_LRE
    assert lre(f.anova.ms_error, cert["ms_within"]) >= MIN_LRE


@pytest.mark.parametrize("name", ["SmLs07", "SmLs08", "SmLs09"])
def test_nist_through_duckdb_parquet_decimal(name, tmp_path):
    # source: NIST StRD certified values; LRE >= 9 (McCullough 1998): a DECIMAL column is centred exactly
    import decimal

    import pyarrow as pa
    import pyarrow.parquet as pq

    frame, cert = read_strd(name)
    ys = [decimal.Decimal(v) for v in frame["y"]]
    t = pa.table({"A": frame["A"], "B": frame["B"], "y": pa.array(ys, type=pa.decimal128(20, 1))})
    path = tmp_path / f"{name}.parquet"
    pq.write_table(t, path)
    f = audit.check(str(path), response="y", factors=("A", "B"), engine="duckdb", diagnostics=False, methods=False,
                    calibration=0, seed=1)
    t1 = f.anova.tables["I"]
    assert lre(sum(t1.row(e).ss for e in ("A", "B", "AB")), cert["ss_between"]) >= MIN_LRE
    assert lre(t1.row("residual").ss, cert["ss_within"]) >= MIN_LRE


def test_missing_per_cell_counted_in_sql(tmp_path):
    # common practice: NULL responses are counted per cell, rows with a NULL factor separately
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(2)
    a = np.repeat(["p", "q"], 40)
    b = np.tile(np.repeat(["u", "v"], 20), 2)
    y = rng.normal(size=80)
    ym = [None if i in (0, 1, 45) else float(v) for i, v in enumerate(y)]
    am = [None if i == 79 else v for i, v in enumerate(a)]
    pq.write_table(pa.table({"a": am, "b": b, "y": ym}), tmp_path / "m.parquet")
    f = audit.check(str(tmp_path / "m.parquet"), response="y", factors=("a", "b"), engine="duckdb", resamples=0,
                    calibration=0, seed=1)
    miss = next(d for d in f.diagnostics if d.id == "missingness").values
    assert miss["dropped_by_cell"] == [[2, 0], [1, 0]] and miss["missing_factor"] == 1


def test_missing_column_and_bad_glob_one_line(tmp_path, parquet_path):
    with pytest.raises(AuditInputError, match="engine duckdb: no file matches"):
        audit.check(str(tmp_path / "none*.parquet"), response="y", factors=("a", "b"), engine="duckdb")
    with pytest.raises(AuditInputError, match="column 'nope' not found"):
        audit.check(parquet_path, response="nope", factors=("resin", "angle"), engine="duckdb")


def test_engine_missing_names_the_install(monkeypatch, parquet_path):
    import builtins

    real = builtins.__import__

    def fake(name, *a, **k):
        if name == "duckdb":
            raise ImportError("no duckdb")
        return real(name, *a, **k)

    monkeypatch.setattr(builtins, "__import__", fake)
    with pytest.raises(AuditInputError, match=r'pip install "\.\[duckdb\]"'):
        audit.check(parquet_path, response="strength", factors=("resin", "angle"), engine="duckdb")


def test_duckdb_never_prints_its_own_progress_bar(parquet_path):
    # DuckDB's built-in bar writes to stdout after 2 s of a query, which would corrupt
    # `--json -` on a large file (seen in the 100M-row benchmark); our bar reads
    # query_progress() and writes to stderr (common practice: machine output on stdout only)
    b = DuckDBBackend(parquet_path)
    got = dict(b.con.execute("select name, value from duckdb_settings() "
                             "where name in ('enable_progress_bar', 'enable_progress_bar_print')").fetchall())
    assert got == {"enable_progress_bar": "true", "enable_progress_bar_print": "false"}
