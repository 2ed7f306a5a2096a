"""Stage 1 of the flow: read a long-format dataset and validate it at the edge.

One row per observation: a numeric response and two factor columns.  Factors
are always categorical (doses 0.5 / 1 / 2 are three levels).  Level order (see
:func:`order_levels`): an order given with ``levels=`` / ``--levels``; else
numeric when every level of the factor is a number with the same unit text
before and after it (``4h, 12h, 16h``; ``0.5mg, 1mg, 2mg``; ``-5C, 10C``);
else first appearance.  Rows with a missing response or
factor are dropped and *counted* per cell; nothing is dropped silently.  The
input file is only read, never written.

Missing values (the rule, for every format):

* a factor, ``order`` or ``unit`` value is missing only when it is empty or
  whitespace (or a native missing value of a DataFrame, workbook or Parquet
  file).  Text such as ``None``, ``NA``, ``nan`` or ``null`` is a level;
* a response value is missing when it is empty or whitespace, a native missing
  value, or one of the tokens ``NA``, ``N/A``, ``NaN`` and ``.`` (any case).

Text files are decoded as UTF-8 (with or without a byte-order mark) or UTF-16
(with a byte-order mark); anything else stops with a hint to give
``encoding=``.  A workbook with several sheets needs ``sheet=``.  Numbers with a
decimal comma are read with ``decimal=","``; a ``;``-delimited file whose
response values all use decimal commas is read that way with a note.  Factor
values that are all numbers and spell one number two ways ("15" and "15.0")
are merged into one level with a note; mixed with non-numbers they stop with
an error naming both spellings.

Row numbers: for a file, the line of the file on which the record starts (the
header is line 1; quoted fields spanning lines are counted); for a DataFrame,
its index labels when the index is integer, else 0-based positions.

When the response values share many leading digits (as in NIST StRD SmLs07-09)
a common decimal offset is subtracted from the *text* before converting to
binary floating point (exact, with :mod:`decimal`); centring afterwards in
floating point cannot recover the digits lost at parsing.
"""

from __future__ import annotations

import codecs
import csv
import hashlib
import io
import math
import os
import re
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation, localcontext

import numpy as np

from .errors import AuditInputError, ColumnError, DataFileError, FactorError, OptionError, ResponseError

__all__ = ["Observations", "DroppedRows", "read_table", "prepare", "load", "order_levels", "RESPONSE_NA_TOKENS",
           "LEVEL_ORDERS", "merge_numeric_spellings"]

TEXT_SUFFIXES = {".csv", ".tsv", ".tab", ".txt", ".dat"}
SUPPORTED = sorted(TEXT_SUFFIXES | {".xlsx", ".parquet"})
#: centre exactly when max|y| / (max y - min y) exceeds this (about 6 shared digits)
CENTRING_THRESHOLD = 1e6
#: response text read as missing (compared case-insensitively, after stripping)
RESPONSE_NA_TOKENS = frozenset({"na", "n/a", "nan", "."})
_NUMBER_RE = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_DEC_COMMA_RE = re.compile(r"^[+-]?(\d+,\d*|,\d+)([eE][+-]?\d+)?$")
#: a level that reads as a number with unit text around it: prefix and suffix hold no digits
#: a sign belongs to the number only at the start or after a space ("-5C", "temp -5"); after a
#: letter it is a separator ("resin-3" is resin number 3, not minus 3)
_UNIT_NUMBER_RE = re.compile(r"^(?P<pre>[^\d]*?)\s*(?P<num>(?:(?<!\S)[+-])?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)"
                             r"\s*(?P<suf>[^\d]*)$")
#: how a factor's level order was chosen (the design block's ``level_order`` values)
LEVEL_ORDERS = ("given", "numeric", "first appearance")


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
    """Where the data came from: path (or '<DataFrame>'), SHA-256, format,
    delimiter, text encoding and workbook sheet (None where they do not apply)."""

    path: str
    sha256: str | None
    format: str
    delimiter: str | None = None
    encoding: str | None = None
    sheet: str | None = None


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
        Row identifiers for reports: for a file, the line on which the record
        starts (the header is line 1; a quoted field spanning lines counts
        every line); for a DataFrame, its index labels when the index is
        integer (a default index gives 0-based positions), else the 0-based
        position in the frame.
    row_kind : str
        'line' (file), 'index' (DataFrame index labels) or 'position'.
    order : ndarray float or None
        Run order (from ``order=``), when given.
    unit : ndarray int or None
        Experimental-unit codes (from ``unit=``), when given.
    dropped : DroppedRows
    source : Source
    notes : tuple of str
        What intake decided on the user's behalf (merged spellings of one
        number, decimal commas, blank workbook cells), for the design notes.
    level_order : (str, str)
        How each factor's levels were ordered: 'given', 'numeric' or
        'first appearance' (see :func:`order_levels`).
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
    notes: tuple[str, ...] = ()
    level_order: tuple[str, str] = ("first appearance", "first appearance")

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


def _check_encoding(encoding):
    if encoding is None:
        return None
    if not isinstance(encoding, str) or not encoding.strip():
        raise OptionError(f"encoding: expected a codec name such as 'latin-1' or 'utf-16', found {_q(encoding)}")
    try:
        return codecs.lookup(encoding.strip()).name
    except LookupError:
        raise OptionError(
            f"encoding: unknown text encoding {_q(encoding)}; expected a codec name such as "
            "'utf-8', 'latin-1', 'cp1252' or 'utf-16'"
        ) from None


def _decode(path: str, raw: bytes, encoding: str | None) -> tuple[str, str]:
    """Decode a text file: the given codec, else UTF-8 (BOM optional) or UTF-16/32 with a BOM."""
    if encoding is not None:
        try:
            text = raw.decode(encoding)
        except UnicodeDecodeError as exc:
            raise undecodable_error(path, encoding, raw[exc.start], exc.start) from None
        return text.lstrip("\ufeff"), encoding
    name = bom_encoding(raw[:4])
    if name is not None:
        try:
            return raw.decode(name).lstrip("\ufeff"), name
        except UnicodeDecodeError:
            raise bad_bom_error(path, name) from None
    try:
        return raw.decode("utf-8"), "utf-8"
    except UnicodeDecodeError as exc:
        raise not_utf8_error(path, raw[:4096], raw[exc.start], raw.count(b"\n", 0, exc.start) + 1) from None


