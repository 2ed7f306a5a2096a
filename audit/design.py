"""Stage 2 of the flow: the two-way design as cell sufficient statistics.

Everything downstream of intake works from :class:`CellStats` (cell counts,
means and centred sums of squares) wherever it can, so that a table of cell
means, SDs and sizes (summary mode) and a raw dataset (data mode) share one
engine.  :func:`describe_design` turns the cells into the plain description a
reviewer reads first: levels, cell counts, empty cells, balance.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import AuditInputError, ColumnError, FactorError, ResponseError
from .intake import order_levels

__all__ = [
    "CellStats",
    "CellMoments",
    "cell_moments",
    "cell_moments_scaled",
    "pow2_scale",
    "MAX_CELL_SIZE",
    "DesignSummary",
    "cells_from_observations",
    "cells_from_summary",
    "describe_design",
    "balance_class",
]


#: largest cell size a summary table may state (10^12: beyond any study, and far
#: inside the range where counts and their sums are exact in float64 and int64)
MAX_CELL_SIZE = 10**12


def pow2_scale(*arrays) -> float:
    """An exact power of two near the largest finite magnitude in ``arrays``
    (1.0 when there is none or it is 0).

    Dividing by it is exact in binary floating point (barring underflow of
    values far below the largest), so the arithmetic on the standardised values
    is bitwise the arithmetic on the originals wherever the originals neither
    overflow nor underflow, and squares of the standardised values stay near 1
    at every scale of the data (common practice: scaling by powers of the radix).
    """
    big = 0.0
    for a in arrays:
        a = np.abs(np.asarray(a, dtype=float))
        a = a[np.isfinite(a)]
        if a.size:
            big = max(big, float(a.max()))
    if big == 0.0:
        return 1.0
    return math.ldexp(1.0, math.frexp(big)[1] - 1)   # 2^e <= big < 2^(e+1)


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True, kw_only=True)
class CellStats:
    """Sufficient statistics of a two-way layout, one entry per cell.

    Attributes
    ----------
    factors : tuple of str
        Names of factor A and factor B (the real column names).
    levels_a, levels_b : tuple of str
        Level names, in the order used for every (J, K) array.
    counts : ndarray of int, shape (J, K)
        Observations per cell (0 for an empty cell).
    means : ndarray of float, shape (J, K)
        Cell means *relative to* ``offset``; NaN in empty cells.
    css : ndarray of float, shape (J, K)
        Centred sums of squares, sum (y - cell mean)^2; 0 in cells with n <= 1.
    offset : float
        Constant subtracted from the response at intake (exact decimal
        centring); add it back to ``means`` for display.  Sums of squares do not
        depend on it.
    response : str
        Name of the response.
    unit : float, default 1.0
        ``means`` and ``css`` are in units of ``unit`` (a power of two): the
        response-scale mean is ``offset + unit * means`` and the centred SS is
        ``unit**2 * css``.  1.0 for the cells a fit holds; the copy returned by
        :meth:`standardised` carries its scale here.

    Notes
    -----
    Moments and quadratic forms are computed on :meth:`standardised` values
    (divided by an exact power of two), so that a response multiplied by 10^k
    gives the same statistics for every k where float64 holds the data; only
    displayed sums of squares are restored to the response scale.
    """

    factors: tuple[str, str]
    levels_a: tuple[str, ...]
    levels_b: tuple[str, ...]
    counts: np.ndarray
    means: np.ndarray
    css: np.ndarray
    offset: float = 0.0
    response: str = "y"
    unit: float = 1.0
    #: (scale, means / scale, css / scale^2) computed without overflow or
    #: underflow where the cells were built (see :meth:`standardised`)
    standard: tuple | None = field(default=None, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "counts", _frozen(np.asarray(self.counts, dtype=np.int64)))
        object.__setattr__(self, "means", _frozen(np.asarray(self.means, dtype=float)))
        object.__setattr__(self, "css", _frozen(np.asarray(self.css, dtype=float)))

    def standardised(self) -> "CellStats":
        """A copy in units of an exact power of two near the largest of |mean|
        and the cell RMS deviations (both relative to ``offset``), so that every
        square and quadratic form of the copy is of order 1 or below.

        Dividing by a power of two is exact: statistics computed on the copy are
        those of the original wherever the original's arithmetic does not
        overflow or underflow, and stay right where it would.  The scale is in
        the copy's ``unit`` (relative to the response scale).
        """
        if self.standard is not None:
            s, means, css = self.standard
            s = s * self.unit
        else:
            n = np.maximum(self.counts, 1)
            with np.errstate(all="ignore"):
                rms = np.sqrt(self.css / n)
            s0 = pow2_scale(np.where(self.counts > 0, self.means, 0.0), rms)
            means = self.means / s0
            css = self.css / s0 / s0
            s = s0 * self.unit
        return CellStats(factors=self.factors, levels_a=self.levels_a, levels_b=self.levels_b,
                         counts=self.counts, means=means, css=css, offset=self.offset,
                         response=self.response, unit=s, standard=(1.0, means, css))

    @property
    def sd(self) -> np.ndarray:
        """Cell standard deviations (ddof 1) on the response scale, computed on
        the standardised values (no overflow); NaN where n <= 1 or out of range."""
        st = self.standardised()
        with np.errstate(all="ignore"):
            v = np.sqrt(st.css / (self.counts - 1)) * st.unit
        return np.where((self.counts > 1) & np.isfinite(v), v, np.nan)

    @property
    def J(self) -> int:
        return len(self.levels_a)

    @property
    def K(self) -> int:
        return len(self.levels_b)

    @property
    def N(self) -> int:
        return int(self.counts.sum())

    @property
    def filled(self) -> np.ndarray:
        """Boolean (J, K) mask of non-empty cells."""
        return self.counts > 0

    @property
    def m(self) -> int:
        """Number of non-empty cells."""
        return int(self.filled.sum())

    @property
    def variances(self) -> np.ndarray:
        """Cell variances (ddof 1); NaN where n <= 1."""
        with np.errstate(invalid="ignore", divide="ignore"):
            v = self.css / (self.counts - 1)
        return np.where(self.counts > 1, v, np.nan)

    @property
    def sse_within(self) -> float:
        """Residual SS of the full (cell-means) model."""
        return float(self.css.sum())

    @property
    def df_within(self) -> int:
        return self.N - self.m

    @property
    def display_means(self) -> np.ndarray:
        """Cell means on the original scale (offset added back)."""
        return self.means * self.unit + self.offset if self.unit != 1.0 else self.means + self.offset

    def cell_label(self, j: int, k: int) -> str:
        return f"{self.levels_a[j]} x {self.levels_b[k]}"


@dataclass(frozen=True, kw_only=True)
class CellMoments:
    """Per-cell moments beyond :class:`CellStats`, as a scan of data where it
    lives computes them (``audit/engines``: one set of definitions, one SQL
    query per engine dialect).

    Every array is (J, K) and, except the counts, in units of ``unit`` (an exact
    power of two) relative to ``cells.offset``: the response-scale value is
    ``offset + unit * x`` for locations, ``unit**p * x`` for p-th power sums.
    Empty cells hold NaN (0 for sums).

    Attributes
    ----------
    cells : CellStats
        Counts, means and centred SS (its ``standard`` copy is in ``unit``).
    m3, m4 : ndarray
        Centred third and fourth power sums, sum (y - cell mean)^p.
    minimum, maximum, median : ndarray
        Cell extremes and median (the median averages the two middle values).
    absdev_median_mean, absdev_median_css : ndarray
        Mean and centred SS of |y - cell median| (Brown-Forsythe).
    absdev_mean_mean, absdev_mean_css : ndarray
        Mean and centred SS of |y - cell mean| (Levene).
    missing_response : ndarray of int
        Rows per cell whose factors are known and whose response is missing.
    missing_factor : int
        Rows with a missing factor value.
    unit : float
        The exact power of two of every array above.
    """

    cells: CellStats
    m3: np.ndarray
    m4: np.ndarray
    minimum: np.ndarray
    maximum: np.ndarray
    median: np.ndarray
    absdev_median_mean: np.ndarray
    absdev_median_css: np.ndarray
    absdev_mean_mean: np.ndarray
    absdev_mean_css: np.ndarray
    missing_response: np.ndarray
    missing_factor: int
    unit: float

    def __post_init__(self) -> None:
        for name in ("m3", "m4", "minimum", "maximum", "median", "absdev_median_mean", "absdev_median_css",
                     "absdev_mean_mean", "absdev_mean_css"):
            object.__setattr__(self, name, _frozen(np.asarray(getattr(self, name), dtype=float)))
        object.__setattr__(self, "missing_response", _frozen(np.asarray(self.missing_response, dtype=np.int64)))


def cell_moments(y: np.ndarray, cell: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counts, means (0 in empty cells) and centred sums of squares of ``y`` per
    cell index 0..m-1, by ``bincount`` in two passes (the mean is corrected by
    the mean residual before the squares are summed).

    Computed on ``y`` divided by an exact power of two (:func:`pow2_scale`) and
    restored, so squares neither underflow nor overflow in between; a centred
    SS beyond the float64 range comes back as inf (or 0), see
    :func:`cell_moments_scaled` for the standardised values themselves."""
    n, mean, css, s = cell_moments_scaled(y, cell, m)
    with np.errstate(over="ignore", under="ignore"):
        return n, mean * s, css * s * s


