"""Audit data where it lives: per-cell moments and a seeded sample computed by
an SQL engine (embedded DuckDB, or Spark for cluster tables), fed to the same
:class:`~audit.design.CellStats` core as the in-memory path.

=================  ==========================================================
module             role
=================  ==========================================================
moments.py         the moment definitions (SQL, one dialect table), assembly
scan.py            the three passes and the sample, shared by every engine
duckdb_engine.py   embedded DuckDB: Parquet / CSV files, globs, lists
spark_engine.py    PySpark: a catalog table or a path, ``--spark-master``
audit.py           Findings from moments + sample (what runs on which)
=================  ==========================================================
"""

from __future__ import annotations

import glob
import os

from ..errors import OptionError

__all__ = ["ENGINES", "AUTO_ENGINE_BYTES", "choose_engine", "open_backend"]

ENGINES = ("auto", "memory", "duckdb", "spark")

#: files (or globs) larger than this on disk go to DuckDB when ``engine="auto"``:
#: the in-memory path holds about 400 bytes per row (1,000,000 rows: ~413 MB), so
#: 256 MiB of Parquet (several times more rows than of CSV) is near what it can hold
AUTO_ENGINE_BYTES = 256 * 2**20


def _size(data) -> int | None:
    items = [data] if isinstance(data, (str, os.PathLike)) else (list(data) if isinstance(data, (list, tuple)) else None)
    if items is None:
        return None
    total = 0
    for it in items:
        it = os.fspath(it)
        for f in (glob.glob(it) if glob.has_magic(it) and not os.path.exists(it) else [it]):
            try:
                total += os.path.getsize(f)
            except OSError:
                pass
    return total


def choose_engine(data, engine: str | None) -> str:
    """'memory', 'duckdb' or 'spark' for ``data``: as given, or for 'auto'
    (None) DuckDB when the data are a glob, a list of files, or larger than
    :data:`AUTO_ENGINE_BYTES` and DuckDB is installed, else memory."""
    if engine is None:
        engine = "auto"
    if engine not in ENGINES:
        raise OptionError(f"engine: expected one of {', '.join(ENGINES)}, found {engine!r}; try duckdb")
    if engine != "auto":
        return engine
    is_path = isinstance(data, (str, os.PathLike))
    many = isinstance(data, (list, tuple)) or (is_path and glob.has_magic(os.fspath(data))
                                               and not os.path.exists(data))
    size = _size(data) if (is_path or many) else None
    if many or (size is not None and size > AUTO_ENGINE_BYTES):
        try:
            import duckdb  # noqa: F401
        except ImportError:
            if many:
                from .duckdb_engine import MISSING
                from ..errors import AuditInputError

                raise AuditInputError(MISSING + " (several files are read through an engine)") from None
            return "memory"
        return "duckdb"
    return "memory"


def open_backend(engine: str, data, *, spark_master: str | None = None, encoding: str | None = None, sheet=None):
    if engine == "duckdb":
        from .duckdb_engine import DuckDBBackend

        return DuckDBBackend(data, encoding=encoding, sheet=sheet)
    if engine == "spark":
        from .spark_engine import SparkBackend

        if sheet is not None:
            raise OptionError("sheet: not available with engine spark (it reads text and Parquet); leave it out "
                              "or use --engine memory")
        return SparkBackend(data, master=spark_master, encoding=encoding)
    raise OptionError(f"engine: expected duckdb or spark here, found {engine!r}")
