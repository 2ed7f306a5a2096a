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
import re
import threading
from contextlib import contextmanager

from .. import intake
from ..errors import AuditInputError, DataFileError
from .moments import DUCKDB

__all__ = ["DuckDBBackend", "open_duckdb", "MISSING"]

MISSING = 'engine duckdb: the duckdb package is not installed; install it with pip install ".[duckdb]"'
PARQUET_EXT = (".parquet", ".pq", ".parq")
TEXT_EXT = (".csv", ".tsv", ".tab", ".txt", ".dat", "")


def _import():
    try:
        import duckdb
    except ImportError:
        raise AuditInputError(MISSING) from None
    return duckdb


def glob_escape(path: str) -> str:
    """A file name DuckDB reads literally: its glob characters each in a class of one."""
    return re.sub(r"([\[*?])", r"[\1]", path)


def expand(data, *, sheet=None, encoding=None) -> list[str]:
    """Files named by a path, a glob or a list of them (sorted).  A name that exists is
    literal even when it holds glob characters (``e_odd[1].csv``); one that does not exist
    and has none gets the in-memory intake's errors (not found, a folder, options that
    do not apply to the file)."""
    items = [data] if isinstance(data, (str, os.PathLike)) else list(data)
    files: list[str] = []
    for it in items:
        it = os.fspath(it)
        if os.path.exists(it) or not glob.has_magic(it):
            path, suffix, _, _ = intake.check_path(it, sheet=sheet, encoding=encoding)
            files.append(path)
            continue
        found = sorted(f for f in glob.glob(it) if os.path.isfile(f))
        if not found:
            raise AuditInputError(f"engine duckdb: no file matches {it!r}; expected a Parquet or CSV file, "
                                  "a glob such as 'data/*.parquet', or a list of them")
        for f in found:
            intake.check_path(f, sheet=sheet, encoding=encoding)
        files += found
    return files


