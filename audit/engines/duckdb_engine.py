"""Embedded DuckDB backend: Parquet and CSV files (one path, a glob, or a list).

Runs in process with every core, streaming the files; only the cell
aggregates, the exact medians' buffers and the sample come back.  The sample
key is a hash of (seed, file name, row number within the file) for Parquet
(parallel and repeatable), and DuckDB's ``random()`` seeded with ``setseed``
on one thread for CSV (which has no row number).
"""

from __future__ import annotations

import glob
import os
import threading
from contextlib import contextmanager

from ..errors import AuditInputError
from .moments import DUCKDB

__all__ = ["DuckDBBackend", "open_duckdb", "MISSING"]

MISSING = 'engine duckdb: the duckdb package is not installed; install it with pip install ".[duckdb]"'
PARQUET_EXT = (".parquet", ".pq", ".parq")
TEXT_EXT = (".csv", ".tsv", ".txt")


def _import():
    try:
        import duckdb
    except ImportError:
        raise AuditInputError(MISSING) from None
    return duckdb


def expand(data) -> list[str]:
    """Files named by a path, a glob or a list of them (sorted, each must exist)."""
    items = [data] if isinstance(data, (str, os.PathLike)) else list(data)
    files: list[str] = []
    for it in items:
        it = os.fspath(it)
        found = sorted(glob.glob(it)) if glob.has_magic(it) else ([it] if os.path.exists(it) else [])
        if not found:
            raise AuditInputError(f"engine duckdb: no file matches {it!r}; expected a Parquet or CSV file, "
                                  "a glob such as 'data/*.parquet', or a list of them")
        files += found
    return files


def _sql_str(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


class DuckDBBackend:
    dialect = DUCKDB

    def __init__(self, data, *, threads: int | None = None, memory_limit: str | None = None):
        duckdb = _import()
        self.version = duckdb.__version__
        self.files = expand(data)
        exts = {os.path.splitext(f)[1].lower() for f in self.files}
        if exts <= set(PARQUET_EXT):
            self.format = "parquet"
        elif exts <= set(TEXT_EXT):
            self.format = "csv"
        else:
            raise AuditInputError(f"engine duckdb: expected Parquet (.parquet) or text (.csv/.tsv/.txt) files of "
                                  f"one kind, found {sorted(exts)}; give files of one format")
        self.con = duckdb.connect(":memory:")
        self.threads = threads or os.cpu_count() or 1
        self.con.execute(f"SET threads = {int(self.threads)}")
        self.con.execute("SET preserve_insertion_order = false")
        # DuckDB's own bar writes to stdout, where it would corrupt `--json -`; our bar
        # (TerminalProgress, on stderr) reads query_progress(), which needs the bar enabled
        self.con.execute("SET enable_progress_bar = true")
        self.con.execute("SET enable_progress_bar_print = false")
        if memory_limit:
            self.con.execute(f"SET memory_limit = {_sql_str(memory_limit)}")
        lst = "[" + ", ".join(_sql_str(f) for f in self.files) + "]"
        if self.format == "parquet":
            self.source = f"read_parquet({lst}, filename = true, file_row_number = true)"
            self.sample_key_description = "hash(seed, file name, row number in the file)"
        else:
            self.source = f"read_csv({lst}, header = true, all_varchar = true, filename = true)"
            self.sample_key_description = "DuckDB random() after setseed(seed), one thread"
        try:
            self._cols = self.con.execute(f"DESCRIBE SELECT * FROM {self.source}").fetchall()
        except duckdb.Error as e:
            raise AuditInputError(f"engine duckdb: cannot read {self.files[0]!r}: {str(e).splitlines()[0]}") from None

    def describe(self) -> dict:
        return {"format": self.format, "files": len(self.files), "first_file": self.files[0]}

    def columns(self) -> list[str]:
        return [c[0] for c in self._cols if c[0] not in ("filename", "file_row_number")]

    def column_kind(self, name: str):
        t = {c[0]: c[1] for c in self._cols}[name].upper()
        if t.startswith("DECIMAL"):
            scale = int(t.split(",")[1].rstrip(") "))
            return ("decimal", scale)
        if t in ("VARCHAR", "TEXT", "STRING") or t.startswith("VARCHAR"):
            return ("text",)
        return "double"

    def register(self, name: str, frame) -> str:
        self.con.register(name, frame)
        return name

    def sample_key(self, seed: int) -> str:
        self._seed = int(seed)
        if self.format == "parquet":
            return f"CAST(hash({int(seed)}, filename, file_row_number) >> 11 AS DOUBLE) / 9007199254740992.0"
        return "random()"

    def row_number_expr(self):
        return "file_row_number" if self.format == "parquet" else None

    @contextmanager
    def prepare_sample(self, seed: int = 0):
        if self.format != "csv":
            yield
            return
        self.con.execute("SET threads = 1")
        try:
            self.con.execute(f"SELECT setseed({(seed % 2**31) / 2**31!r})")
            yield
        finally:
            self.con.execute(f"SET threads = {int(self.threads)}")

    def _run(self, fn, label, progress):
        if not progress:
            return fn()
        from ..progress import TerminalProgress

        bar = TerminalProgress(f"duckdb {label}")
        stop = threading.Event()

        def poll():
            while not stop.wait(0.25):
                try:
                    p = self.con.query_progress()
                except Exception:  # noqa: BLE001 - progress is best effort
                    return
                if p is not None and p >= 0:
                    bar(int(p * 10), 1000)

        th = threading.Thread(target=poll, daemon=True)
        th.start()
        try:
            out = fn()
        finally:
            stop.set()
            th.join()
        if bar.shown:
            bar(1000, 1000)
        return out

    def query(self, sql: str, *, label: str = "", progress=False):
        duckdb = _import()
        try:
            return self._run(lambda: self.con.execute(sql).fetchall(), label, progress)
        except duckdb.Error as e:
            raise AuditInputError(f"engine duckdb: query failed: {str(e).splitlines()[0]}") from None

    def query_frame(self, sql: str, *, label: str = "", progress=False, prepare=None, seed: int = 0):
        duckdb = _import()
        try:
            if prepare is not None:
                with prepare(self._seed):
                    return self._run(lambda: self.con.execute(sql).df(), label, progress)
            return self._run(lambda: self.con.execute(sql).df(), label, progress)
        except duckdb.Error as e:
            raise AuditInputError(f"engine duckdb: query failed: {str(e).splitlines()[0]}") from None

    _seed = 0

    def close(self) -> None:
        self.con.close()


def open_duckdb(data, **kw) -> DuckDBBackend:
    return DuckDBBackend(data, **kw)
