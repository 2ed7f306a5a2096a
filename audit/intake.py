"""Stage 1 of the flow: read a long-format dataset and validate it at the edge.

One row per observation: a numeric response and two factor columns.  Factors
are always categorical (doses 0.5 / 1 / 2 are three levels), levels in order of
first appearance unless an order is given.  Rows with a missing response or
factor are dropped and *counted* per cell; nothing is dropped silently.  The
input file is only read, never written.

When the response values share many leading digits (as in NIST StRD SmLs07-09)
a common decimal offset is subtracted from the *text* before converting to
binary floating point (exact, with :mod:`decimal`); centring afterwards in
floating point cannot recover the digits lost at parsing.
"""

from __future__ import annotations

import csv
import hashlib
import math
import os
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation, localcontext

import numpy as np

from .errors import AuditInputError, ColumnError, DataFileError, FactorError, OptionError, ResponseError

__all__ = ["Observations", "DroppedRows", "read_table", "prepare", "load"]

TEXT_SUFFIXES = {".csv", ".tsv", ".tab", ".txt", ".dat"}
SUPPORTED = sorted(TEXT_SUFFIXES | {".xlsx", ".parquet"})
#: centre exactly when max|y| / (max y - min y) exceeds this (about 6 shared digits)
CENTRING_THRESHOLD = 1e6


@dataclass(frozen=True, kw_only=True)
class DroppedRows:
    """Rows left out at intake, and why.

    Attributes
    ----------
    total : int
    missing_response : ndarray (J, K) of int
        Rows whose factors were known but whose response was missing, per cell.
    missing_factor : int
        Rows with a missing factor value (they belong to no cell).
    missing_other : int
        Rows missing a value in an auxiliary column (--order, --unit).
    blank_lines : int
        Entirely empty lines of a text file.
    rows : tuple of int
        Their row numbers (see :attr:`Observations.rows`).
    """

    total: int
    missing_response: np.ndarray
    missing_factor: int
    missing_other: int
    blank_lines: int
    rows: tuple[int, ...]

    def to_dict(self, levels_a, levels_b) -> dict:
        by_cell = [
            {"a": levels_a[j], "b": levels_b[k], "n": int(self.missing_response[j, k])}
            for j, k in zip(*np.nonzero(self.missing_response))
        ]
        return {
            "total": self.total,
            "missing_response_by_cell": by_cell,
            "missing_factor": self.missing_factor,
            "missing_other": self.missing_other,
            "blank_lines": self.blank_lines,
            "rows": list(self.rows[:1000]),
        }


@dataclass(frozen=True, kw_only=True)
class Source:
    """Where the data came from: path (or '<DataFrame>'), SHA-256, format, delimiter."""

    path: str
    sha256: str | None
    format: str
    delimiter: str | None = None


@dataclass(frozen=True, kw_only=True)
class Observations:
    """The validated raw data of a two-way design.

    Attributes
    ----------
    response : str; factors : (str, str)
    y : ndarray float
        Response minus ``offset`` (exactly, when centred from text).
    offset : float
        The constant removed from y (0.0 unless centring was done).
    centring : str or None
        A sentence saying what centring was done, for the design summary.
    a, b : ndarray int
        Level codes of factor A (0..J-1) and B (0..K-1).
    levels_a, levels_b : tuple of str
    rows : ndarray int
        Row numbers for reports: for a file, its line number (the header is
        line 1); for a DataFrame, the 0-based position in the frame.
    row_kind : str
        'line' or 'position'.
    order : ndarray float or None
        Run order (from ``order=``), when given.
    unit : ndarray int or None
        Experimental-unit codes (from ``unit=``), when given.
    dropped : DroppedRows
    source : Source
    """

    response: str
    factors: tuple[str, str]
    y: np.ndarray
    offset: float
    centring: str | None
    a: np.ndarray
    b: np.ndarray
    levels_a: tuple[str, ...]
    levels_b: tuple[str, ...]
    rows: np.ndarray
    row_kind: str
    order: np.ndarray | None
    unit: np.ndarray | None
    order_name: str | None
    unit_name: str | None
    dropped: DroppedRows
    source: Source
    duplicate_rows: int = 0

    @property
    def J(self) -> int:
        return len(self.levels_a)

    @property
    def K(self) -> int:
        return len(self.levels_b)

    @property
    def cell(self) -> np.ndarray:
        """Cell index a * K + b (j-major)."""
        return self.a * self.K + self.b

    @property
    def y_original(self) -> np.ndarray:
        """The response on its original scale, as float (for log and Box-Cox)."""
        return self.y + self.offset

    def __len__(self) -> int:
        return int(self.y.size)