def bom_encoding(head: bytes) -> str | None:
    """The codec named by a byte-order mark at the start of ``head`` (None without one)."""
    for bom, name in ((codecs.BOM_UTF32_LE, "utf-32"), (codecs.BOM_UTF32_BE, "utf-32"),
                      (codecs.BOM_UTF8, "utf-8-sig"), (codecs.BOM_UTF16_LE, "utf-16"),
                      (codecs.BOM_UTF16_BE, "utf-16")):
        if head.startswith(bom):
            return name
    return None


def undecodable_error(path: str, encoding: str, byte: int, offset: int) -> DataFileError:
    """The error for a byte that the given ``encoding`` cannot decode."""
    return DataFileError(
        f"{path}: cannot be decoded as {encoding} (byte {byte:#04x} at offset {offset}); "
        "expected text in that encoding; give the file's encoding with --encoding (API encoding=)"
    )


def bad_bom_error(path: str, name: str) -> DataFileError:
    """The error for a file whose byte-order mark names a codec it does not follow."""
    return DataFileError(
        f"{path}: starts with a {name} byte-order mark but is not valid {name}; "
        "expected one text encoding throughout; re-save it as UTF-8 or give --encoding"
    )


def not_utf8_error(path: str, head: bytes, byte: int, line: int) -> DataFileError:
    """The error for undeclared text that is not UTF-8 (``head``: the file's first 4096 bytes)."""
    nul = head[:4096].count(b"\x00")
    guess = ("it looks like UTF-16 without a byte-order mark: give --encoding utf-16-le (or utf-16-be)"
             if nul > len(head[:4096]) // 8 else
             "if it was saved as Latin-1 or Windows-1252, give --encoding latin-1 (or cp1252); "
             "the API takes encoding=")
    return DataFileError(
        f"{path}: is not UTF-8 text (byte {byte:#04x} on line {line}); expected UTF-8 or "
        f"UTF-16 with a byte-order mark; {guess}"
    )


def sniff_delimiter(path: str, text: str, suffix: str) -> str:
    sample = text[:65536]
    if not sample.strip():
        raise DataFileError(f"{path}: the file is empty; expected a header line and data rows")
    first = next(ln for ln in sample.splitlines() if ln.strip())
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


def _record_start_lines(text: str) -> np.ndarray:
    """1-based physical line on which each record starts, for RFC 4180 quoting
    (a double quote opens/closes a quoted field; "" inside one is a quote)."""
    b = np.frombuffer(text.encode("utf-32-le"), dtype=np.uint32)
    nl = np.flatnonzero(b == 10)
    q = np.cumsum(b == 34)
    ends = nl[(q[nl] % 2) == 0] if nl.size else nl  # newlines outside quotes end records
    line_of = np.searchsorted(nl, ends)  # 0-based line index of each record end
    starts = np.concatenate([[0], line_of + 1]) + 1
    if b.size and b[-1] == 10:
        starts = starts[:-1]
    return starts.astype(np.int64)


def header_names(values, path: str) -> list[str]:
    names = []
    for i, v in enumerate(values):
        s = "" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v).strip()
        if isinstance(v, float) and v.is_integer():
            s = str(int(v))
        names.append(s if s else f"Unnamed: {i}")
    seen: dict[str, int] = {}
    for i, s in enumerate(names):
        if s in seen:
            raise ColumnError(
                f"{path}: column name {_q(s)} appears twice in the header (columns {seen[s] + 1} and {i + 1}); "
                "expected unique names; rename one of them"
            )
        seen[s] = i
    return names


