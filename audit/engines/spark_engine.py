"""Spark (PySpark) backend: a table of the session's catalog or a Parquet/CSV path.

The session is the active one, or one built with ``master`` (e.g.
``local[2]``, ``spark://host:7077``) or the session's defaults.  The same SQL
as every engine runs through ``spark.sql``; the sample key is ``rand(seed)``,
repeatable for the same table layout (Spark seeds it per partition).
"""

from __future__ import annotations

import os

from ..errors import AuditInputError
from .moments import SPARK

__all__ = ["SparkBackend", "MISSING"]

MISSING = 'engine spark: the pyspark package is not installed; install it with pip install ".[spark]"'
_VIEW = "twa_source"


def _import():
    try:
        import pyspark  # noqa: F401
        from pyspark.sql import SparkSession
    except ImportError:
        raise AuditInputError(MISSING) from None
    return SparkSession


def start_session(master: str | None = None):
    """The active Spark session, or a new one (``master`` or the defaults);
    a one-line AuditInputError naming the engine when it cannot start."""
    SparkSession = _import()
    try:
        active = SparkSession.getActiveSession()
        if active is not None and master is None:
            return active
        b = SparkSession.builder.appName("twoway-audit")
        if master:
            b = b.master(master)
        b = b.config("spark.ui.enabled", "false").config("spark.sql.shuffle.partitions", "8")
        return b.getOrCreate()
    except Exception as e:  # noqa: BLE001 - Java missing, bad master, ...: one line
        msg = " ".join(str(e).split())[:300] or type(e).__name__
        raise AuditInputError(f"engine spark: the Spark session could not start ({msg}); check --spark-master "
                              "and that a Java runtime is installed") from None


class SparkBackend:
    dialect = SPARK
    sample_key_description = "Spark rand(seed) (repeatable for the same table layout)"

    def __init__(self, data, *, master: str | None = None, session=None):
        self.spark = session or start_session(master)
        import pyspark

        self.version = pyspark.__version__
        self.data = os.fspath(data) if isinstance(data, os.PathLike) else data
        try:
            if isinstance(self.data, str) and (os.path.exists(self.data) or any(c in self.data for c in "*?/")):
                low = self.data.lower()
                if low.endswith((".csv", ".tsv", ".txt")):
                    sep = "\t" if low.endswith(".tsv") else ","
                    df = self.spark.read.option("header", "true").option("sep", sep).csv(self.data)
                    self.kind = "csv"
                else:
                    df = self.spark.read.parquet(self.data)
                    self.kind = "parquet"
            else:
                df = self.spark.table(str(self.data))
                self.kind = "table"
        except Exception as e:  # noqa: BLE001
            msg = " ".join(str(e).split())[:300]
            raise AuditInputError(f"engine spark: cannot read {self.data!r} ({msg}); expected a table name or a "
                                  "Parquet/CSV path") from None
        df.createOrReplaceTempView(_VIEW)
        self.df = df
        self.source = _VIEW
        self._seed = 0
        # what audit/engines/rules.py reads (untested: pyspark is not in the test environment)
        from pyspark.sql import functions as F

        df.withColumn("twa_rn", F.monotonically_increasing_id()).createOrReplaceTempView(_VIEW + "_rn")
        self.raw, self.raw_rn = _VIEW, _VIEW + "_rn"
        self.format = self.kind
        self.files = [str(self.data)]
        self.delimiter = ("\t" if str(self.data).lower().endswith(".tsv") else ",") if self.kind == "csv" else None

    def describe(self) -> dict:
        return {"format": self.kind, "table_or_path": str(self.data),
                "master": self.spark.sparkContext.master}

    def columns(self) -> list[str]:
        return list(self.df.columns)

    def column_type(self, name: str) -> str:
        t = self.df.schema[name].dataType.simpleString().upper()
        return {"STRING": "VARCHAR", "INT": "INTEGER", "LONG": "BIGINT", "SHORT": "SMALLINT", "BYTE": "TINYINT",
                "BOOLEAN": "BOOLEAN"}.get(t, t)

    def row_numbers(self, rns) -> dict:
        """monotonically_increasing_id is no row number: shown as given (untested)."""
        return {int(r): int(r) + 1 for r in rns}

    def column_kind(self, name: str):
        from pyspark.sql.types import DecimalType, StringType

        t = self.df.schema[name].dataType
        if isinstance(t, DecimalType):
            return ("decimal", t.scale)
        if isinstance(t, StringType):
            return ("text",)
        return "double"

    def register(self, name: str, frame) -> str:
        from pyspark.sql.types import DoubleType, StringType, StructField, StructType

        fields = [StructField(c, StringType() if c in ("fa", "fb") else DoubleType(), True) for c in frame.columns]
        rows = [tuple(None if v is None else (str(v) if c in ("fa", "fb") else float(v))
                      for c, v in zip(frame.columns, r)) for r in frame.itertuples(index=False)]
        self.spark.createDataFrame(rows, StructType(fields)).createOrReplaceTempView(name)
        return name

    def sample_key(self, seed: int) -> str:
        self._seed = int(seed)
        return f"rand({int(seed)})"

    def row_number_expr(self):
        return None

    prepare_sample = None

    def query(self, sql: str, *, label: str = "", progress=False):
        try:
            return [tuple(r) for r in self.spark.sql(sql).collect()]
        except Exception as e:  # noqa: BLE001
            msg = " ".join(str(e).split())[:300]
            raise AuditInputError(f"engine spark: query failed ({msg})") from None

    def query_frame(self, sql: str, *, label: str = "", progress=False, prepare=None):
        import pandas as pd

        rows = self.query(sql)
        cols = ["fa", "fb", "yr", "skey"]
        return pd.DataFrame(rows, columns=cols) if rows else pd.DataFrame({c: [] for c in cols})

    def close(self) -> None:
        pass