def _sha256(path: str) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _sniff_delimiter(path: str, suffix: str) -> str:
    with open(path, "r", encoding="utf-8-sig", errors="replace", newline="") as fh:
        sample = fh.read(65536)
    if not sample.strip():
        raise DataFileError(f"{path}: the file is empty; expected a header line and data rows")
    first = sample.splitlines()[0]
    try:
        return csv.Sniffer().sniff(sample, delimiters=",\t;|").delimiter
    except csv.Error:
        pass
    counts = {d: first.count(d) for d in (",", "\t", ";", "|")}
    best = max(counts, key=counts.get)
    if counts[best] > 0:
        return best
    if suffix in (".tsv", ".tab"):
        return "\t"
    if len(first.split()) > 1:
        return r"\s+"
    return ","


def read_table(path: str | os.PathLike):
    """Read a CSV/TSV/xlsx/parquet file into a DataFrame of strings (text formats)
    or native types (binary formats).  Returns (frame, Source, row_numbers)."""
    import pandas as pd

    path = os.fspath(path)
    if not os.path.exists(path):
        raise DataFileError(f"data file {path!r} not found; check the path (the current folder is {os.getcwd()!r})")
    if os.path.isdir(path):
        raise DataFileError(f"{path!r} is a folder; expected a data file ({', '.join(SUPPORTED)})")
    suffix = os.path.splitext(path)[1].lower()
    sha = _sha256(path)
    if suffix in TEXT_SUFFIXES or suffix == "":
        delim = _sniff_delimiter(path, suffix)
        try:
            frame = pd.read_csv(
                path, sep=delim, dtype=str, skip_blank_lines=False, skipinitialspace=True,
                encoding="utf-8-sig", engine="c" if len(delim) == 1 else "python",
            )
        except (pd.errors.ParserError, UnicodeDecodeError, ValueError) as exc:
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise DataFileError(
                f"{path}: cannot be read as delimited text ({first}); expected one header line, "
                "then one row per observation"
            ) from None
        rows = np.arange(len(frame), dtype=np.int64) + 2
        return frame, Source(path=path, sha256=sha, format="text", delimiter=delim), rows
    if suffix == ".xlsx":
        try:
            import openpyxl  # noqa: F401
        except ImportError:
            raise DataFileError(
                f"{path}: reading .xlsx needs openpyxl, which is not installed; "
                "run: pip install 'twoway-audit[xlsx]'"
            ) from None
        try:
            frame = pd.read_excel(path, sheet_name=0)
        except Exception as exc:  # openpyxl raises many types for corrupt files
            raise DataFileError(f"{path}: cannot be read as an .xlsx workbook ({type(exc).__name__})") from None
        rows = np.arange(len(frame), dtype=np.int64) + 2
        return frame, Source(path=path, sha256=sha, format="xlsx"), rows
    if suffix == ".parquet":
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            raise DataFileError(
                f"{path}: reading .parquet needs pyarrow, which is not installed; "
                "run: pip install 'twoway-audit[parquet]'"
            ) from None
        try:
            frame = pd.read_parquet(path)
        except Exception as exc:
            raise DataFileError(f"{path}: cannot be read as a Parquet file ({type(exc).__name__})") from None
        rows = np.arange(len(frame), dtype=np.int64) + 1
        return frame, Source(path=path, sha256=sha, format="parquet"), rows
    raise DataFileError(
        f"{path}: unsupported file type {suffix!r}; expected one of {', '.join(SUPPORTED)}"
    )