def _read_text(path: str, suffix: str, encoding: str | None):
    import pandas as pd

    with open(path, "rb") as fh:
        raw = fh.read()
    sha = hashlib.sha256(raw).hexdigest()     # the bytes read, hashed once (no second pass over the file)
    text, enc = _decode(path, raw, encoding)
    del raw
    delim = sniff_delimiter(path, text, suffix)
    m = re.match(r"(?:[ \t]*(?:\r\n|\n|\r))+", text)  # blank lines above the header
    lead = 0
    if m:
        lead = len(re.findall(r"\r\n|\n|\r", m.group(0)))
        text = text[m.end():]
    try:
        table = pd.read_csv(
            io.StringIO(text), sep=delim, header=None, dtype=str, keep_default_na=False, na_filter=False,
            skip_blank_lines=False, skipinitialspace=True, engine="c" if len(delim) == 1 else "python",
        )
    except (pd.errors.ParserError, ValueError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise DataFileError(
            f"{path}: cannot be read as delimited text ({first}); expected one header line, "
            "then one row per observation"
        ) from None
    if '"' in text:
        lines = _record_start_lines(text)
        if lines.size != len(table):  # a quote inside an unquoted field: count with the csv module
            if len(delim) == 1:
                reader = csv.reader(io.StringIO(text, newline=""), delimiter=delim, skipinitialspace=True)
                starts, prev = [], 0
                for _ in reader:
                    starts.append(prev + 1)
                    prev = reader.line_num
                lines = np.asarray(starts, dtype=np.int64)
            if lines.size != len(table):
                lines = np.arange(len(table), dtype=np.int64) + 1
    else:
        lines = np.arange(len(table), dtype=np.int64) + 1
    del text
    lines = lines + lead
    h = next((i for i in range(len(table))
              if any(isinstance(v, str) and v.strip() for v in table.iloc[i].tolist())), None)
    if h is None:
        raise DataFileError(f"{path}: the file is empty; expected a header line and data rows")
    names = header_names(table.iloc[h].tolist(), path)
    frame = table.iloc[h + 1:].reset_index(drop=True)
    frame.columns = names
    src = Source(path=path, sha256=sha, format="text", delimiter=delim, encoding=enc)
    return frame, src, lines[h + 1:]


def _pick_sheet(path: str, names: list[str], sheet) -> str:
    listing = ", ".join(f"{i + 1} {_q(n)}" for i, n in enumerate(names))
    if sheet is None:
        if len(names) == 1:
            return names[0]
        raise DataFileError(
            f"{path}: the workbook has {len(names)} sheets ({listing}); expected one sheet to read; "
            "choose it with --sheet NAME or --sheet NUMBER (API sheet=), numbers counting from 1"
        )
    if isinstance(sheet, str) and sheet in names:
        return sheet
    s = str(sheet).strip()
    if not isinstance(sheet, bool) and s.isdigit() and 1 <= int(s) <= len(names):
        return names[int(s) - 1]
    raise OptionError(
        f"sheet: no sheet {_q(sheet)} in {path}; expected a name or a number from 1 to {len(names)}; "
        f"the sheets are {listing}"
    )


def _read_xlsx(path: str, sha: str, sheet):
    import pandas as pd

    try:
        import openpyxl  # noqa: F401
    except ImportError:
        raise DataFileError(
            f"{path}: reading .xlsx needs openpyxl, which is not installed; "
            "run: pip install 'twoway-audit[xlsx]'"
        ) from None
    try:
        book = pd.ExcelFile(path, engine="openpyxl")
        names = list(book.sheet_names)
    except Exception as exc:  # openpyxl raises many types for corrupt files
        raise DataFileError(f"{path}: cannot be read as an .xlsx workbook ({type(exc).__name__})") from None
    chosen = _pick_sheet(path, names, sheet)
    try:
        table = pd.read_excel(book, sheet_name=chosen, header=None, keep_default_na=False)
    except Exception as exc:
        raise DataFileError(f"{path}: sheet {_q(chosen)} cannot be read ({type(exc).__name__})") from None
    finally:
        book.close()
    if table.empty:
        raise DataFileError(f"{path}: sheet {_q(chosen)} is empty; expected a header row and data rows")
    names_row = header_names(table.iloc[0].tolist(), path)
    frame = table.iloc[1:].reset_index(drop=True)
    frame.columns = names_row
    frame = frame.infer_objects()
    rows = np.arange(len(frame), dtype=np.int64) + 2
    return frame, Source(path=path, sha256=sha, format="xlsx", sheet=chosen), rows


def check_path(path, *, sheet=None, encoding: str | None = None) -> tuple[str, str, bool, str | None]:
    """The checks of a data file's path and its file options, before anything is read:
    returns (path, lower-case suffix, whether it is text, the checked encoding)."""
    path = os.fspath(path)
    encoding = _check_encoding(encoding)
    if not os.path.exists(path):
        raise DataFileError(f"data file {_q(path)} not found; check the path (the current folder is {os.getcwd()!r})")
    if os.path.isdir(path):
        raise DataFileError(f"{_q(path)} is a folder; expected a data file ({', '.join(SUPPORTED)})")
    suffix = os.path.splitext(path)[1].lower()
    is_text = suffix in TEXT_SUFFIXES or suffix == ""
    if sheet is not None and suffix != ".xlsx":
        raise OptionError(f"sheet: {path} is not an .xlsx workbook, so it has no sheets; leave out --sheet")
    if encoding is not None and not is_text:
        raise OptionError(
            f"encoding: {path} is a binary {suffix} file that stores its own encoding; leave out --encoding"
        )
    return path, suffix, is_text, encoding


def read_table(path: str | os.PathLike, *, sheet=None, encoding: str | None = None):
    """Read a CSV/TSV/xlsx/parquet file into a DataFrame of strings (text formats)
    or native types (binary formats).  Returns (frame, Source, row_numbers).

    Parameters
    ----------
    path : str or path
    sheet : str or int, optional
        Workbook sheet, by name or number counting from 1 (needed when an
        .xlsx file has several sheets).
    encoding : str, optional
        Text encoding of a text file (default: UTF-8 or UTF-16 with a BOM).
    """
    import pandas as pd

    path, suffix, is_text, encoding = check_path(path, sheet=sheet, encoding=encoding)
    if is_text:
        return _read_text(path, suffix, encoding)
    sha = _sha256(path)
    if suffix == ".xlsx":
        return _read_xlsx(path, sha, sheet)
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
        header_names(list(frame.columns), path)
        rows = np.arange(len(frame), dtype=np.int64) + 1
        return frame, Source(path=path, sha256=sha, format="parquet"), rows
    raise DataFileError(
        f"{path}: unsupported file type {_q(suffix)}; expected one of {', '.join(SUPPORTED)}"
    )


def fmt_scalar(v) -> str | None:
    if v is None:
        return None
    if isinstance(v, (float, np.floating)):
        if math.isnan(v):
            return None
        return str(int(v)) if float(v).is_integer() else repr(float(v))
    if isinstance(v, (bool, np.bool_)):
        return str(bool(v))
    s = str(v).strip()
    return s or None


def _level_lookup(col) -> tuple[np.ndarray, np.ndarray]:
    """(lookup, codes): distinct values as text with a trailing None, and each
    row's index into it (-1, the trailing None, where natively missing)."""
    import pandas as pd

    codes, uniq = pd.factorize(col, sort=False, use_na_sentinel=True)
    lookup = np.array([fmt_scalar(v) for v in uniq] + [None], dtype=object)
    return lookup, codes


def _as_level_text(col) -> "np.ndarray":
    """Values as text, None where missing (a native missing value, or empty or
    whitespace text).  Whole numbers print without '.0'.  Converts each
    distinct value once, not each row."""
    lookup, codes = _level_lookup(col)
    return lookup[codes]  # code -1 (missing) picks the trailing None


def comma_to_point(txt: np.ndarray) -> np.ndarray:
    """Respell decimal-comma numbers ('14,54') with a point; other text unchanged."""
    out = txt.copy()
    for i, v in enumerate(out):
        if v is not None and "," in v and _DEC_COMMA_RE.match(v):
            out[i] = v.replace(",", ".")
    return out


def _respell(txt: np.ndarray, decimal: str | None) -> np.ndarray:
    """Apply the decimal comma to distinct values (fast for long columns)."""
    import pandas as pd

    if decimal != ",":
        return txt
    codes, uniq = pd.factorize(pd.Series(txt, dtype=object), sort=False, use_na_sentinel=True)
    lookup = np.append(comma_to_point(np.asarray(uniq, dtype=object)), None)
    return lookup[codes]


def check_factors_option(factors) -> tuple[str, str]:
    if isinstance(factors, str):
        parts = [p.strip() for p in factors.replace(",", " ").split()]
        hint = f"; give a pair such as factors=({_q(parts[0])}, {_q(parts[1])})" if len(parts) == 2 else ""
        raise OptionError(
            f"factors: expected a pair of two column names, found the single string {_q(factors)}{hint}"
        )
    try:
        names = tuple(factors)
    except TypeError:
        raise OptionError(
            f"factors: expected a pair of two column names, found {type(factors).__name__} {_q(factors)}"
        ) from None
    if len(names) != 2 or not all(isinstance(n, str) for n in names):
        raise OptionError(
            f"factors: expected exactly two column names, found {len(names)}: {list(names)!r}; "
            "give two names (CLI: --factors COL_A COL_B, separated by a space)"
        )
    if names[0] == names[1]:
        raise ColumnError(
            f"factors: both factors are the same column {_q(names[0])}; name two different columns"
        )
    return names[0], names[1]


def check_levels_option(levels) -> dict:
    """{factor: [level, ...]} from a dict or a sequence of (factor, levels) pairs."""
    if levels is None:
        return {}
    pairs = list(levels.items()) if isinstance(levels, dict) else None
    if pairs is None:
        try:
            pairs = [(k, v) for k, v in levels]
        except (TypeError, ValueError):
            raise OptionError(
                f"levels: expected a dict {{factor: [level, ...]}}, found {type(levels).__name__}"
            ) from None
    out: dict[str, list[str]] = {}
    for name, given in pairs:
        name = str(name)
        if name in out:
            raise OptionError(
                f"--levels: column {_q(name)} is given twice; expected one level order per factor; "
                "keep one --levels for it"
            )
        if isinstance(given, str) or not hasattr(given, "__iter__"):
            raise OptionError(f"--levels {name}: expected a list of levels, found {_q(given)}")
        lv = [str(x).strip() for x in given]
        if any(x == "" for x in lv):
            raise OptionError(f"--levels {name}: an empty level name in {lv}; expected names between the commas")
        seen = set()
        for x in lv:
            if x in seen:
                raise OptionError(
                    f"--levels {name}: level {_q(x)} is listed twice; expected each level once; remove the repeat"
                )
            seen.add(x)
        out[name] = lv
    return out


def _number_key(s: str):
    return Decimal(s) if _NUMBER_RE.match(s) else None


def merge_numeric_spellings(f: str, txt: np.ndarray, given: list[str] | None, notes: list[str]) -> np.ndarray:
    """Merge spellings of one number ('15', '15.0') when every value is numeric.

    The one rule for both modes (raw data and summary tables).

    Parameters
    ----------
    f : str
        The factor's column name (for the note and the error).
    txt : ndarray of object
        The level text of every row (None where missing).
    given : list of str or None
        Levels given by the user (the merged level takes a given spelling).
    notes : list of str
        A note is appended per merged group.

    Returns
    -------
    ndarray
        ``txt`` with each group of spellings replaced by one of them; raises
        :class:`FactorError` when spellings of one number sit beside text.
    """
    import pandas as pd

    codes, uniq = pd.factorize(pd.Series(txt, dtype=object), sort=False, use_na_sentinel=True)
    uniq = [str(u) for u in uniq]
    keys = [_number_key(u) for u in uniq]
    groups: dict = {}
    for u, k in zip(uniq, keys):
        if k is not None:
            groups.setdefault(k, []).append(u)
    multi = [g for g in groups.values() if len(g) > 1]
    if not multi:
        return txt
    if any(k is None for k in keys):
        other = next(u for u, k in zip(uniq, keys) if k is None)
        raise FactorError(
            f"factor {_q(f)}: {_q(multi[0][0])} and {_q(multi[0][1])} spell the same number as two levels, and the "
            f"column also holds text ({_q(other)}); expected one spelling per level; make the spellings the same"
        )
    canon = {}
    for g in multi:
        target = next((x for x in (given or []) if _number_key(x) == Decimal(g[0])), g[0])
        for u in g:
            canon[u] = target
        notes.append(
            f"factor {_q(f)}: the spellings {', '.join(repr(u) for u in g)} are the same number and were "
            f"merged into level {_q(target)}"
        )
    lookup = np.array([canon.get(u, u) for u in uniq] + [None], dtype=object)
    return lookup[codes]


def _looks_continuous(txt: np.ndarray) -> tuple[int, int] | None:
    """(distinct values, values seen once) when a column looks like a measurement."""
    import pandas as pd

    vals = pd.Series(txt[np.array([v is not None for v in txt], dtype=bool)], dtype=object)
    if vals.empty:
        return None
    return looks_continuous_counts(vals.value_counts())


def looks_continuous_counts(counts) -> tuple[int, int] | None:
    """:func:`_looks_continuous` from the counts of a column's distinct non-missing
    values (a pandas Series indexed by value)."""
    if len(counts) == 0:
        return None
    if len(counts) < 8 or len(counts) <= counts.sum() / 3:
        return None
    if not all(_NUMBER_RE.match(str(u)) for u in counts.index):
        return None
    return len(counts), int((counts == 1).sum())


def _refuse_repeated_header(texts, named, nb, rows, row_kind, source, cols) -> None:
    """Stop on data rows that repeat the header (every named column holds its own
    name), as when files with a header each are concatenated: otherwise the names
    would be read as a factor level and a response value, and the error would blame
    the level or the number instead."""
    from .errors import shorten

    hit = nb.copy()
    for c in named:
        t = texts[c]
        hit &= np.array([v is not None and v.strip() == c for v in t], dtype=bool) if t.dtype == object \
            else (t == c)
    if not hit.any():
        return
    idx = np.flatnonzero(hit)
    raise repeated_header_error(source.path, _lines_text(rows, idx, row_kind), int(idx.size), cols, row_kind)


def repeated_header_error(path: str, where_all: str, count: int, cols, row_kind: str = "line") -> DataFileError:
    """The error for data rows that repeat the header ('lines 26, 51' in ``where_all``)."""
    from .errors import shorten

    header = shorten(",".join(cols))
    if row_kind == "line":
        return DataFileError(
            f"{path}: {where_all} repeat{'s' if count == 1 else ''} the header "
            f"line ({header}) inside the data ({count} such line(s)), as when files with a header each are "
            "concatenated; expected one header line, then data rows; fix: delete the repeated header lines "
            "(or join the files without their headers)")
    return DataFileError(
        f"{path}: {where_all} repeat{'s' if count == 1 else ''} the column "
        f"names ({header}) as data ({count} such row(s)), as when tables read with their headers are "
        "concatenated; expected data rows only; fix: drop those rows")


def _frame_row_ids(frame) -> tuple[np.ndarray, str]:
    import pandas as pd

    idx = frame.index
    if not isinstance(idx, pd.MultiIndex) and pd.api.types.is_integer_dtype(idx.dtype):
        return idx.to_numpy(dtype=np.int64), "index"
    return np.arange(len(frame), dtype=np.int64), "position"


def _q(x) -> str:
    """User text for an error: quoted and cut to :data:`audit.errors.SHOWN_TEXT`
    characters (names, levels, cell values; other values by their repr)."""
    from .errors import shorten

    return repr(shorten(x)) if isinstance(x, str) else shorten(repr(x))


def _where(rows: np.ndarray, i, row_kind: str = "line") -> str:
    """'on line 7' (a file: its line number), 'at index label 7', 'at position 7'."""
    return {"line": "on line", "index": "at index label", "position": "at position"}.get(row_kind, "at row") + \
        f" {rows[i]}"


def _lines_text(rows: np.ndarray, idx, row_kind: str, most: int = 5) -> str:
    """'lines 6, 11 and 16' (at most ``most`` shown, then 'and N more')."""
    idx = list(idx)
    word = {"line": "line", "index": "index label", "position": "position"}.get(row_kind, "row")
    shown = [str(rows[i]) for i in idx[:most]]
    more = f" and {len(idx) - most} more" if len(idx) > most else ""
    if len(idx) == 1:
        return f"{word} {shown[0]}"
    return f"{word}s {', '.join(shown)}{more}"


_UNIT_RE = re.compile(r"^\s*[-+]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:e[-+]?\d+)?\s*[^\d\s.,+-][^\d]*$", re.I)
_THOUSANDS_RE = re.compile(r"^\s*[-+]?\d{1,3}(?:[, ]\d{3})+(?:\.\d+)?\s*$")


def _text_response_error(name: str, text, bad: np.ndarray, keep: np.ndarray, rows: np.ndarray,
                         row_kind: str) -> ResponseError:
    """The error for a response column with text in it (see :func:`text_response_error`)."""
    idx = np.flatnonzero(bad)
    labels = list(dict.fromkeys(str(text.iloc[j]) for j in idx[:10_000]))[:21]
    return text_response_error(name, found=str(text.iloc[int(idx[0])]), n_bad=int(idx.size),
                               n_keep=int(keep.sum()), labels=labels,
                               where_first=_where(rows, int(idx[0]), row_kind),
                               where_all=_lines_text(rows, idx, row_kind))


def text_response_error(name: str, *, found: str, n_bad: int, n_keep: int, labels, where_first: str,
                        where_all: str) -> ResponseError:
    """The error for a response column with text in it, naming the cause: the whole
    column is text (a label or category column, not the measurement), or some cells
    carry a unit, thousands separators, a decimal comma or another word.

    From the facts alone (so an engine that reads the data in SQL words it the same):
    the first non-number ``found``, how many of the ``n_keep`` kept values are not numbers,
    the distinct non-numbers in order of appearance (the first 21 among the first 10,000
    suffice), and where they are ('on line 7'; 'lines 6, 11 and 16')."""
    from .errors import shorten

    shown = repr(shorten(found))
    if n_bad == n_keep:
        labels = list(labels)
        if len(labels) <= 20:
            kind = (f"{len(labels)} distinct text label(s) such as "
                    f"{', '.join(repr(shorten(x, 30)) for x in labels[:4])}: it looks like a factor or a label column, "
                    "not a measurement")
        else:
            kind = f"text such as {shown}"
        return ResponseError(
            f"response column {_q(name)} must be numeric but holds text: none of its {n_keep:,} values is a number "
            f"({kind}; first {where_first}); expected the measured numbers; fix: name the numeric "
            f"column that holds the measurements with --response (API response=)")
    if _DEC_COMMA_RE.match(found):
        cause, fix = "a decimal comma", "give --decimal , (API decimal=',')"
    elif _THOUSANDS_RE.match(found):
        cause, fix = "thousands separators", "write the numbers without separators (1234.5, not 1,234.5)"
    elif _UNIT_RE.match(found):
        cause, fix = "a unit or other text after the number", "keep only the number in each cell (put the unit in the column name)"
    else:
        cause, fix = "text that is not a number", ("correct these cells or blank them out (blank cells are "
                                                   "dropped and counted)")
    return ResponseError(
        f"response column {_q(name)} must be numeric; found {shown} {where_first}: {cause} "
        f"({n_bad:,} of {n_keep:,} value(s) are not numbers, on {where_all}); fix: {fix}")


def where_text(first_rows, total: int, row_kind: str = "line") -> tuple[str, str]:
    """('on line 7', 'lines 7, 9, 12, 15, 20 and 3 more'): the first rows in order (five, or all
    when there are fewer) and how many there are in all, worded as the in-memory intake words them."""
    shown = [int(r) for r in list(first_rows)[:5]]
    word = {"line": "line", "index": "index label", "position": "position"}.get(row_kind, "row")
    first = _where(np.asarray(shown), 0, row_kind)
    if total == 1:
        return first, f"{word} {shown[0]}"
    more = f" and {total - 5} more" if total > 5 else ""
    return first, f"{word}s {', '.join(map(str, shown))}{more}"


def decimal_offset(text: str, spread: float) -> Decimal:
    """The exact decimal offset subtracted from response text: the first kept value
    rounded to the decade of the spread (raises decimal.InvalidOperation)."""
    return Decimal(text).quantize(Decimal(1).scaleb(math.floor(math.log10(spread))))


def parse_response(col, is_text: bool, name: str, rows: np.ndarray, keep: np.ndarray, row_kind: str = "line"):
    """Return (y, offset, centring sentence) for the kept rows."""
    import pandas as pd

    if is_text or col.dtype == object or pd.api.types.is_string_dtype(col):
        text = col.astype(str).str.strip()
        vals = pd.to_numeric(text.where(keep, "0"), errors="coerce").to_numpy(dtype=float)
        bad = np.isnan(vals) & keep
        if bad.any():
            raise _text_response_error(name, text, bad, keep, rows, row_kind)
        text_kept = text[keep].to_numpy(dtype=object)
    else:
        if not pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col):
            i = int(np.argmax(keep))
            raise ResponseError(
                f"response column {_q(name)} must be numeric; found {_q(col.iloc[i])} "
                f"(type {col.dtype}) at row {rows[i]}; choose a numeric column"
            )
        vals = col.to_numpy(dtype=float, na_value=np.nan)
        text_kept = None
    y = vals[keep]
    inf = ~np.isfinite(y)
    if inf.any():
        i = int(np.flatnonzero(keep)[np.argmax(inf)])
        shown = text_kept[np.argmax(inf)] if text_kept is not None else str(float(y[np.argmax(inf)]))
        raise ResponseError(
            f"response column {_q(name)} has an infinite value ({_q(shown)}) at row {rows[i]}; "
            "expected finite numbers; remove or correct it"
        )
    if y.size == 0:
        raise ResponseError(f"response column {_q(name)} has no non-missing values; expected numbers")
    lo, hi = float(y.min()), float(y.max())
    spread = hi - lo
    if spread == 0.0:
        raise ResponseError(
            f"response column {_q(name)} is constant (every value is {_q(y[0])}); "
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
                off = decimal_offset(text_kept[0], spread)
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
        f"response values share many leading digits; {_q(offset)} was subtracted in floating point "
        "(the file stores binary numbers, so digits lost before reading cannot be recovered)"
    )