def _sql_str(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


class DuckDBBackend:
    dialect = DUCKDB

    def __init__(self, data, *, threads: int | None = None, memory_limit: str | None = None,
                 encoding: str | None = None, sheet=None):
        duckdb = _import()
        self.version = duckdb.__version__
        self.files = expand(data, sheet=sheet, encoding=encoding)
        exts = {os.path.splitext(f)[1].lower() for f in self.files}
        self.texts: list = []
        self._file_counts = None
        if exts <= set(PARQUET_EXT):
            self.format = "parquet"
        elif exts <= set(TEXT_EXT):
            self.format = "csv"
        else:
            bad = sorted(exts - set(PARQUET_EXT) - set(TEXT_EXT))
            if len(self.files) == 1 and bad[0] not in intake.SUPPORTED:
                raise DataFileError(f"{self.files[0]}: unsupported file type {bad[0]!r}; expected one of "
                                    f"{', '.join(intake.SUPPORTED)}")
            raise AuditInputError(f"engine duckdb: expected Parquet (.parquet) or text ({', '.join(TEXT_EXT[:-1])}) "
                                  f"files of one kind, found {sorted(exts)}; give files of one format (use "
                                  "--engine memory for .xlsx)")
        self.con = duckdb.connect(":memory:")
        self.threads = threads or os.cpu_count() or 1
        self.con.execute(f"SET threads = {int(self.threads)}")
        # DuckDB's own bar writes to stdout, where it would corrupt `--json -`; our bar
        # (TerminalProgress, on stderr) reads query_progress(), which needs the bar enabled
        self.con.execute("SET enable_progress_bar = true")
        self.con.execute("SET enable_progress_bar_print = false")
        if memory_limit:
            self.con.execute(f"SET memory_limit = {_sql_str(memory_limit)}")
        self.delimiter = None
        try:
            if self.format == "parquet":
                self._open_parquet()
            else:
                self._open_text(encoding)
        except BaseException:
            self.close()
            raise

    def _open_parquet(self):
        duckdb = _import()
        lst = "[" + ", ".join(_sql_str(glob_escape(f)) for f in self.files) + "]"
        src = f"read_parquet({lst}, filename = true, file_row_number = true)"
        self.sample_key_description = "hash(seed, file name, row number in the file)"
        try:
            cols = self.con.execute(f"DESCRIBE SELECT * FROM {src}").fetchall()
            names = [r[0] for r in self.con.execute(
                f"SELECT name FROM parquet_schema({_sql_str(glob_escape(self.files[0]))}) "
                "WHERE num_children IS NULL OR num_children = 0").fetchall()]
        except duckdb.Error as e:
            raise DataFileError(f"{self.files[0]}: cannot be read as a Parquet file "
                                f"({str(e).splitlines()[0]})") from None
        intake.header_names(names, self.files[0])
        idx = "CASE filename " + " ".join(f"WHEN {_sql_str(f)} THEN {i}" for i, f in enumerate(self.files)) + " END"
        self.con.execute(f"CREATE TEMP VIEW twa_raw AS SELECT *, CAST({idx} AS BIGINT) * {2 ** 40} + file_row_number "
                         f"AS twa_rn FROM {src}")
        self.raw, self.raw_rn = "twa_raw", "twa_raw"
        self._cols = [c for c in cols if c[0] not in ("filename", "file_row_number")]

    def _open_text(self, encoding):
        duckdb = _import()
        from .textfile import TextFile

        for f in self.files:
            self.texts.append(TextFile(f, encoding=encoding))
        first = self.texts[0]
        for t in self.texts[1:]:
            if t.names != first.names:
                raise DataFileError(f"{t.path}: its header ({', '.join(t.names)}) differs from that of "
                                    f"{first.path} ({', '.join(first.names)}); expected files of one layout")
        self.delimiter = first.delimiter
        self._text_views()
        try:
            self._cols = self.con.execute("DESCRIBE SELECT * FROM twa_raw").fetchall()
        except duckdb.Error as e:
            raise DataFileError(f"{self.files[0]}: cannot be read as delimited text ({str(e).splitlines()[0]}); "
                                "expected one header line, then one row per observation") from None
        self._cols = [c for c in self._cols if c[0] != "twa_file"]

    def _text_views(self):
        parts = [t.duckdb_source(_sql_str, glob_escape) for t in self.texts]
        if len(parts) == 1:
            src = parts[0]
        else:
            src = " UNION ALL ".join(f"SELECT *, {i} AS twa_file FROM {p}" for i, p in enumerate(parts))
            src = f"({src})"
        self.sample_key_description = "DuckDB random() after setseed(seed), one thread"
        self.con.execute(f"CREATE OR REPLACE TEMP VIEW twa_raw AS SELECT * FROM {src}")
        # row order as an explicit column: a window with an empty OVER keeps the file's order (DuckDB docs,
        # "Order preservation"); only the intake queries use it
        self.con.execute("SET preserve_insertion_order = true")
        self.con.execute("CREATE OR REPLACE TEMP VIEW twa_raw_rn AS SELECT *, row_number() OVER () AS twa_rn "
                         "FROM twa_raw")
        self.raw, self.raw_rn = "twa_raw", "twa_raw_rn"

    def _execute(self, sql: str, how: str):
        """Run ``sql``; a text file with quoted line breaks is re-read by DuckDB's serial reader."""
        duckdb = _import()
        try:
            res = self.con.execute(sql)
            return res.fetchall() if how == "rows" else res.df()
        except duckdb.Error as e:
            if not (self.texts and "parallel=false" in str(e) and any(t.parallel for t in self.texts)):
                raise
        for t in self.texts:
            t.parallel = False
        self._text_views()
        res = self.con.execute(sql)
        return res.fetchall() if how == "rows" else res.df()

    def read_error(self, e) -> AuditInputError:
        """The error for a failure while the engine reads the files."""
        msg = " ".join(str(e).split())
        if self.format == "csv":
            for t in self.texts:
                t.check_decodable()          # the in-memory intake's error for a file that is not UTF-8
            first = str(e).splitlines()
            where = next((ln for ln in first if "Line:" in ln), first[0] if first else "")
            detail = next((ln.strip() for ln in first if ln.strip().startswith("Expected Number of Columns")), "")
            return DataFileError(f"{self.files[0]}: cannot be read as delimited text ({where.strip()}"
                                 f"{'; ' + detail if detail else ''}); expected one header line, then one row per "
                                 "observation")
        return AuditInputError(f"engine duckdb: query failed: {msg[:300]}")

    def row_numbers(self, rns) -> dict:
        """Report row numbers for engine row-order numbers: file lines for text (the header is
        line 1), 1-based row positions for Parquet (as the in-memory intake)."""
        rns = [int(r) for r in rns]
        if self.format == "parquet":
            return {r: (r % 2 ** 40) + 1 for r in rns}
        if len(self.texts) == 1:
            return self.texts[0].lines(rns)
        if self._file_counts is None:     # records per file: one scan, however often rows are named
            self._file_counts = dict(self.query("SELECT twa_file, COUNT(*) FROM twa_raw GROUP BY twa_file"))
        counts = self._file_counts
        out, base = {}, 0
        for i, t in enumerate(self.texts):
            n = int(counts.get(i, 0))
            mine = [r for r in rns if base < r <= base + n]
            got = t.lines([r - base for r in mine])
            out.update({r: got[r - base] for r in mine})
            base += n
        return out

    def describe(self) -> dict:
        out = {"format": self.format, "files": len(self.files), "first_file": self.files[0]}
        if self.texts:
            out.update(delimiter=self.delimiter, encoding=self.texts[0].encoding,
                       transcoded=not self.texts[0].utf8_native)
        return out

    def columns(self) -> list[str]:
        return [c[0] for c in self._cols if c[0] not in ("filename", "file_row_number", "twa_rn")]

    def column_type(self, name: str) -> str:
        return {c[0]: c[1] for c in self._cols}[name].upper()

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
            return self._run(lambda: self._execute(sql, "rows"), label, progress)
        except duckdb.Error as e:
            raise self.read_error(e) from None

    def query_frame(self, sql: str, *, label: str = "", progress=False, prepare=None, seed: int = 0):
        duckdb = _import()
        try:
            if prepare is not None:
                with prepare(self._seed):
                    return self._run(lambda: self._execute(sql, "frame"), label, progress)
            return self._run(lambda: self._execute(sql, "frame"), label, progress)
        except duckdb.Error as e:
            raise self.read_error(e) from None

    _seed = 0

    def close(self) -> None:
        con = getattr(self, "con", None)
        if con is not None:
            con.close()
            self.con = None
        for t in self.texts:
            t.close()


def open_duckdb(data, **kw) -> DuckDBBackend:
    return DuckDBBackend(data, **kw)