def _as_level_text(col) -> "np.ndarray":
    """Factor values as text (None where missing): numbers that are whole print
    without '.0'.  Converts each distinct value once, not each row."""
    import pandas as pd

    codes, uniq = pd.factorize(col, sort=False, use_na_sentinel=True)
    if pd.api.types.is_float_dtype(col):
        texts = [str(int(v)) if float(v).is_integer() else repr(float(v)) for v in uniq]
    else:
        texts = [str(v).strip() for v in uniq]
    lookup = np.array(texts + [None], dtype=object)
    return lookup[codes]  # code -1 (missing) picks the trailing None


def _missing_mask(col) -> np.ndarray:
    import pandas as pd

    m = pd.isna(col).to_numpy(dtype=bool, copy=True)
    if col.dtype == object or pd.api.types.is_string_dtype(col):
        s = col.astype(str).str.strip()
        m |= (s == "").to_numpy(dtype=bool) & ~m
    return m


def _parse_response(col, is_text: bool, name: str, rows: np.ndarray, keep: np.ndarray):
    """Return (y, offset, centring sentence) for the kept rows."""
    import pandas as pd

    if is_text or col.dtype == object or pd.api.types.is_string_dtype(col):
        text = col.astype(str).str.strip()
        vals = pd.to_numeric(text.where(keep, "0"), errors="coerce").to_numpy(dtype=float)
        bad = np.isnan(vals) & keep
        if bad.any():
            i = int(np.argmax(bad))
            raise ResponseError(
                f"response column {name!r} must be numeric; found {text.iloc[i]!r} at row {rows[i]}; "
                "fix or blank out non-numeric entries (blank cells are dropped and counted)"
            )
        text_kept = text[keep].to_numpy(dtype=object)
    else:
        if not pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col):
            i = int(np.argmax(keep))
            raise ResponseError(
                f"response column {name!r} must be numeric; found {col.iloc[i]!r} "
                f"(type {col.dtype}) at row {rows[i]}; choose a numeric column"
            )
        vals = col.to_numpy(dtype=float, na_value=np.nan)
        text_kept = None
    y = vals[keep]
    inf = ~np.isfinite(y)
    if inf.any():
        i = int(np.flatnonzero(keep)[np.argmax(inf)])
        raise ResponseError(
            f"response column {name!r} has an infinite value ({y[np.argmax(inf)]!r}) at row {rows[i]}; "
            "expected finite numbers; remove or correct it"
        )
    if y.size == 0:
        raise ResponseError(f"response column {name!r} has no non-missing values; expected numbers")
    lo, hi = float(y.min()), float(y.max())
    spread = hi - lo
    if spread == 0.0:
        raise ResponseError(
            f"response column {name!r} is constant (every value is {y[0]!r}); "
            "an ANOVA needs variation in the response"
        )
    scale = max(abs(lo), abs(hi))
    if scale / spread < CENTRING_THRESHOLD:
        return y, 0.0, None
    e = math.floor(math.log10(spread))
    if text_kept is not None:
        with localcontext() as ctx:
            ctx.prec = 60
            try:
                off = Decimal(text_kept[0]).quantize(Decimal(1).scaleb(e))
                y = np.fromiter((float(Decimal(t) - off) for t in text_kept), dtype=float, count=len(text_kept))
            except InvalidOperation:
                return y, 0.0, None
        offset = float(off)
        digits = int(math.floor(math.log10(scale / spread)))
        return y, offset, (
            f"response values share about {digits} leading digits; {off} was subtracted exactly "
            "from the decimal text before conversion to binary floating point (no digits lost)"
        )
    offset = float(np.round(y[0], -e))
    return y - offset, offset, (
        f"response values share many leading digits; {offset!r} was subtracted in floating point "
        "(the file stores binary numbers, so digits lost before reading cannot be recovered)"
    )