def order_levels(levels) -> tuple[tuple[str, ...], str]:
    """The default order of a factor's levels (given in order of first appearance).

    Returns ``(levels, how)``: sorted by their number, ``how = "numeric"``, when every
    level is a number with the same unit text before and after it (``"12h"``,
    ``"0.5 mg"``, ``"10 %"``, ``"-5C"``, ``"week 3"``; spaces between number and unit
    do not count); otherwise unchanged, ``how = "first appearance"``.  Text around the
    number may hold no digits, so dates and ranges (``2024-01-05``, ``1-2``) stay text.
    Levels spelling one number twice keep their first-appearance order among
    themselves (the sort is stable).
    """
    levels = tuple(str(v) for v in levels)
    keys = []
    pattern = None
    for v in levels:
        m = _UNIT_NUMBER_RE.match(v.strip())
        if m is None:
            return levels, "first appearance"
        unit = (m.group("pre").strip(), m.group("suf").strip())
        if pattern is None:
            pattern = unit
        elif unit != pattern:
            return levels, "first appearance"
        try:
            keys.append(Decimal(m.group("num")))
        except InvalidOperation:  # pragma: no cover - the pattern admits only decimal numbers
            return levels, "first appearance"
    if len(levels) < 2:
        return levels, "first appearance"
    order = sorted(range(len(levels)), key=lambda i: keys[i])
    return tuple(levels[i] for i in order), "numeric"