def cell_moments_scaled(y: np.ndarray, cell: np.ndarray, m: int):
    """(counts, means / s, css / s^2, s) with s = :func:`pow2_scale` (y)."""
    y = np.asarray(y, dtype=float)
    s = pow2_scale(y)
    n, mean, css = _cell_moments_raw(y / s, cell, m)
    return n, mean, css, s


def _cell_moments_raw(y: np.ndarray, cell: np.ndarray, m: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    n = np.bincount(cell, minlength=m)
    nz = np.maximum(n, 1)
    mean = np.bincount(cell, weights=y, minlength=m) / nz
    d = y - mean[cell]
    mean = mean + np.bincount(cell, weights=d, minlength=m) / nz
    d = y - mean[cell]
    css = np.bincount(cell, weights=d * d, minlength=m)
    return n, mean, css


def cells_from_observations(
    y: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    *,
    levels_a: tuple[str, ...],
    levels_b: tuple[str, ...],
    factors: tuple[str, str],
    offset: float = 0.0,
    response: str = "y",
) -> CellStats:
    """Cell counts, means and centred SS by ``bincount`` (two passes)."""
    J, K = len(levels_a), len(levels_b)
    cell = np.asarray(a, dtype=np.int64) * K + np.asarray(b, dtype=np.int64)
    n, mean_s, css_s, s = cell_moments_scaled(y, cell, J * K)
    mean_s = np.where(n > 0, mean_s, np.nan)
    # a second exact power of two from the spread, so that cells far from 0
    # relative to their spread keep their SS well inside the float64 range
    rms = np.sqrt(css_s / np.maximum(n, 1))
    s2 = pow2_scale(np.where(n > 0, mean_s, 0.0), rms)
    mean_s, css_s, s = mean_s / s2, css_s / s2 / s2, s * s2
    with np.errstate(over="ignore", under="ignore"):
        mean, css = mean_s * s, css_s * s * s
    return CellStats(
        factors=factors,
        levels_a=tuple(levels_a),
        levels_b=tuple(levels_b),
        counts=n.reshape(J, K),
        means=mean.reshape(J, K),
        css=css.reshape(J, K),
        offset=offset,
        response=response,
        standard=(s, mean_s.reshape(J, K), css_s.reshape(J, K)),
    )


def _ordered_codes(col):
    """Level codes and levels of a summary-table factor, in :func:`audit.intake.order_levels` order."""
    import pandas as pd

    codes, first = pd.factorize(col.astype(str), sort=False)
    levels, _how = order_levels(first)
    rank = np.array([levels.index(str(v)) for v in first], dtype=np.int64)
    return rank[codes], levels


def cells_from_summary(
    table,
    *,
    factors: tuple[str, str],
    mean: str = "mean",
    sd: str = "sd",
    n: str = "n",
    response: str = "y",
) -> CellStats:
    """Cell statistics from a table with one row per cell (means, SDs, sizes).

    ``table`` is a pandas DataFrame with the two factor columns and the
    ``mean``, ``sd`` and ``n`` columns.  Cells absent from the table are empty.
    """
    import pandas as pd

    if not isinstance(table, pd.DataFrame):
        raise AuditInputError(
            f"summary table: expected a pandas DataFrame, found {type(table).__name__}; "
            "pass one row per cell with factor, mean, sd and n columns"
        )
    needed = [*factors, mean, sd, n]
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise ColumnError(
            f"summary table: column {missing[0]!r} not found; expected columns {needed}, "
            f"found {list(map(str, table.columns))}; name the columns with factors=, mean=, sd=, n="
        )
    a_codes, a_levels = _ordered_codes(table[factors[0]])
    b_codes, b_levels = _ordered_codes(table[factors[1]])
    J, K = len(a_levels), len(b_levels)
    for name, L in ((factors[0], J), (factors[1], K)):
        if L < 2:
            raise FactorError(
                f"summary table: factor {name!r} needs at least 2 levels, found {L}; "
                "a two-way audit needs two crossed factors"
            )
    counts = np.zeros((J, K), dtype=np.int64)
    means = np.full((J, K), np.nan)
    sds = np.zeros((J, K))
    seen = np.zeros((J, K), dtype=bool)
    for i, (ja, kb) in enumerate(zip(a_codes, b_codes)):
        row = table.iloc[i]
        try:
            nn = float(row[n])
            mm = float(row[mean])
            ss = float(row[sd])
        except (TypeError, ValueError):
            raise ResponseError(
                f"summary table row {i + 1}: expected numeric {mean!r}, {sd!r}, {n!r}, "
                f"found {row[mean]!r}, {row[sd]!r}, {row[n]!r}; fix or remove the row"
            ) from None
        if seen[ja, kb]:
            raise AuditInputError(
                f"summary table row {i + 1}: cell {a_levels[ja]} x {b_levels[kb]} appears twice; "
                "give each cell once"
            )
        if not (np.isfinite(nn) and 1 <= nn <= MAX_CELL_SIZE and float(nn).is_integer()):
            raise ResponseError(
                f"summary table row {i + 1}: column {n!r} must be a whole number from 1 to "
                f"{MAX_CELL_SIZE:.0e} (MAX_CELL_SIZE), found {row[n]!r}; give the cell's number of observations"
            )
        if not np.isfinite(mm) or not np.isfinite(ss) or ss < 0:
            raise ResponseError(
                f"summary table row {i + 1}: expected a finite mean and an SD >= 0, "
                f"found mean {row[mean]!r}, sd {row[sd]!r}"
            )
        seen[ja, kb] = True
        counts[ja, kb] = int(nn)
        means[ja, kb] = mm
        sds[ja, kb] = ss if nn > 1 else 0.0
    # SS formed on values divided by an exact power of two (no overflow / underflow)
    s = pow2_scale(np.where(counts > 0, means, 0.0), sds)
    means_s = means / s
    css_s = np.maximum(counts - 1, 0) * (sds / s) ** 2
    with np.errstate(over="ignore", under="ignore"):
        css = css_s * s * s
    return CellStats(
        factors=tuple(factors),
        levels_a=tuple(map(str, a_levels)),
        levels_b=tuple(map(str, b_levels)),
        counts=counts,
        means=means,
        css=css,
        response=response,
        standard=(s, means_s, css_s),
    )


def balance_class(counts: np.ndarray) -> str:
    """'balanced', 'proportional' or 'unbalanced' (empty cells: unbalanced).

    Proportional means n_jk = n_j. n_.k / N for every cell (common practice).
    """
    counts = np.asarray(counts)
    if (counts == 0).any():
        return "unbalanced"
    if (counts == counts.flat[0]).all():
        return "balanced"
    N = counts.sum()
    expected = np.outer(counts.sum(1), counts.sum(0)) / N
    if np.allclose(counts, expected, rtol=1e-12, atol=0):
        return "proportional"
    return "unbalanced"


def is_connected(filled: np.ndarray) -> bool:
    """Whether the filled cells connect every level of A and B (bipartite graph)."""
    J, K = filled.shape
    seen_a = np.zeros(J, bool)
    seen_b = np.zeros(K, bool)
    seen_a[0] = True
    changed = True
    while changed:
        nb = filled[seen_a].any(axis=0) | seen_b
        na = filled[:, nb].any(axis=1) | seen_a
        changed = bool((nb != seen_b).any() or (na != seen_a).any())
        seen_a, seen_b = na, nb
    return bool(seen_a.all() and seen_b.all())


@dataclass(frozen=True, kw_only=True)
class DesignSummary:
    """Plain description of the design (the ``design`` block of the findings).

    Attributes
    ----------
    n : int
        Observations used.
    factors, levels : the factor names and their levels.
    cell_counts : list of list of int, shape (J, K).
    empty_cells, single_cells, small_cells : list of [level_a, level_b]
        Cells with n = 0, n = 1 and 1 <= n < 5.
    balance : str
        'balanced' | 'proportional' | 'unbalanced'.
    size_ratio : float or None
        Largest over smallest non-empty cell size.
    connected : bool
        Whether the filled cells link all levels (else main effects are not
        comparable across the disconnected parts).
    dropped_rows : dict
        Rows dropped at intake (see :class:`audit.intake.DroppedRows`).
    centring : str or None
        Statement of the exact decimal centring done at intake, if any.
    notes : list of str
        Plain statements about what is and is not estimable.
    level_order : dict
        {factor: how its levels were ordered}: 'given', 'numeric' or
        'first appearance' (see :func:`audit.intake.order_levels`).
    """

    n: int
    factors: tuple[str, str]
    levels: dict
    cell_counts: list
    empty_cells: list
    single_cells: list
    small_cells: list
    balance: str
    size_ratio: float | None
    connected: bool
    dropped_rows: dict
    centring: str | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)
    level_order: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "n": self.n,
            "factors": list(self.factors),
            "levels": {k: list(v) for k, v in self.levels.items()},
            "cell_counts": self.cell_counts,
            "empty_cells": self.empty_cells,
            "single_cells": self.single_cells,
            "small_cells": self.small_cells,
            "balance": self.balance,
            "size_ratio": self.size_ratio,
            "connected": self.connected,
            "dropped_rows": self.dropped_rows,
            "centring": self.centring,
            "notes": list(self.notes),
            "level_order": dict(self.level_order),
        }