def prepare(
    frame,
    *,
    response: str,
    factors: tuple[str, str],
    levels: dict | None = None,
    order: str | None = None,
    unit: str | None = None,
    source: Source | None = None,
    rows: np.ndarray | None = None,
) -> Observations:
    """Validate a long-format DataFrame and turn it into :class:`Observations`."""
    import pandas as pd

    if not isinstance(frame, pd.DataFrame):
        raise AuditInputError(
            f"data: expected a pandas DataFrame or a file path, found {type(frame).__name__}"
        )
    if source is None:
        source = Source(path="<DataFrame>", sha256=None, format="dataframe")
    if rows is None:
        rows = np.arange(len(frame), dtype=np.int64)
    row_kind = "position" if source.format == "dataframe" else "line"
    factors = tuple(factors) if factors is not None else ()
    if len(factors) != 2:
        raise OptionError(f"factors: expected exactly two column names, found {len(factors)}: {list(factors)}")
    if factors[0] == factors[1]:
        raise ColumnError(
            f"factors: both factors are the same column {factors[0]!r}; name two different columns"
        )
    cols = [str(c) for c in frame.columns]
    for role, name in (("response", response), ("factor", factors[0]), ("factor", factors[1]),
                       ("order", order), ("unit", unit)):
        if name is None:
            continue
        if name not in cols:
            raise ColumnError(
                f"{role} column {name!r} not found; the columns are: {', '.join(cols)}"
            )
    if response in factors:
        raise ColumnError(f"response {response!r} is also named as a factor; name a different column")
    frame = frame.copy(deep=False)
    frame.columns = cols

    blank = frame.isna().all(axis=1).to_numpy(dtype=bool)
    miss_a = _missing_mask(frame[factors[0]]) & ~blank
    miss_b = _missing_mask(frame[factors[1]]) & ~blank
    miss_y = _missing_mask(frame[response]) & ~blank
    miss_other = np.zeros(len(frame), bool)
    for c in (order, unit):
        if c is not None:
            miss_other |= _missing_mask(frame[c]) & ~blank
    miss_factor = (miss_a | miss_b)
    drop = blank | miss_factor | miss_y | miss_other
    keep = ~drop

    codes = []
    level_sets = []
    for f in factors:
        txt = _as_level_text(frame[f])
        given = (levels or {}).get(f)
        if given is not None:
            given = [str(x) for x in given]
            present = set(txt[~(miss_a if f == factors[0] else miss_b) & ~blank])
            unknown = sorted(present - set(given))
            if unknown:
                raise FactorError(
                    f"factor {f!r}: value {unknown[0]!r} is not in the given level order {given}; "
                    "list every level"
                )
            lv = tuple(given)
            lookup = {v: i for i, v in enumerate(lv)}
            c = np.array([lookup.get(v, -1) if v is not None else -1 for v in txt], dtype=np.int64)
        else:
            c, uniq = pd.factorize(pd.Series(txt, dtype=object), sort=False)
            lv = tuple(str(u) for u in uniq)
            c = c.astype(np.int64)
        codes.append(c)
        level_sets.append(lv)
    a_all, b_all = codes
    la, lb = level_sets
    # levels that survive after dropping rows; re-code to keep only observed levels in order
    a_keep, b_keep = a_all[keep], b_all[keep]
    J0, K0 = len(la), len(lb)
    obs_a = np.bincount(a_keep, minlength=J0)
    obs_b = np.bincount(b_keep, minlength=K0)
    if (levels or {}).get(factors[0]) is None:
        la = tuple(l for l, c in zip(la, obs_a) if c > 0)
    if (levels or {}).get(factors[1]) is None:
        lb = tuple(l for l, c in zip(lb, obs_b) if c > 0)
    remap_a = np.cumsum(obs_a > 0) - 1 if (levels or {}).get(factors[0]) is None else np.arange(J0)
    remap_b = np.cumsum(obs_b > 0) - 1 if (levels or {}).get(factors[1]) is None else np.arange(K0)
    for f, lv, counts in ((factors[0], la, np.bincount(remap_a[a_keep], minlength=len(la))),
                          (factors[1], lb, np.bincount(remap_b[b_keep], minlength=len(lb)))):
        if len(lv) < 2:
            raise FactorError(
                f"factor {f!r} has {len(lv)} level(s) with data ({', '.join(lv) or 'none'}); "
                "expected at least 2; choose a factor that varies"
            )
        few = [l for l, c in zip(lv, counts) if c < 2]
        if few:
            raise FactorError(
                f"factor {f!r}: level {few[0]!r} has fewer than two observations in total "
                f"({int(counts[lv.index(few[0])])}); expected at least 2 per level; "
                "merge or remove that level"
            )
    y, offset, centring = _parse_response(
        frame[response], source.format == "text", response, rows, keep
    )
    J, K = len(la), len(lb)
    miss_cells = np.zeros((J, K), dtype=np.int64)
    known = miss_y & ~miss_factor & ~blank
    if known.any():
        ja, kb = remap_a[a_all[known]], remap_b[b_all[known]]
        ok = (ja >= 0) & (kb >= 0)
        np.add.at(miss_cells, (ja[ok], kb[ok]), 1)
    dropped = DroppedRows(
        total=int(drop.sum()) - int(blank.sum()),
        missing_response=miss_cells,
        missing_factor=int((miss_factor & ~blank).sum()),
        missing_other=int((miss_other & ~miss_factor & ~miss_y & ~blank).sum()),
        blank_lines=int(blank.sum()),
        rows=tuple(int(r) for r in rows[drop & ~blank]),
    )
    order_v = unit_v = None
    if order is not None:
        ov = pd.to_numeric(frame[order][keep], errors="coerce").to_numpy(dtype=float)
        if np.isnan(ov).any():
            i = int(np.flatnonzero(keep)[np.argmax(np.isnan(ov))])
            raise ColumnError(
                f"order column {order!r} must be numeric (run order); found {frame[order].iloc[i]!r} at row {rows[i]}"
            )
        order_v = ov
    if unit is not None:
        unit_v = pd.factorize(pd.Series(_as_level_text(frame[unit])[keep], dtype=object))[0].astype(np.int64)
    used = frame.loc[keep, [response, *factors]]
    dup = int(used.duplicated().sum()) if len(used) < 5_000_000 else 0
    return Observations(
        response=response,
        factors=(factors[0], factors[1]),
        y=y,
        offset=offset,
        centring=centring,
        a=remap_a[a_keep].astype(np.int64),
        b=remap_b[b_keep].astype(np.int64),
        levels_a=la,
        levels_b=lb,
        rows=rows[keep],
        row_kind=row_kind,
        order=order_v,
        unit=unit_v,
        order_name=order,
        unit_name=unit,
        dropped=dropped,
        source=source,
        duplicate_rows=dup,
    )


def load(data, *, response: str, factors, levels=None, order=None, unit=None) -> Observations:
    """Read (when ``data`` is a path) and validate a long-format dataset."""
    import pandas as pd

    if isinstance(data, (str, os.PathLike)):
        frame, source, rows = read_table(data)
        return prepare(frame, response=response, factors=factors, levels=levels, order=order, unit=unit,
                       source=source, rows=rows)
    if isinstance(data, pd.DataFrame):
        return prepare(data, response=response, factors=factors, levels=levels, order=order, unit=unit)
    raise AuditInputError(
        f"data: expected a file path or a pandas DataFrame, found {type(data).__name__}"
    )
