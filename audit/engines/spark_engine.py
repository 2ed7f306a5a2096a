"""Spark (PySpark) backend: a table of the session's catalog or a Parquet/CSV path.

The session is the active one, or one built with ``master`` (e.g.
``local[2]``, ``spark://host:7077``) or the session's defaults.  The same SQL
as every engine runs through ``spark.sql`` (the differences are the dialect's,
:data:`audit.engines.moments.SPARK`); the sample key is ``rand(seed)``,
repeatable for the same table layout (Spark seeds it per partition).

A local text file is opened as the DuckDB engine opens it
(:class:`~audit.engines.textfile.TextFile`: encoding, sniffed delimiter, header
names), then read by Spark's CSV reader as text columns.  Row order is
``monotonically_increasing_id()`` (partition index << 33 + position in the
partition); :meth:`SparkBackend.row_numbers` turns it into the record's ordinal
from the partitions' counts, and for a text file into its line number.
"""

from __future__ import annotations

import glob
import os
import re

from .. import intake
from ..errors import AuditInputError, DataFileError, OptionError
from .moments import SPARK

__all__ = ["SparkBackend", "MISSING"]

MISSING = 'engine spark: the pyspark package is not installed; install it with pip install ".[spark]"'
_VIEW = "twa_source"
PARQUET_EXT = (".parquet", ".pq", ".parq")
_SUFFIXES = tuple(intake.TEXT_SUFFIXES) + PARQUET_EXT + (".xlsx", ".json")


