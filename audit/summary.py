"""Stage 1 of the flow for a manuscript's table: read and validate a table of
cell statistics (one row per cell: the two factors, a mean, an SD or SE, a size).

The table is read like a raw dataset (:func:`audit.intake.read_table`: CSV, TSV,
XLSX or Parquet, the same encoding, decimal-mark and sheet handling) or taken as
a DataFrame, validated once here, and turned into :class:`~audit.design.CellStats`
by :func:`audit.design.cells_from_summary`.  Every error names the row and the
column at fault (row numbers as in intake: the line of the file, the header being
line 1; for a DataFrame its integer index labels, else 0-based positions).

Reported precision
------------------
The rounding sensitivity and GRIM/GRIMMER need the number of decimals each
value was printed with.  Per column (the largest count over the column's rows):

* from a text file: counted in the text as written ("5.20" has 2 decimals,
  "1.5e-2" has 3);
* from a workbook, Parquet file or DataFrame (binary numbers, trailing zeros
  lost): counted in the shortest round-trip repr of each float (5.2 -> 1), so a
  column printed as 5.20 but stored as 5.2 next to no value with 2 decimals is
  read as 1 decimal; give ``decimals=`` to state it;
* ``decimals=`` (an int for every column, or {column: int}) overrides both.

``decimals_source`` in :class:`SummaryTable` says which was used.

Sizes and levels
----------------
A cell size is a whole number from 1 to :data:`audit.design.MAX_CELL_SIZE` (10^12);
a larger one is a typed error naming the row and column.  Factor levels that spell
one number two ways ('1', '1.0') are merged with a note by the rule check mode uses
(:func:`audit.intake.merge_numeric_spellings`); beside text they are an error.
Means and SDs may be of any magnitude float64 holds: every square is formed on
values divided by an exact power of two (:func:`audit.design.cells_from_summary`).
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass

import numpy as np

from .design import MAX_CELL_SIZE, CellStats, cells_from_summary
from .errors import AuditInputError, ColumnError, FactorError, OptionError, ResponseError

__all__ = ["SummaryTable", "read_summary", "cell_table_columns", "decimals_of"]

_NUM_TEXT = re.compile(r"^[+-]?(?P<int>\d*)(?:\.(?P<frac>\d*))?(?:[eE](?P<exp>[+-]?\d+))?$")

#: common spellings (compared on the lower-case name with non-letters removed, or on
#: one of its words) of the columns of a cell-statistics table
MEAN_NAMES = frozenset({"mean", "means", "avg", "average", "xbar", "cellmean", "meanscore", "m"})
SD_NAMES = frozenset({"sd", "sds", "std", "stdev", "stddev", "sdev", "standarddeviation", "s"})
SE_NAMES = frozenset({"se", "sem", "stderr", "standarderror", "serr"})
N_NAMES = frozenset({"n", "ns", "count", "counts", "size", "sizes", "cellsize", "samplesize", "nobs", "ncell"})
_WORD_NAMES = {"mean": MEAN_NAMES - {"m"}, "sd": SD_NAMES - {"s"}, "se": SE_NAMES, "n": N_NAMES - {"ns"}}


def _kind_of(name) -> str | None:
    s = str(name).strip().lower()
    flat = re.sub(r"[^a-z]", "", s)
    for kind, names in (("mean", MEAN_NAMES), ("sd", SD_NAMES), ("se", SE_NAMES), ("n", N_NAMES)):
        if flat in names:
            return kind
    words = [w for w in re.split(r"[^a-z]+", s) if w]
    if len(words) > 1:
        for kind in ("mean", "sd", "se", "n"):
            if any(w in _WORD_NAMES[kind] for w in words):
                return kind
    return None


def cell_table_columns(columns, *, exclude=()) -> dict:
    """Columns whose names look like those of a table of cell statistics.

    Parameters
    ----------
    columns : iterable of str
    exclude : iterable of str
        Columns not to consider (the factors).

    Returns
    -------
    dict
        {'mean': name, 'sd': name, 'se': name, 'n': name}, for the kinds found
        (first matching column of each kind).
    """
    out: dict = {}
    skip = set(map(str, exclude))
    for c in columns:
        if str(c) in skip:
            continue
        k = _kind_of(c)
        if k is not None and k not in out:
            out[k] = str(c)
    return out


def decimals_of(value) -> int | None:
    """Digits after the decimal point of a reported number (exponent included:
    '1.5e-2' -> 3, '1200' -> 0); None for a missing value.  A float is read in
    its shortest round-trip repr."""
    if value is None:
        return None
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(float(value)):
            return None
        text = repr(float(value))
    elif isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return 0
    else:
        text = str(value).strip()
    m = _NUM_TEXT.match(text)
    if not m:
        return None
    frac = len(m.group("frac") or "")
    exp = int(m.group("exp") or 0)
    return max(frac - exp, 0)


@dataclass(frozen=True, kw_only=True)
class SummaryTable:
    """A validated table of cell statistics.

    Attributes
    ----------
    cells : CellStats
    columns : dict
        {'mean': name, 'spread': name, 'n': name}: the table's columns used
        (in the JSON: 'mean_column', 'spread_column', 'n_column').
    spread : str
        'sd' or 'se': what the spread column holds (an SE is turned into the
        SD as SE * sqrt(n)).
    decimals : dict
        {'mean': int or None, 'spread': int or None}: reported decimals of the
        mean and spread columns (None when not known).
    decimals_source : str
        'text' (counted in the file's text), 'float repr' (shortest repr of the
        stored numbers) or 'given' (``decimals=``).
    spread_values : ndarray (J, K)
        The spread as reported (SD or SE; NaN in empty cells or n = 1 cells
        without one).
    rows : ndarray (J, K) of int
        Row number of each cell in the table (-1 for an empty cell).
    path : str or None
        The file read, or None for a DataFrame.
    sha256 : str or None
    notes : tuple of str
    """

    cells: CellStats
    columns: dict
    spread: str
    decimals: dict
    decimals_source: str
    spread_values: np.ndarray
    rows: np.ndarray
    path: str | None = None
    sha256: str | None = None
    notes: tuple = ()

    def half_units(self) -> tuple[float | None, float | None]:
        """Half a unit in the last reported digit of the means and of the spread."""
        def h(d):
            return None if d is None else 0.5 * 10.0 ** (-d)

        return h(self.decimals.get("mean")), h(self.decimals.get("spread"))

    def to_dict(self) -> dict:
        return {"columns": {f"{k}_column": v for k, v in self.columns.items()}, "spread": self.spread, "decimals": dict(self.decimals),
                "decimals_source": self.decimals_source, "input": self.path, "notes": list(self.notes)}


def _check_decimals(decimals, cols) -> dict | None:
    if decimals is None:
        return None
    if isinstance(decimals, (int, np.integer)) and not isinstance(decimals, bool):
        decimals = {c: int(decimals) for c in cols}
    if not isinstance(decimals, dict):
        raise OptionError(f"decimals: expected a whole number or {{column: number}}, found {decimals!r}")
    out = {}
    for k, v in decimals.items():
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or not 0 <= int(v) <= 15:
            raise OptionError(f"decimals: expected a whole number from 0 to 15 for column {k!r}, found {v!r}")
        out[str(k)] = int(v)
    return out


def _level_text(v) -> str | None:
    """A factor cell as level text (None when blank); a whole float is written without '.0'."""
    s = None if v is None or (isinstance(v, float) and math.isnan(v)) else str(v).strip()
    if isinstance(v, (float, np.floating)) and s and float(v).is_integer():
        s = str(int(v))
    return s or None


def _number(v, decimal: str | None):
    """(float, decimals) of a cell, or (None, None) when blank; raises ValueError on text."""
    if v is None:
        return None, None
    if isinstance(v, (bool, np.bool_)):
        raise ValueError
    if isinstance(v, (int, np.integer)):
        return float(v), 0
    if isinstance(v, (float, np.floating)):
        if math.isnan(float(v)):
            return None, None
        return float(v), decimals_of(float(v))
    s = str(v).strip()
    if not s:
        return None, None
    if decimal == ",":
        s = s.replace(",", ".")
    if not _NUM_TEXT.match(s) or s in (".", "+", "-", "+.", "-."):
        raise ValueError
    return float(s), decimals_of(s)


def read_summary(table, *, factors, mean: str = "mean", sd: str | None = None, se: str | None = None,
                 n: str = "n", response: str = "y", sheet=None, encoding: str | None = None,
                 decimal: str | None = None, decimals=None) -> SummaryTable:
    """Read and validate a table of cell statistics.

    Parameters
    ----------
    table : str, path or pandas.DataFrame
        One row per cell.
    factors : (str, str)
    mean, n : str
        Columns of the cell means and sizes.
    sd, se : str
        Column of the SDs (ddof 1) or of the standard errors of the means;
        exactly one (default: ``sd='sd'``).
    response : str
        Name to show for the response.
    sheet, encoding, decimal : optional
        As in :func:`audit.check`.
    decimals : int or dict, optional
        Reported decimals of the mean and spread columns (see the module
        docstring for the default).
    """
    import pandas as pd

    from .intake import check_factors_option, merge_numeric_spellings, read_table

    factors = check_factors_option(factors)
    if sd is not None and se is not None:
        raise OptionError(f"sd/se: give the SD column or the SE column, not both (found sd={sd!r}, se={se!r})")
    spread_kind, spread = ("se", se) if se is not None else ("sd", sd if sd is not None else "sd")
    if decimal not in (None, ".", ","):
        raise OptionError(f"decimal: expected '.' or ',', found {decimal!r}; give --decimal , for decimal commas")
    path = sha = None
    from_text = False
    if isinstance(table, (str, os.PathLike)):
        frame, source, rows = read_table(table, sheet=sheet, encoding=encoding)
        path, sha, from_text = source.path, source.sha256, source.format == "text"
    elif isinstance(table, pd.DataFrame):
        for opt, val in (("sheet", sheet), ("encoding", encoding)):
            if val is not None:
                raise OptionError(f"{opt}: applies to files only, but the table is a DataFrame; leave out {opt}=")
        frame = table
        idx = frame.index
        rows = (np.asarray(idx, dtype=np.int64) if pd.api.types.is_integer_dtype(idx)
                else np.arange(len(frame), dtype=np.int64))
    else:
        raise AuditInputError(f"summary table: expected a file path or a pandas DataFrame, found "
                              f"{type(table).__name__}; give one row per cell")
    cols = [str(c) for c in frame.columns]
    needed = {"factor": factors, "mean": (mean,), spread_kind: (spread,), "n": (n,)}
    opt = {"mean": "--mean (mean=)", "sd": "--sd (sd=)", "se": "--se (se=)", "n": "--n (n=)"}
    for role, names in needed.items():
        for c in names:
            if c not in cols:
                fix = "name it with --factors COL_A COL_B" if role == "factor" else f"name it with {opt[role]}"
                raise ColumnError(f"summary table: {role} column {c!r} not found; the columns are: "
                                  f"{', '.join(cols)}; {fix}")
    used = [*factors, mean, spread, n]
    if len(set(used)) < len(used):
        raise ColumnError(f"summary table: one column named for two roles ({', '.join(used)}); "
                          "expected distinct factor, mean, spread and n columns")
    dec = _check_decimals(decimals, [mean, spread])
    frame = frame.reset_index(drop=True)
    notes: list[str] = []
    level_text = {f: np.array([_level_text(v) for v in frame[f]], dtype=object) for f in factors}
    for f in factors:   # '1' and '1.0' are one level, as in check mode (one rule: intake's)
        level_text[f] = merge_numeric_spellings(f, level_text[f], None, notes)
    keyed: dict = {}
    recs = []
    dmax = {"mean": None, "spread": None}
    for i in range(len(frame)):
        row = frame.iloc[i]
        where = f"summary table row {rows[i]}"
        vals = {}
        levels = [level_text[f][i] for f in factors]
        blank = all(lv is None for lv in levels)
        for role, c in (("mean", mean), ("spread", spread), ("n", n)):
            try:
                vals[role] = _number(row[c], decimal)
            except ValueError:
                raise ResponseError(f"{where}, column {c!r}: expected a number, found {str(row[c])!r}; "
                                    "fix or remove the row") from None
            blank = blank and vals[role][0] is None
        if blank:
            continue
        for f, lv in zip(factors, levels):
            if lv is None:
                raise FactorError(f"{where}, column {f!r}: the level is blank; expected a level on every row")
        (mv, md), (sv, sdd), (nv, _) = vals["mean"], vals["spread"], vals["n"]
        if nv is None or not math.isfinite(nv) or not float(nv).is_integer() or nv < 1:
            raise ResponseError(f"{where}, column {n!r}: expected a whole number >= 1 (the cell size), found "
                                f"{str(row[n])!r}; leave empty cells out of the table")
        if nv > MAX_CELL_SIZE:
            raise ResponseError(f"{where}, column {n!r}: expected a cell size of at most {MAX_CELL_SIZE:.0e} "
                                f"(MAX_CELL_SIZE), found {str(row[n])!r}; give the number of observations in "
                                "the cell")
        if mv is None or not math.isfinite(mv):
            raise ResponseError(f"{where}, column {mean!r}: expected a finite cell mean, found {str(row[mean])!r}")
        if nv < 2 and sv is not None:
            raise ResponseError(f"{where}, column {spread!r}: a cell of n = 1 has no {spread_kind.upper()}, found "
                                f"{str(row[spread])!r}; leave it blank (or fix column {n!r})")
        if nv >= 2 and sv is None:
            raise ResponseError(f"{where}, column {spread!r}: expected the cell's {spread_kind.upper()} (n = "
                                f"{int(nv)}), found a blank; fill it in")
        if sv is not None and (not math.isfinite(sv) or sv < 0):
            raise ResponseError(f"{where}, column {spread!r}: expected an {spread_kind.upper()} >= 0, found "
                                f"{str(row[spread])!r}")
        key = tuple(levels)
        if key in keyed:
            raise AuditInputError(f"{where}, columns {factors[0]!r} and {factors[1]!r}: cell {key[0]} x {key[1]} "
                                  f"already appears on row {keyed[key]}; give each cell once")
        keyed[key] = int(rows[i])
        for role, d in (("mean", md), ("spread", sdd)):
            if d is not None:
                dmax[role] = d if dmax[role] is None else max(dmax[role], d)
        recs.append((levels[0], levels[1], mv, sv, int(nv), int(rows[i])))
    if not recs:
        raise AuditInputError("summary table: no rows with data; expected one row per cell")
    if dec is not None:
        decs = {"mean": dec.get(mean, dmax["mean"]), "spread": dec.get(spread, dmax["spread"])}
        source_kind = "given"
    else:
        decs = dmax
        source_kind = "text" if from_text else "float repr"
    la = list(dict.fromkeys(r[0] for r in recs))
    lb = list(dict.fromkeys(r[1] for r in recs))
    for f, lv in zip(factors, (la, lb)):
        if len(lv) < 2:
            raise FactorError(f"summary table, column {f!r}: factor needs at least 2 levels, found {len(lv)} "
                              f"({', '.join(lv)}); a two-way audit needs two crossed factors")
    nn = np.array([r[4] for r in recs], dtype=float)
    spread_v = np.array([np.nan if r[3] is None else r[3] for r in recs], dtype=float)
    sd_v = spread_v * np.sqrt(nn) if spread_kind == "se" else spread_v
    clean = pd.DataFrame({"a": [r[0] for r in recs], "b": [r[1] for r in recs],
                          "mean": [r[2] for r in recs], "sd": np.where(nn > 1, sd_v, 0.0), "n": nn})
    cells = cells_from_summary(clean.rename(columns={"a": factors[0], "b": factors[1]}), factors=factors,
                               mean="mean", sd="sd", n="n", response=response)
    J, K = cells.J, cells.K
    spread_grid = np.full((J, K), np.nan)
    row_grid = np.full((J, K), -1, dtype=np.int64)
    ia = {lv: j for j, lv in enumerate(cells.levels_a)}
    ib = {lv: k for k, lv in enumerate(cells.levels_b)}
    for r, s in zip(recs, spread_v):
        spread_grid[ia[r[0]], ib[r[1]]] = s
        row_grid[ia[r[0]], ib[r[1]]] = r[5]
    if spread_kind == "se":
        notes.append(f"column {spread!r} holds standard errors of the means; SD = SE * sqrt(n) per cell")
    if source_kind == "float repr":
        notes.append("reported decimals inferred from the stored numbers (trailing zeros are not stored); "
                     "give decimals= if the table printed more digits")
    spread_grid.setflags(write=False)
    row_grid.setflags(write=False)
    return SummaryTable(cells=cells, columns={"mean": mean, "spread": spread, "n": n}, spread=spread_kind,
                        decimals=decs, decimals_source=source_kind, spread_values=spread_grid, rows=row_grid,
                        path=path, sha256=sha, notes=tuple(notes))


def cell_table_hint(columns, *, factors, path: str | None, response: str) -> str | None:
    """The one-line hint when a dataset given to ``check`` looks like a table of
    cell statistics (the caller has found one row per cell), or None."""
    found = cell_table_columns(columns, exclude=factors)
    if "mean" not in found and _kind_of(response) == "mean":
        found["mean"] = response
    if "mean" not in found or not ({"sd", "se", "n"} & set(found)):
        return None
    spread = f"--se {found['se']}" if "se" in found and "sd" not in found else f"--sd {found.get('sd', 'COL')}"
    cmd = (f"twoway-audit check-summary {path or 'TABLE'} --factors {factors[0]} {factors[1]} "
           f"--mean {found['mean']} {spread} --n {found.get('n', 'COL')}")
    shown = ", ".join(repr(v) for v in found.values())
    return (f"the data have one row per cell and columns named like cell statistics ({shown}): this looks like a "
            f"table of cell means, not raw observations; audit it with: {cmd} (API: audit.check_summary)")
