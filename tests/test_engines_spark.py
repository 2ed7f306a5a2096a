"""The Spark engine in local mode (local[2]) gives the DuckDB engine's numbers
on the same Parquet file to 1e-9 (reference: the DuckDB path, itself tied to
the in-memory path and NIST StRD in test_engines_duckdb.py), and on a handful
of test_engine_parity.py's intake cases the in-memory path's levels, notes,
dropped rows, refusals and messages (reference: the in-memory path, tied to
statsmodels / published examples there).  Skipped only when pyspark is missing
or a Spark session cannot start, saying why."""

from __future__ import annotations

import math
import os
import sys

import pytest

pytest.importorskip("duckdb", reason="duckdb not installed (pip install '.[duckdb]')")
pytest.importorskip("pyspark", reason="pyspark not installed (pip install '.[spark]')")

import audit  # noqa: E402
from audit.errors import AuditInputError  # noqa: E402

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "benchmarks"))
sys.path.insert(0, os.path.dirname(__file__))
from make_big_parquet import write  # noqa: E402
from test_engine_parity import CASES, assert_agree, run  # noqa: E402


@pytest.fixture(scope="module")
def spark():
    from audit.engines.spark_engine import start_session

    try:
        s = start_session("local[2]")
    except AuditInputError as e:
        pytest.skip(f"Spark cannot start here: {e}")
    yield s
    s.stop()


def rel(a, b):
    return abs(a - b) / max(abs(b), 1e-300)


def test_spark_equals_duckdb(spark, tmp_path):
    path = str(write(str(tmp_path / "rows.parquet"), 50_000, chunk=50_000, seed=4))
    kw = dict(response="strength", factors=("resin", "angle"), seed=5, resamples=0, calibration=0,
              diagnostics=True, sample_per_cell=100)
    fs = audit.check(path, engine="spark", spark_master="local[2]", **kw)
    fd = audit.check(path, engine="duckdb", **kw)
    assert fs.provenance["engine"]["name"] == "spark" and fs.mode == "moments"
    for T in ("I", "II", "III"):
        for e in ("A", "B", "AB", "residual"):
            a, b = fs.anova.tables[T].row(e), fd.anova.tables[T].row(e)
            assert rel(a.ss, b.ss) < 1e-9, (T, e)
    md = {(r.id, r.effect): r for r in fd.methods}
    for r in fs.methods:
        if r.id in ("classical-f", "welch-james", "hc3-wald", "hc4-wald"):
            assert rel(r.statistic, md[(r.id, r.effect)].statistic) < 1e-9, r.id
    hs = next(d for d in fs.diagnostics if d.id == "homogeneity").values
    hd = next(d for d in fd.diagnostics if d.id == "homogeneity").values
    assert rel(hs["brown_forsythe"]["statistic"], hd["brown_forsythe"]["statistic"]) < 1e-9
    assert math.isclose(next(d for d in fs.diagnostics if d.id == "normality").values["excess_kurtosis"],
                        next(d for d in fd.diagnostics if d.id == "normality").values["excess_kurtosis"],
                        rel_tol=1e-9)


#: intake cases of test_engine_parity.py run on Spark too (a few, each a Spark job of ~2 s)
SPARK_CASES = (
    "levels 15 and 15.0 merged",                              # merged spellings, with the note
    "non-numeric response names value and row (refused)",     # same message, same line number
    "missing values dropped and counted per cell",            # counts per cell and rows listed
    "decimal commas detected in a ';' file, factor with decimal commas",   # sniffed ';', decimal commas
    "infinite response in Parquet doubles (refused)",         # a native double column
)


@pytest.mark.parametrize("name", SPARK_CASES)
def test_spark_intake_parity(spark, name, tmp_path):
    c = CASES[name](tmp_path)
    assert_agree(name, c, run(c, "memory"), run(c, "spark", spark_master="local[2]"), engine="spark")