def _text_and_missing(col) -> tuple[np.ndarray, np.ndarray]:
    """(values as text with None where missing, missing mask); see :func:`_as_level_text`."""
    txt = _as_level_text(col)
    return txt, np.equal(txt, None)


def check_decimal(decimal) -> None:
    """The ``decimal=`` option: None, '.' or ','."""
    if decimal not in (None, ".", ","):
        raise OptionError(f"decimal: expected '.' or ',', found {_q(decimal)}; give --decimal , for decimal commas")


def check_columns(cols: list[str], *, response: str, factors: tuple[str, str], levels: dict, order=None,
                  unit=None) -> None:
    """The column rules: unique names, every named column present, the response not a
    factor, every ``levels`` key a factor."""
    seen: set[str] = set()
    for c in cols:
        if c in seen:
            raise ColumnError(f"column name {_q(c)} appears twice; expected unique column names; rename one of them")
        seen.add(c)
    for role, name in (("response", response), ("factor", factors[0]), ("factor", factors[1]),
                       ("order", order), ("unit", unit)):
        if name is None:
            continue
        if name not in cols:
            hint = ""
            parts = [p.strip() for p in str(name).split(",")]
            if role == "factor" and len(parts) == 2 and all(p in cols for p in parts):
                hint = f"; give two names separated by a space: --factors {parts[0]} {parts[1]}"
            raise ColumnError(
                f"{role} column {_q(name)} not found; the columns are: {', '.join(cols)}{hint}"
            )
    if response in factors:
        raise ColumnError(f"response {_q(response)} is also named as a factor; name a different column")
    for key in levels:
        if key not in factors:
            what = "a column but not one of the factors" if key in cols else "not a column"
            raise OptionError(
                f"--levels: {_q(key)} is {what}; expected COLUMN=L1,L2,... with COLUMN one of the factors "
                f"{_q(factors[0])} and {_q(factors[1])}; fix the name before '='"
            )


