"""One set of per-cell moment definitions, written once as SQL with a small
dialect table (DuckDB, Spark SQL), and their assembly into :class:`CellStats`
/ :class:`CellMoments`.

Three scans of the data, each a GROUP BY over the two factors:

1. ``PASS_COUNTS``: rows, non-missing responses, min, max, exact median, a
   provisional mean of y - offset (the offset is one value of the response,
   subtracted as DECIMAL when the column is DECIMAL or text, so that values
   sharing many leading digits keep their spread: NIST StRD SmLs07-09).
2. ``PASS_CENTRED``: with the cell's provisional mean and median joined in,
   power sums of d = (y - offset) / s - mean (s an exact power of two from pass
   1, so d^4 neither overflows nor underflows): sum d, d^2, d^3, d^4; and the
   mean and variance (the engine's stable streaming ``var_samp``) of |d| and of
   |y - median|.  The mean is corrected by sum d / n and the centred sums are
   shifted to it exactly (the corrected two-pass algorithm; never a raw sum of
   squares minus a squared sum).
3. ``PASS_SAMPLE``: rows whose seeded uniform key falls below a per-cell
   threshold (about 1.25 x the wanted sample size over the cell size); the
   smallest keys per cell form a uniform sample without replacement.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..design import CellMoments, CellStats, pow2_scale
from ..errors import ColumnError, FactorError, ResponseError

__all__ = ["Dialect", "DUCKDB", "SPARK", "ResponseKind", "base_select", "pass_counts_sql", "pass_centred_sql",
           "pass_sample_sql", "assemble_moments", "pooled_shape", "levene_from_moments",
           "bartlett_kurtosis_from_moments", "order_levels", "NA_TOKENS", "SAMPLE_MARGIN"]

#: response texts read as missing (the same tokens as the in-memory intake, compared lower-cased)
from ..intake import RESPONSE_NA_TOKENS as NA_TOKENS  # noqa: E402

#: oversampling factor of the sample pass's per-cell threshold (a shortfall is topped up)
SAMPLE_MARGIN = 1.25


@dataclass(frozen=True)
class Dialect:
    """What differs between engines' SQL: quoting, type names, the exact median, string
    literals and the few functions the intake rules (:mod:`audit.engines.rules`) use whose
    names or semantics differ.  ``backslash_literals``: string literals take backslash escapes
    (Spark SQL), else a quote is doubled (DuckDB, standard SQL)."""

    name: str
    quote_char: str
    string_type: str
    median_fn: str        # format string with {x}
    backslash_literals: bool = False

    def q(self, ident: str) -> str:
        c = self.quote_char
        return c + str(ident).replace(c, c + c) + c

    def median(self, x: str) -> str:
        return self.median_fn.format(x=x)

    @staticmethod
    def double(value: float) -> str:
        """A double literal that round-trips exactly (never a DECIMAL literal)."""
        return f"CAST('{float(value)!r}' AS DOUBLE)"

    # -- the intake rules' SQL -----------------------------------------------------------------

    def lit(self, s) -> str:
        """A string literal holding exactly ``s``."""
        s = str(s)
        if not self.backslash_literals:
            return "'" + s.replace("'", "''") + "'"
        # Spark SQL: backslash escapes; adjacent literals concatenate (so '' is no quote); every
        # character that is not printable ASCII as a \u escape with four hex digits (the lexer
        # unescapes them)
        out = []
        for ch in s:
            if ch in "\\'":
                out.append("\\" + ch)
            elif " " <= ch <= "~":
                out.append(ch)
            elif ord(ch) <= 0xFFFF:
                out.append(f"\\u{ord(ch):04x}")
            else:
                out.append(f"\\U{ord(ch):08x}")
        return "'" + "".join(out) + "'"

    def char_set(self, chars: str) -> str:
        """A string expression holding the characters ``chars`` (DuckDB: chr() concatenations,
        kept as tuned; Spark's chr(n) is n mod 256, so a literal)."""
        if not self.backslash_literals:
            return " || ".join(f"chr({ord(c)})" for c in chars)
        return self.lit(chars)

    def trim_chars(self, x: str, chars: str) -> str:
        """``x`` with the characters of the expression ``chars`` removed from both ends."""
        if self.name == "spark":
            return f"trim(BOTH {chars} FROM {x})"
        return f"trim({x}, {chars})"

    def strpos(self, hay: str, needle: str) -> str:
        """1-based position of ``needle`` in ``hay``, 0 when absent."""
        return f"instr({hay}, {needle})" if self.name == "spark" else f"strpos({hay}, {needle})"

    def full_match(self, x: str, pattern: str) -> str:
        """TRUE when the whole of ``x`` matches the regular expression ``pattern`` (Python text)."""
        if self.name == "spark":
            # Java regex: \z is the very end (a $ would also match before a final line break)
            anchored = "^(?:" + pattern + r")\z"
            return f"({x} RLIKE {self.lit(anchored)})"
        return f"regexp_full_match({x}, {self.lit(pattern)})"

    def contains(self, x: str, needle: str) -> str:
        return f"(instr({x}, {needle}) > 0)" if self.name == "spark" else f"contains({x}, {needle})"

    def isinf(self, x: str) -> str:
        return f"(abs({x}) = CAST('Infinity' AS DOUBLE))" if self.name == "spark" else f"isinf({x})"

    def arg_min(self, x: str, by: str) -> str:
        """``x`` of the row with the smallest ``by`` among rows where both are non-NULL (DuckDB's
        arg_min; Spark's min_by would return a NULL ``x``)."""
        if self.name == "spark":
            return f"min_by({x}, CASE WHEN {x} IS NOT NULL THEN {by} END)"
        return f"arg_min({x}, {by})"

    def arg_max(self, x: str, by: str) -> str:
        if self.name == "spark":
            return f"max_by({x}, CASE WHEN {x} IS NOT NULL THEN {by} END)"
        return f"arg_max({x}, {by})"

    def any_value(self, x: str) -> str:
        """Any non-NULL value of ``x`` in the group (NULL when there is none)."""
        return f"any_value({x}, true)" if self.name == "spark" else f"any_value({x})"


DUCKDB = Dialect(name="duckdb", quote_char='"', string_type="VARCHAR", median_fn="quantile_cont({x}, 0.5)")
SPARK = Dialect(name="spark", quote_char="`", string_type="STRING", median_fn="percentile({x}, 0.5)",
                backslash_literals=True)


@dataclass(frozen=True)
class ResponseKind:
    """How the response column is read: 'double' (any binary numeric type),
    'decimal' (DECIMAL(38, scale) subtraction of the offset) or 'text'."""

    kind: str
    scale: int = 0
    offset_text: str | None = None   # the offset as exact decimal text ('decimal'/'text' read as decimal)
    offset: float = 0.0


def _na_clause(d: Dialect, y: str) -> str:
    toks = ", ".join(f"'{t}'" for t in sorted(NA_TOKENS))
    return f"({y} IS NULL OR trim({y}) = '' OR lower(trim({y})) IN ({toks}))"


def _yr(d: Dialect, y: str, rk: ResponseKind) -> tuple[str, str]:
    """SQL expressions (y - offset as DOUBLE or NULL when missing, 1 when the value is unusable)."""
    inf = "CAST('Infinity' AS DOUBLE)"
    if rk.kind == "double":
        yd = f"CAST({y} AS DOUBLE)"
        yr = f"CASE WHEN {yd} IS NULL OR isnan({yd}) OR abs({yd}) = {inf} THEN NULL ELSE {yd} - {d.double(rk.offset)} END"
        bad = f"CASE WHEN {yd} IS NOT NULL AND abs({yd}) = {inf} THEN 1 ELSE 0 END"
        return yr, bad
    dec = f"DECIMAL(38, {rk.scale})"
    if rk.kind == "decimal":
        yr = f"CAST(CAST({y} AS {dec}) - CAST('{rk.offset_text}' AS {dec}) AS DOUBLE)"
        return yr, "0"
    # text
    t = f"trim({y})"
    if rk.offset_text is not None:
        val = f"CAST(try_cast({t} AS {dec}) - CAST('{rk.offset_text}' AS {dec}) AS DOUBLE)"
    else:
        val = f"try_cast({t} AS DOUBLE) - {d.double(rk.offset)}"
    num = f"try_cast({t} AS DOUBLE)"
    yr = f"CASE WHEN {_na_clause(d, y)} THEN NULL ELSE {val} END"
    bad = (f"CASE WHEN {_na_clause(d, y)} THEN 0 WHEN {num} IS NULL OR isnan({num}) OR abs({num}) = {inf} "
           f"THEN 1 ELSE 0 END")
    return yr, bad


def pow2_factors(s: float) -> tuple[float, ...]:
    """Powers of two whose product is exactly 1 / s (s an exact power of two): one
    factor when 1 / s is a normal double, else two (1 / s overflows for s < 2^-1023)."""
    e = math.frexp(s)[1] - 1
    if -1022 <= -e <= 1023:
        return (math.ldexp(1.0, -e),)
    h = -e // 2
    return (math.ldexp(1.0, h), math.ldexp(1.0, -e - h))


def scaled(d: Dialect, x: str, s: float) -> str:
    """SQL of x / s for an exact power of two s, exact wherever the result is a normal double."""
    out = x
    for f in pow2_factors(s):
        if f != 1.0:
            out = f"({out}) * {d.double(f)}"
    return out


def base_select(d: Dialect, source: str, *, response: str, factors: tuple[str, str], rk: ResponseKind,
                key: str | None = None, rowno: str | None = None, scale: float | None = None) -> str:
    """The one row-level definition every pass aggregates: factor levels as text,
    y - offset as DOUBLE (NULL when missing; divided by the exact power of two
    ``scale`` when given), a flag for unusable values, and optionally the sample key."""
    fa, fb = (f"CAST({d.q(f)} AS {d.string_type})" for f in factors)
    yr, bad = _yr(d, d.q(response), rk)
    if scale is not None:
        yr = scaled(d, yr, scale)
    extra = (f", {key} AS skey" if key else "") + (f", {rowno} AS rowno" if rowno else "")
    return f"SELECT {fa} AS fa, {fb} AS fb, {yr} AS yr, {bad} AS bad{extra} FROM {source}"


def pass_counts_sql(d: Dialect, base: str) -> str:
    return (f"WITH src AS ({base}) SELECT fa, fb, COUNT(*) AS n_rows, COUNT(yr) AS n, SUM(bad) AS n_bad, "
            f"MIN(yr) AS lo, MAX(yr) AS hi, AVG(yr) AS mean0, {d.median('yr')} AS med "
            f"FROM src GROUP BY fa, fb")


def pass_centred_sql(d: Dialect, base: str, cell_table: str) -> str:
    """The second pass: centred power sums about each cell's provisional mean (``base``'s
    values and ``cell_table``'s means in the same units, the first pass's)."""
    return (f"WITH src AS ({base}), t AS (SELECT src.fa AS fa, src.fb AS fb, src.yr - p.mu AS dd, "
            f"src.yr - p.md AS ee FROM src JOIN {cell_table} p ON src.fa = p.fa AND src.fb = p.fb "
            f"WHERE src.yr IS NOT NULL) "
            f"SELECT fa, fb, SUM(dd) AS s1, SUM(dd * dd) AS s2, SUM(dd * dd * dd) AS s3, "
            f"SUM((dd * dd) * (dd * dd)) AS s4, AVG(abs(dd)) AS zm, VAR_SAMP(abs(dd)) AS zv, "
            f"AVG(abs(ee)) AS em, VAR_SAMP(abs(ee)) AS ev FROM t GROUP BY fa, fb")


def pass_sample_sql(d: Dialect, base: str, cell_table: str, extra_cols: str = "") -> str:
    return (f"WITH src AS ({base}) SELECT src.fa AS fa, src.fb AS fb, src.yr AS yr, src.skey AS skey{extra_cols} "
            f"FROM src JOIN {cell_table} p ON src.fa = p.fa AND src.fb = p.fb "
            f"WHERE src.yr IS NOT NULL AND src.skey < p.thr")


def _natural_key(s: str):
    try:
        return (0, float(s), s)
    except ValueError:
        return (1, 0.0, s)


def order_levels(found: list[str], factor: str, given=None) -> tuple[str, ...]:
    """Levels in natural order (numbers by value, then text), or as ``given``
    (every level found must be listed once)."""
    found = sorted(set(found), key=_natural_key)
    if given is None:
        return tuple(found)
    given = [str(x) for x in given]
    if sorted(given) != sorted(found) or len(set(given)) != len(given):
        raise FactorError(f"levels for {factor!r}: expected each of {found} exactly once, found {given}; "
                          "list every level of the factor once")
    return tuple(given)


def assemble_moments(counts_rows, centred_rows, *, factors, response, offset, levels=None,
                     unit_scale: float) -> tuple[CellMoments, dict]:
    """Turn the rows of the first two passes into CellMoments (and level codes).

    ``counts_rows``: (fa, fb, n_rows, n, n_bad, lo, hi, mean0, med) per group,
    NULL factor groups included; ``centred_rows``: (fa, fb, s1, s2, s3, s4, zm,
    zv, em, ev); ``unit_scale``: the power of two both passes' values were divided by
    (the rows are already in its units).
    """
    missing_factor = sum(int(r[2]) for r in counts_rows if r[0] is None or r[1] is None)
    rows = [r for r in counts_rows if r[0] is not None and r[1] is not None]
    bad = sum(int(r[4] or 0) for r in rows)
    if bad:
        raise ResponseError(f"response {response!r}: {bad} value(s) are not finite numbers; "
                            "fix or remove them (missing values may be left empty)")
    la = order_levels([r[0] for r in rows], factors[0], (levels or {}).get(factors[0]))
    lb = order_levels([r[1] for r in rows], factors[1], (levels or {}).get(factors[1]))
    for name, L in ((factors[0], la), (factors[1], lb)):
        if len(L) < 2:
            raise FactorError(f"factor {name!r}: needs at least 2 levels, found {len(L)}; "
                              "a two-way audit needs two crossed factors")
    ia = {v: i for i, v in enumerate(la)}
    ib = {v: i for i, v in enumerate(lb)}
    J, K = len(la), len(lb)
    s = unit_scale
    n = np.zeros((J, K), np.int64)
    miss = np.zeros((J, K), np.int64)
    lo = np.full((J, K), np.nan)
    hi = np.full((J, K), np.nan)
    med = np.full((J, K), np.nan)
    mu0 = np.full((J, K), np.nan)
    for fa, fb, n_rows, nn, _, a_lo, a_hi, m0, md in rows:
        j, k = ia[fa], ib[fb]
        n[j, k] = int(nn)
        miss[j, k] = int(n_rows) - int(nn)
        if nn:
            lo[j, k], hi[j, k], med[j, k], mu0[j, k] = (float(x) for x in (a_lo, a_hi, md, m0))
    if n.sum() == 0:
        raise ResponseError(f"response {response!r}: no usable values; expected numbers in the column")
    S = np.zeros((4, J, K))
    zm, zv, em, ev = (np.full((J, K), np.nan) for _ in range(4))
    for fa, fb, s1, s2, s3, s4, a_zm, a_zv, a_em, a_ev in centred_rows:
        j, k = ia[fa], ib[fb]
        S[:, j, k] = [float(x) for x in (s1, s2, s3, s4)]
        zm[j, k] = float(a_zm)
        em[j, k] = float(a_em)
        zv[j, k] = float(a_zv) if a_zv is not None else 0.0
        ev[j, k] = float(a_ev) if a_ev is not None else 0.0
    nz = np.maximum(n, 1).astype(float)
    delta = S[0] / nz                                   # mean correction (tiny)
    mean_s = np.where(n > 0, mu0 + delta, np.nan)
    css = np.maximum(S[1] - delta * S[0], 0.0)
    m3 = S[2] - 3 * delta * S[1] + 3 * delta ** 2 * S[0] - n * delta ** 3
    m4 = S[3] - 4 * delta * S[2] + 6 * delta ** 2 * S[1] - 4 * delta ** 3 * S[0] + n * delta ** 4
    css = np.where(n > 1, css, 0.0)
    # the cells' own power of two (as cells_from_observations): cells far from 0 relative to spread
    rms = np.sqrt(css / nz)
    s2 = pow2_scale(np.where(n > 0, mean_s, 0.0), rms)
    mean_u, css_u = mean_s / s2, css / s2 / s2
    unit = s * s2
    with np.errstate(over="ignore", under="ignore"):
        cells = CellStats(factors=tuple(factors), levels_a=la, levels_b=lb, counts=n, means=mean_u * unit,
                          css=css_u * unit * unit, offset=offset, response=response,
                          standard=(unit, mean_u, css_u))
    varz = np.where(n > 1, zv * (n - 1), 0.0)
    vare = np.where(n > 1, ev * (n - 1), 0.0)
    cm = CellMoments(cells=cells, m3=m3 / s2 ** 3, m4=m4 / s2 ** 4, minimum=lo / s2, maximum=hi / s2,
                     median=med / s2, absdev_median_mean=em / s2, absdev_median_css=vare / s2 ** 2,
                     absdev_mean_mean=zm / s2, absdev_mean_css=varz / s2 ** 2, missing_response=miss,
                     missing_factor=missing_factor, unit=unit)
    return cm, {"levels_a": la, "levels_b": lb, "index_a": ia, "index_b": ib}


# ---------------------------------------------------------------------------
# statistics that the moments give exactly
# ---------------------------------------------------------------------------

def pooled_shape(cm: CellMoments) -> dict:
    """Adjusted skewness G1 and excess kurtosis G2 of the full-model residuals
    of cells with n >= 2, pooled from cell moments: the residuals of each cell
    sum to 0, so m_p = sum over cells of the centred p-th power sums / n.  The
    same estimators and SEs as :func:`audit.diagnostics.assumptions.skew_kurtosis`
    (Joanes & Gill 1998)."""
    cnt = cm.cells.counts
    use = cnt >= 2
    n = int(cnt[use].sum())
    none = {"n": n, "skewness": None, "skewness_se": None, "excess_kurtosis": None, "excess_kurtosis_se": None}
    if n < 4:
        return none
    m2 = float(cm.cells.standardised().css[use].sum()) / n
    if m2 == 0.0:
        return none
    m3 = float(cm.m3[use].sum()) / n
    m4 = float(cm.m4[use].sum()) / n
    from ..diagnostics.assumptions import shape_from_moments

    return shape_from_moments(n, m2, m3, m4)


def levene_from_moments(n: np.ndarray, zbar: np.ndarray, zcss: np.ndarray) -> dict:
    """Levene-type one-way ANOVA F on z = |y - centre| from per-group n, mean
    of z and centred SS of z (the statistic of scipy.stats.levene)."""
    from scipy import stats

    n = np.asarray(n, float)
    k = n.size
    N = float(n.sum())
    zz = float(np.sum(n * zbar) / N)
    numer = (N - k) * float(np.sum(n * (zbar - zz) ** 2))
    denom = (k - 1.0) * float(np.sum(zcss))
    if denom == 0.0:
        return {"statistic": None, "df1": k - 1, "df2": int(N - k), "p": None,
                "reason": "every observation sits at its cell centre; the test is undefined"}
    W = numer / denom
    p = float(stats.f.sf(W, k - 1, N - k))
    return {"statistic": W if math.isfinite(W) else None, "df1": k - 1, "df2": int(N - k),
            "p": p if math.isfinite(p) else None}


def bartlett_kurtosis_from_moments(statistic, df, n, css, m4) -> dict:
    """:func:`audit.diagnostics.assumptions.bartlett_kurtosis_adjusted` from cell
    moments: with z_i = e_i / sqrt(css_c / n_c), sum z^4 = sum_c (n_c / css_c)^2 M4_c."""
    from scipy import stats

    n = np.asarray(n, float)
    g2 = 3.0 * float(np.sum((n / css) ** 2 * m4)) / float(np.sum(n * 3.0 * (n - 1.0) / (n + 1.0))) - 3.0
    scale = 1.0 + g2 / 2.0
    if scale <= 0:
        return {"statistic": None, "df": df, "p": None, "kurtosis": g2,
                "reason": "within-cell kurtosis too low for the adjustment"}
    T = statistic / scale
    return {"statistic": T, "df": df, "p": float(stats.chi2.sf(T, df)), "kurtosis": g2}


def check_columns(found: list[str], response: str, factors: tuple[str, str], engine: str) -> None:
    for c in (*factors, response):
        if c not in found:
            raise ColumnError(f"{engine}: column {c!r} not found; expected it among {found}; "
                              "name the columns with --response / --factors")