def hadoop_literal(path: str) -> str:
    """A path Spark (Hadoop's glob) reads literally: its glob characters backslash-escaped."""
    return re.sub(r"([\\*?\[\]{}])", r"\\\1", path)


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

    def __init__(self, data, *, master: str | None = None, session=None, encoding: str | None = None):
        self.spark = session or start_session(master)
        import pyspark

        self.version = pyspark.__version__
        self.data = os.fspath(data) if isinstance(data, os.PathLike) else data
        self.texts: list = []
        self.delimiter = None
        is_path = isinstance(self.data, str) and (os.path.exists(self.data) or any(c in self.data for c in "*?/")
                                                  or self.data.lower().endswith(_SUFFIXES))
        suffix = os.path.splitext(self.data)[1].lower() if is_path else ""
        if is_path and (os.path.isfile(self.data) or not (os.path.exists(self.data) or glob.has_magic(self.data))):
            # one local file (not a folder of Parquet parts, not a glob): the in-memory intake's
            # path checks (not found, file options) and file-type errors
            intake.check_path(self.data, encoding=encoding)
            if suffix not in intake.TEXT_SUFFIXES and suffix not in PARQUET_EXT:
                hint = "" if suffix not in intake.SUPPORTED else " (engine spark reads Parquet and text; use " \
                    "--engine memory)"
                raise DataFileError(f"{self.data}: unsupported file type {suffix!r}; expected one of "
                                    f"{', '.join(intake.SUPPORTED)}{hint}")
            if suffix in intake.TEXT_SUFFIXES:
                from .textfile import TextFile

                # the in-memory intake's encoding, delimiter and header rules (their errors too);
                # Spark's reader would replace bytes that are not UTF-8, so they are checked first
                tf = TextFile(self.data, encoding=encoding)
                self.texts.append(tf)
                tf.check_decodable()
        elif is_path and os.path.isdir(self.data) and not any(
                not f.startswith((".", "_")) for _, _, fs in os.walk(self.data) for f in fs):
            intake.check_path(self.data)      # a folder without data files: the in-memory intake's error
        elif encoding is not None:
            raise OptionError("encoding: applies to one local text file with engine spark; leave it out")
        try:
            if self.texts:
                from pyspark.sql.types import StringType, StructField, StructType

                tf = self.texts[0]
                self.delimiter = tf.delimiter
                schema = StructType([StructField(n, StringType(), True) for n in tf.names])
                # quoted line breaks need the (unsplit) multi-line reader; a quote in the first
                # 64 KiB turns it on
                multi = tf.quoted
                df = (self.spark.read.schema(schema).option("header", "true").option("sep", tf.delimiter)
                      .option("quote", '"').option("escape", '"').option("encoding", "UTF-8")
                      .option("multiLine", "true" if multi else "false").option("mode", "PERMISSIVE")
                      .csv(hadoop_literal(tf.read_path)))
                self.kind = "csv"
            elif is_path:
                lit = hadoop_literal(self.data) if os.path.isfile(self.data) else self.data
                if suffix in intake.TEXT_SUFFIXES:
                    sep = "\t" if suffix == ".tsv" else ","
                    self.delimiter = sep
                    df = self.spark.read.option("header", "true").option("sep", sep).csv(lit)
                    self.kind = "csv"
                else:
                    try:
                        df = self.spark.read.parquet(lit)
                    except Exception as e:  # noqa: BLE001
                        if not os.path.isfile(self.data):
                            raise
                        first = " ".join(str(e).split())[:200]
                        raise DataFileError(f"{self.data}: cannot be read as a Parquet file ({first})") from None
                    self.kind = "parquet"
            else:
                df = self.spark.table(str(self.data))
                self.kind = "table"
        except AuditInputError:
            raise
        except Exception as e:  # noqa: BLE001
            msg = " ".join(str(e).split())[:300]
            raise AuditInputError(f"engine spark: cannot read {self.data!r} ({msg}); expected a table name or a "
                                  "Parquet/CSV path") from None
        df.createOrReplaceTempView(_VIEW)
        self.df = df
        self.source = _VIEW
        self._seed = 0
        # what audit/engines/rules.py reads: the rows with their order (raw_rn), the source's kind,
        # its file name for messages, the delimiter (decimal commas are refused beside a comma)
        from pyspark.sql import functions as F

        df.withColumn("twa_rn", F.monotonically_increasing_id()).createOrReplaceTempView(_VIEW + "_rn")
        self.raw, self.raw_rn = _VIEW, _VIEW + "_rn"
        self.format = self.kind
        self.files = [str(self.data)]
        self._starts = None

    def describe(self) -> dict:
        return {"format": self.kind, "table_or_path": str(self.data),
                "master": self.spark.sparkContext.master}

    def columns(self) -> list[str]:
        return list(self.df.columns)

    def column_type(self, name: str) -> str:
        t = self.df.schema[name].dataType.simpleString().upper()
        return {"STRING": "VARCHAR", "INT": "INTEGER", "LONG": "BIGINT", "SHORT": "SMALLINT", "BYTE": "TINYINT",
                "BOOLEAN": "BOOLEAN"}.get(t, t)

    def _ordinals(self, rns) -> dict:
        """1-based record ordinals (file order) of monotonically_increasing_id values: the
        partitions' row counts (one small GROUP BY, once) give each partition's first ordinal."""
        if self._starts is None:
            rows = self.query(f"SELECT shiftright(twa_rn, 33) AS p, COUNT(*) FROM {self.raw_rn} GROUP BY 1",
                              label="row numbers")
            self._starts, acc = {}, 0
            for p, n in sorted((int(p), int(n)) for p, n in rows):
                self._starts[p] = acc
                acc += n
        mask = (1 << 33) - 1
        return {int(r): self._starts.get(int(r) >> 33, 0) + (int(r) & mask) + 1 for r in rns}

    def row_numbers(self, rns) -> dict:
        """Report row numbers for engine row-order numbers: file lines for a text file (the
        header is line 1), else 1-based row positions (as the in-memory intake)."""
        ords = self._ordinals(rns)
        if self.texts:
            lines = self.texts[0].lines(list(ords.values()))
            return {r: lines[o] for r, o in ords.items()}
        return ords

    def column_kind(self, name: str):
        from pyspark.sql.types import DecimalType, StringType

        t = self.df.schema[name].dataType
        if isinstance(t, DecimalType):
            return ("decimal", t.scale)
        if isinstance(t, StringType):
            return ("text",)
        return "double"

    def register(self, name: str, frame) -> str:
        """A small pandas frame as a temporary view: numeric columns as DOUBLE, the others
        (text) as STRING."""
        from pandas.api.types import is_numeric_dtype
        from pyspark.sql.types import DoubleType, StringType, StructField, StructType

        text = [not is_numeric_dtype(frame[c].dtype) for c in frame.columns]
        fields = [StructField(c, StringType() if tx else DoubleType(), True) for c, tx in zip(frame.columns, text)]
        rows = [tuple(None if v is None else (str(v) if tx else float(v))
                      for tx, v in zip(text, r)) for r in frame.itertuples(index=False)]
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
        for t in self.texts:
            t.close()