def describe_design(cells: CellStats, *, dropped: dict | None = None, centring: str | None = None,
                    level_order: tuple[str, str] | None = None) -> DesignSummary:
    """Describe the layout: counts, empty and small cells, balance, connectedness.

    ``level_order`` says how each factor's levels were ordered (default: worked
    out from the levels themselves, as :func:`audit.intake.order_levels` does).
    """
    c = cells.counts
    la, lb = cells.levels_a, cells.levels_b
    pairs = lambda mask: [[la[j], lb[k]] for j, k in zip(*np.nonzero(mask))]  # noqa: E731
    nz = c[c > 0]
    connected = is_connected(c > 0)
    notes: list[str] = []
    empty = pairs(c == 0)
    if empty:
        df_ab = cells.m - cells.J - cells.K + 1
        notes.append(
            f"{len(empty)} empty cell(s): the interaction is tested on {max(df_ab, 0)} df "
            f"(m - J - K + 1 = {cells.m} - {cells.J} - {cells.K} + 1) instead of "
            f"{(cells.J - 1) * (cells.K - 1)}; it covers only the contrasts the filled cells "
            "identify. Type III main-effect hypotheses on unweighted marginal means are not "
            "estimable (a marginal mean needs every cell of its row or column); Types I and II "
            "test main effects on the observed cells."
        )
    if not connected:
        notes.append(
            "The filled cells do not connect every level of both factors: main effects cannot be "
            "compared across the disconnected parts of the design."
        )
    if cells.df_within == 0:
        notes.append(
            "One observation per cell: there is no within-cell error term, so the classical F "
            "tests cannot be formed; Tukey's one-degree-of-freedom test for non-additivity applies."
        )
    return DesignSummary(
        n=cells.N,
        factors=cells.factors,
        levels={cells.factors[0]: la, cells.factors[1]: lb},
        cell_counts=c.tolist(),
        empty_cells=empty,
        single_cells=pairs(c == 1),
        small_cells=pairs((c >= 1) & (c < 5)),
        balance=balance_class(c),
        size_ratio=float(nz.max() / nz.min()) if nz.size else None,
        connected=connected,
        dropped_rows=dropped if dropped is not None else {"total": 0},
        centring=centring,
        notes=tuple(notes),
        level_order=dict(zip(cells.factors, level_order or (order_levels(la)[1], order_levels(lb)[1]))),
    )