def decimal_from_values(vals: list[str], *, response: str, delimiter: str | None, decimal: str | None,
                        row_of, notes: list[str]) -> str | None:
    """The decimal mark of a text response, from its distinct non-missing values in order of
    first appearance: ``decimal`` when given; else ',' (with a note) when the file is
    ';'-delimited and every value is a number with some written with a decimal comma; a
    ResponseError when they are decimal commas in another file.  ``row_of(value)`` gives
    the row number of a value's first appearance."""
    if decimal is not None:
        return decimal
    commas = [v for v in vals if "," in v]
    if commas and all(_DEC_COMMA_RE.match(v) or _NUMBER_RE.match(v) for v in vals):
        if delimiter == ";":
            notes.append(
                f"decimal commas: the file is ';'-delimited and response values such as {_q(commas[0])} "
                "were read with ',' as the decimal mark (give --decimal . to refuse)"
            )
            return ","
        raise ResponseError(
            f"response column {_q(response)} uses decimal commas (found {_q(commas[0])} at row {row_of(commas[0])}); "
            "expected a decimal point; give --decimal , (API decimal=',')"
        )
    return decimal


def empty_factor_error(f: str, n: int) -> FactorError:
    return FactorError(
        f"factor column {_q(f)} is empty (no value on any of the {n} data rows); "
        "expected a level on every row; fill it in or choose another column"
    )


def empty_response_error(response: str, n: int) -> ResponseError:
    return ResponseError(
        f"response column {_q(response)} is empty (no value on any of the {n} data rows); "
        "expected numbers; choose the measured column"
    )


def factor_levels(f: str, present: list[str], given: list[str] | None) -> tuple[tuple[str, ...], str]:
    """A factor's levels and how they were ordered, from its distinct (merged) values in
    order of first appearance and the order given with ``levels=`` (if any)."""
    if given is not None:
        absent = [lv for lv in present if lv not in given]
        if absent:
            raise FactorError(
                f"factor {_q(f)}: level(s) {', '.join(repr(x) for x in absent)} occur in the data but not in "
                f"--levels {f}={','.join(given)}; expected every level listed; add them"
            )
        unknown = [g for g in given if g not in present]
        if unknown:
            raise OptionError(
                f"--levels {f}: level {_q(unknown[0])} does not occur in column {_q(f)} (its levels are "
                f"{', '.join(repr(x) for x in present)}); fix the spelling or remove it"
            )
        return tuple(given), "given"
    return order_levels(present)


def check_level_counts(f: str, lv: tuple[str, ...], n_all: int, counts, *, factors: tuple[str, str],
                       response: str, looks_continuous, hint: str = "") -> None:
    """A factor needs two levels with data and two observations per level.  ``counts``:
    kept rows per level of ``lv``; ``n_all``: levels before rows were dropped;
    ``looks_continuous()``: :func:`looks_continuous_counts` of the factor's values."""
    if len(lv) < 2:
        why = (f" after dropping rows with missing values ({n_all} level(s) before)" if n_all > len(lv) else "")
        raise FactorError(
            f"factor {_q(f)} has {len(lv)} level(s) with data ({', '.join(lv) or 'none'}){why}; "
            f"expected at least 2; choose a factor that varies{hint}"
        )
    few = [lv_ for lv_, c in zip(lv, counts) if c < 2]
    lc = looks_continuous() if few else None
    if lc:
        other = factors[1] if f == factors[0] else factors[0]
        raise FactorError(
            f"factor {_q(f)} looks like a measurement, not a factor ({lc[0]} distinct numbers, {lc[1]} seen "
            f"once; level {_q(few[0])} has {int(counts[lv.index(few[0])])} observation(s)); expected a few "
            f"repeated levels; are the response and a factor swapped? try --response {f} --factors {other} "
            f"{response}"
        )
    if few:
        raise FactorError(
            f"factor {_q(f)}: level {_q(few[0])} has fewer than two observations in total "
            f"({int(counts[lv.index(few[0])])}); expected at least 2 per level; "
            f"merge or remove that level{hint}"
        )


def swapped_hint_error(exc: ResponseError, c: str, lc: tuple[int, int], factors: tuple[str, str],
                       response: str) -> ResponseError:
    """A non-numeric response error with the hint that column ``c`` looks like the measurement."""
    fac = [x for x in factors if x != c] + ([response] if c in factors else [])
    return ResponseError(
        f"{exc}; column {_q(c)} looks like the measurement ({lc[0]} distinct numbers): are the response "
        f"and a factor swapped? try --response {c} --factors {' '.join(fac)}"
    )


def prepare(
    frame,
    *,
    response: str,
    factors: tuple[str, str],
    levels=None,
    order: str | None = None,
    unit: str | None = None,
    decimal: str | None = None,
    source: Source | None = None,
    rows: np.ndarray | None = None,
) -> Observations:
    """Validate a long-format DataFrame and turn it into :class:`Observations`.

    Parameters
    ----------
    frame : pandas.DataFrame
    response : str
    factors : (str, str)
    levels : dict or sequence of (factor, [level, ...]) pairs, optional
    order, unit : str, optional
    decimal : {'.', ','}, optional
        Decimal mark of numbers stored as text (default: '.', with ',' taken
        for a ';'-delimited file whose response values all use decimal commas).
    source : Source, optional
    rows : ndarray of int, optional
        Row numbers (default: the frame's integer index labels, else positions).
    """
    import pandas as pd

    if not isinstance(frame, pd.DataFrame):
        raise AuditInputError(
            f"data: expected a pandas DataFrame or a file path, found {type(frame).__name__}"
        )
    factors = check_factors_option(factors)
    levels = check_levels_option(levels)
    check_decimal(decimal)
    if source is None:
        source = Source(path="<DataFrame>", sha256=None, format="dataframe")
    if rows is None:
        rows, row_kind = _frame_row_ids(frame)
    else:
        row_kind = "line"
    cols = [str(c) for c in frame.columns]
    check_columns(cols, response=response, factors=factors, levels=levels, order=order, unit=unit)
    frame = frame.copy(deep=False)
    frame.columns = cols
    notes: list[str] = []
    n = len(frame)

    blank = np.ones(n, dtype=bool)
    texts: dict[str, np.ndarray] = {}
    for c in cols:
        t, m = _text_and_missing(frame[c])
        blank &= m
        if c in (response, *factors, order, unit):
            texts[c] = t
    nb = ~blank
    if not nb.any():
        raise DataFileError(f"{source.path}: no data rows below the header; expected one row per observation")
    _refuse_repeated_header(texts, (response, *factors), nb, rows, row_kind, source, cols)

    # response: native numbers, or text with missing tokens
    ycol = frame[response]
    native_y = pd.api.types.is_numeric_dtype(ycol) and not pd.api.types.is_bool_dtype(ycol)
    if native_y:
        miss_y = ycol.isna().to_numpy(dtype=bool) & nb
        ytxt = None
    else:
        lookup, ycodes = _level_lookup(ycol)
        ytxt = lookup[ycodes]
        is_na = np.array([v is None or v.lower() in RESPONSE_NA_TOKENS for v in lookup], dtype=bool)
        miss_y = is_na[ycodes] & nb
        if decimal is None:
            vals = [v for v, m in zip(lookup, is_na) if not m]
            decimal = decimal_from_values(vals, response=response, delimiter=source.delimiter, decimal=decimal,
                                          row_of=lambda v: rows[int(np.flatnonzero(ytxt == v)[0])], notes=notes)
        ytxt = _respell(ytxt, decimal)

    miss = {}
    for f in factors:
        texts[f] = _respell(texts[f], decimal)
        miss[f] = np.equal(texts[f], None) & nb
    miss_other = np.zeros(n, dtype=bool)
    for role, c in (("order", order), ("unit", unit)):
        if c is not None:
            m = np.equal(texts[c], None) & nb
            if m[nb].all():
                raise ColumnError(
                    f"{role} column {_q(c)} is empty (no value on any of the {int(nb.sum())} data rows); "
                    f"expected a value on every row; fill it in or leave out --{role}"
                )
            miss_other |= m

    def merged_hint(f: str) -> str:
        if source.format != "xlsx":
            return ""
        m = miss[f]
        below = m & ~miss_y & np.concatenate([[False], ~m[:-1] & nb[:-1]])
        if not below.any():
            return ""
        return (f"; {int(below.sum())} row(s) have a blank {_q(f)} cell below a filled one (first: row "
                f"{rows[int(np.argmax(below))]}): merged cells read as blanks below their first row; "
                "unmerge them and fill every row")

    for f in factors:
        if miss[f][nb].all():
            raise empty_factor_error(f, int(nb.sum()))
        h = merged_hint(f)
        if h:
            notes.append(f"factor {_q(f)}: {h[2:]}")
    if miss_y[nb].all():
        raise empty_response_error(response, int(nb.sum()))

    codes = []
    level_sets = []
    how_ordered = []
    for f in factors:
        txt = merge_numeric_spellings(f, texts[f], levels.get(f), notes)
        # blank rows hold None here and are no level (they are counted apart)
        present = pd.unique(pd.Series(txt[~np.equal(txt, None)], dtype=object)).tolist()
        lv, how = factor_levels(f, present, levels.get(f))
        how_ordered.append(how)
        lookup = {v: i for i, v in enumerate(lv)}
        c = pd.Series(txt, dtype=object).map(lookup).fillna(-1).to_numpy(dtype=np.int64)
        codes.append(c)
        level_sets.append(lv)
        texts[f] = txt
    miss_factor = miss[factors[0]] | miss[factors[1]]
    drop = blank | miss_factor | miss_y | miss_other
    keep = ~drop
    a_all, b_all = codes
    la, lb = level_sets
    # levels that survive after dropping rows; re-code to keep only observed levels in order
    a_keep, b_keep = a_all[keep], b_all[keep]
    J0, K0 = len(la), len(lb)
    obs_a = np.bincount(a_keep, minlength=J0)
    obs_b = np.bincount(b_keep, minlength=K0)
    if levels.get(factors[0]) is None:
        la = tuple(lv for lv, c in zip(la, obs_a) if c > 0)
    if levels.get(factors[1]) is None:
        lb = tuple(lv for lv, c in zip(lb, obs_b) if c > 0)
    remap_a = np.cumsum(obs_a > 0) - 1 if levels.get(factors[0]) is None else np.arange(J0)
    remap_b = np.cumsum(obs_b > 0) - 1 if levels.get(factors[1]) is None else np.arange(K0)
    for f, lv, n_all, counts in ((factors[0], la, J0, np.bincount(remap_a[a_keep], minlength=len(la))),
                                 (factors[1], lb, K0, np.bincount(remap_b[b_keep], minlength=len(lb)))):
        check_level_counts(f, lv, n_all, counts, factors=factors, response=response,
                           looks_continuous=lambda f=f: _looks_continuous(texts[f]), hint=merged_hint(f))
    if native_y:
        ycol_parse, y_is_text = ycol, False
    else:
        ycol_parse = pd.Series(np.where(np.equal(ytxt, None), "", ytxt), dtype=object)
        y_is_text = True
    try:
        y, offset, centring = parse_response(ycol_parse, y_is_text, response, rows, keep, row_kind)
    except ResponseError as exc:
        if "must be numeric" not in str(exc):
            raise
        for c in (*factors, *(c for c in cols if c not in (response, *factors))):
            lc = _looks_continuous(texts[c] if c in texts else _as_level_text(frame[c]))
            if lc:
                raise swapped_hint_error(exc, c, lc, factors, response) from None
        raise
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
        otxt = _respell(texts[order], decimal)[keep]
        ov = pd.to_numeric(pd.Series(otxt, dtype=object), errors="coerce").to_numpy(dtype=float)
        if np.isnan(ov).any():
            i = int(np.flatnonzero(keep)[np.argmax(np.isnan(ov))])
            raise ColumnError(
                f"order column {_q(order)} must be numeric (run order); found {_q(otxt[np.argmax(np.isnan(ov))])} "
                f"at row {rows[i]}; expected a run number on every row"
            )
        order_v = ov
    if unit is not None:
        unit_v = pd.factorize(pd.Series(texts[unit][keep], dtype=object))[0].astype(np.int64)
    a_codes = remap_a[a_keep].astype(np.int64)
    b_codes = remap_b[b_keep].astype(np.int64)
    dup = 0
    if y.size < 5_000_000:
        dup = int(pd.DataFrame({"a": a_codes, "b": b_codes, "y": y}).duplicated().sum())
    return Observations(
        response=response,
        factors=(factors[0], factors[1]),
        y=y,
        offset=offset,
        centring=centring,
        a=a_codes,
        b=b_codes,
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
        notes=tuple(notes),
        level_order=(how_ordered[0], how_ordered[1]),
    )


def load(data, *, response: str, factors, levels=None, order=None, unit=None, sheet=None, encoding=None,
         decimal=None) -> Observations:
    """Read (when ``data`` is a path) and validate a long-format dataset.

    Parameters
    ----------
    data : str, path or pandas.DataFrame
    response : str
    factors : (str, str)
    levels : dict or sequence of (factor, [level, ...]) pairs, optional
    order, unit : str, optional
    sheet : str or int, optional
        Workbook sheet by name or number (from 1); required when an .xlsx
        file has several sheets.
    encoding : str, optional
        Encoding of a text file (default: UTF-8, or UTF-16 with a BOM).
    decimal : {'.', ','}, optional
        Decimal mark of numbers stored as text.
    """
    import pandas as pd

    if isinstance(data, (str, os.PathLike)):
        frame, source, rows = read_table(data, sheet=sheet, encoding=encoding)
        return prepare(frame, response=response, factors=factors, levels=levels, order=order, unit=unit,
                       decimal=decimal, source=source, rows=rows)
    if isinstance(data, pd.DataFrame):
        for opt, val in (("sheet", sheet), ("encoding", encoding)):
            if val is not None:
                raise OptionError(f"{opt}: applies to files only, but data is a DataFrame; leave out {opt}=")
        return prepare(data, response=response, factors=factors, levels=levels, order=order, unit=unit,
                       decimal=decimal)
    raise AuditInputError(
        f"data: expected a file path or a pandas DataFrame, found {type(data).__name__}"
    )
