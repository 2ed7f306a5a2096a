"""The in-memory intake's rules applied to data that an SQL engine reads.

A few small GROUP BY queries return the distinct factor values (with their
first row and counts) and the classes of the response text (missing token,
plain number, decimal comma, anything else); the distinct values go through
:mod:`audit.intake`'s own functions in Python (level text, decimal commas,
merged spellings, level order, level counts, the response's errors and its
exact decimal centring), and the result is mapped back in SQL by two small
join tables.  So level names, merges, notes, refusals and their messages are
those of the in-memory path.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field

import numpy as np

from .. import intake
from ..errors import FactorError, ResponseError
from ..intake import DroppedRows
from .moments import ResponseKind

__all__ = ["EngineIntake", "apply_intake", "WHITESPACE"]

#: every character Python's str.strip() removes (intake strips values so)
WHITESPACE = "".join(chr(i) for i in range(sys.maxunicode + 1) if chr(i).isspace())
#: the ASCII forms of intake's number patterns (values with other digits go through Python)
NUM_SQL = "[+-]?([0-9]+[.]?[0-9]*|[.][0-9]+)([eE][+-]?[0-9]+)?"
DEC_SQL = "[+-]?([0-9]+,[0-9]*|,[0-9]+)([eE][+-]?[0-9]+)?"
#: at most this many distinct (factor A, factor B) pairs are read back
MAX_PAIRS = 1_000_000
#: at most this many distinct unusual response texts are classified in Python
MAX_ODD = 10_000

_NUMERIC_TYPES = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
                  "UBIGINT", "UHUGEINT", "FLOAT", "DOUBLE", "REAL")


@dataclass(frozen=True)
class EngineIntake:
    levels_a: tuple[str, ...]
    levels_b: tuple[str, ...]
    level_order: tuple[str, str]
    notes: tuple[str, ...]
    rk: ResponseKind
    centring: str | None
    dropped: DroppedRows
    source: str                     # SQL of the rows: fa, fb (level text), y (clean) [, filename, file_row_number]
    lo: float                       # smallest and largest response minus the offset (kept rows)
    hi: float
    decimal: str | None = None
    extra: dict = field(default_factory=dict)


def _ws(d) -> str:
    return d.char_set(WHITESPACE)


def _type_kind(t: str) -> str:
    t = t.upper()
    if t.startswith("DECIMAL"):
        return "decimal"
    if t.startswith("VARCHAR") or t in ("TEXT", "STRING"):
        return "text"
    if t in _NUMERIC_TYPES:
        return "double"
    return "other"


def _blank_clause(backend, q) -> str:
    d = backend.dialect
    ws = _ws(d)
    cheap, costly = [], []
    for c in backend.columns():
        k = _type_kind(backend.column_type(c))
        if k == "text":
            # only a value that starts with white space can be blank: the trim (about 30 characters to
            # strip) runs on those alone
            lit = d.lit(WHITESPACE)
            costly.append(f"({q(c)} IS NULL OR CASE WHEN {q(c)} = '' THEN TRUE WHEN {d.strpos(lit, f'left({q(c)}, 1)')} "
                          f"= 0 THEN FALSE ELSE {d.trim_chars(q(c), ws)} = '' END)")
        elif backend.column_type(c) in ("FLOAT", "DOUBLE", "REAL"):
            cheap.append(f"({q(c)} IS NULL OR isnan({q(c)}))")
        else:
            cheap.append(f"{q(c)} IS NULL")
    if not cheap and not costly:
        return "FALSE"
    if cheap and costly:
        # CASE evaluates the text tests only on rows whose other columns are all missing
        return f"(CASE WHEN {' AND '.join(cheap)} THEN {' AND '.join(costly)} ELSE FALSE END)"
    return "(" + " AND ".join(cheap or costly) + ")"


def _looks(counts: dict):
    import pandas as pd

    ser = pd.Series(counts, dtype="int64") if counts else pd.Series([], dtype="int64")
    return intake.looks_continuous_counts(ser)


def apply_intake(backend, *, response: str, factors: tuple[str, str], levels=None, decimal=None) -> EngineIntake:
    """Validate the engine's data by the in-memory intake's rules (see the module docstring)."""
    import pandas as pd

    factors = intake.check_factors_option(factors)
    levels = intake.check_levels_option(levels)
    intake.check_decimal(decimal)
    cols = backend.columns()
    intake.check_columns(cols, response=response, factors=factors, levels=levels)
    d = backend.dialect
    q = d.q
    _s = d.lit
    vc = d.string_type
    ws = _ws(d)
    fa, fb = factors
    ykind = _type_kind(backend.column_type(response))
    y = q(response)
    tokens = ", ".join(_s(t) for t in sorted(intake.RESPONSE_NA_TOKENS))
    if ykind == "text":
        # the trimmed text once, as a column of the row sources below (an expression repeated in
        # na/num/dec would be trimmed again at each use); only a value that starts or ends with
        # white space is trimmed at all
        lit = _s(WHITESPACE)
        trimmed = (f"CASE WHEN {d.strpos(lit, f'left({y}, 1)')} = 0 AND {d.strpos(lit, f'right({y}, 1)')} = 0 "
                   f"THEN {y} ELSE {d.trim_chars(y, ws)} END")
        raw_rn = f"(SELECT *, {trimmed} AS twa_t FROM {backend.raw_rn})"
        raw = f"(SELECT *, {trimmed} AS twa_t FROM {backend.raw})"
        t = "twa_t"
        na = f"({t} IS NULL OR {t} = '' OR lower({t}) IN ({tokens}))"
        num = d.full_match(t, NUM_SQL)
        dec = d.full_match(t, DEC_SQL)
        comma = d.contains(t, "','")
    else:
        t = f"CAST({y} AS {vc})"
        raw_rn, raw = backend.raw_rn, backend.raw
        na = f"({y} IS NULL)" if ykind != "double" else f"({y} IS NULL OR isnan(CAST({y} AS DOUBLE)))"
        num = "TRUE" if ykind != "other" else "FALSE"
        dec = comma = "FALSE"
    exo = f"(NOT {na} AND NOT {num} AND NOT {dec})"
    blank = _blank_clause(backend, q)
    # a native floating or integer response needs no text work: its extremes, first value and first
    # non-finite value are taken per group in this one scan (no second scan, no casts to text)
    fast = ykind == "double"
    ydbl = f"CAST({y} AS DOUBLE)"
    src = (f"SELECT CAST({q(fa)} AS {vc}) AS ka, CAST({q(fb)} AS {vc}) AS kb, {q(fa)} AS va, {q(fb)} AS vb, "
           f"{t} AS t, {na} AS na, {num} AS num, {dec} AS dec, {comma} AS comma, {exo} AS exo, {blank} AS blank, "
           f"twa_rn AS rn FROM {raw_rn}")
    if fast:
        # yn: the response, NULL when missing (NULL or NaN); aggregates ignore NULLs, so no FILTER
        # is needed but for the non-finite values (about six times faster than the general query)
        fsrc = (f"SELECT CAST({q(fa)} AS {vc}) AS ka, CAST({q(fb)} AS {vc}) AS kb, {q(fa)} AS va, "
                f"{q(fb)} AS vb, CASE WHEN isnan({ydbl}) THEN NULL ELSE {ydbl} END AS yn, {blank} AS blank, "
                f"twa_rn AS rn FROM {raw_rn}")
        groups = backend.query(
            f"WITH s AS ({fsrc}) SELECT ka, kb, {d.any_value('va')}, {d.any_value('vb')}, COUNT(*), "
            f"COUNT(*) - COUNT(yn), MIN(rn), NULL, NULL, 0, blank, MIN(rn) FILTER (WHERE yn IS NOT NULL), "
            f"{d.arg_min('yn', 'rn')}, MIN(yn), MAX(yn), MIN(rn) FILTER (WHERE {d.isinf('yn')}), "
            f"{d.arg_min('yn', 'rn')} FILTER (WHERE {d.isinf('yn')}) "
            f"FROM s GROUP BY ka, kb, blank LIMIT {MAX_PAIRS + 1}", label="intake (levels)")
    else:
        groups = backend.query(
            f"WITH s AS ({src}) SELECT ka, kb, {d.any_value('va')}, {d.any_value('vb')}, COUNT(*), "
            f"COUNT(*) FILTER (WHERE na), MIN(rn), MIN(rn) FILTER (WHERE comma AND NOT na), "
            f"{d.arg_min('t', 'rn')} FILTER (WHERE comma AND NOT na), COUNT(*) FILTER (WHERE exo), blank "
            f"FROM s GROUP BY ka, kb, blank LIMIT {MAX_PAIRS + 1}", label="intake (levels)")
    if len(groups) > MAX_PAIRS:
        raise FactorError(f"factors {fa!r} and {fb!r}: more than {MAX_PAIRS:,} distinct pairs of values; expected a "
                          "few repeated levels per factor; are the response and a factor swapped?")
    n_blank = sum(int(g[4]) for g in groups if g[10])
    groups = [g for g in groups if not g[10]]
    n_rows = sum(int(g[4]) for g in groups)
    if n_rows == 0:
        raise intake.DataFileError(f"{backend.files[0]}: no data rows below the header; expected one row per "
                                   "observation")
    notes: list[str] = []
    _refuse_repeated_header(backend, groups, response, factors, ykind, raw_rn, y)

    def row_of(rn):
        return backend.row_numbers([rn])[int(rn)]

    # -- the response's decimal mark (text only) ------------------------------------------------
    odd: list[tuple[int, str]] = []
    if any(int(g[9]) for g in groups):
        odd = [(int(r[1]), r[0]) for r in backend.query(
            f"WITH s AS ({src}) SELECT t, MIN(rn) FROM s WHERE exo AND NOT blank GROUP BY t ORDER BY 2 "
            f"LIMIT {MAX_ODD}", label="intake (response text)")]
    if ykind == "text" and decimal is None:
        firsts = [(int(g[7]), g[8]) for g in groups if g[7] is not None]
        seen = sorted(set(firsts[:1] and [min(firsts)]) | set(odd))
        vals = [v for _, v in seen]
        rn_of = {}
        for r, v in seen:
            rn_of.setdefault(v, r)
        decimal = intake.decimal_from_values(vals, response=response, delimiter=backend.delimiter, decimal=None,
                                             row_of=lambda v: row_of(rn_of[v]), notes=notes)
    comma_ok = decimal == ","

    # -- factor text, missing values, merged spellings, levels ---------------------------------
    def text_of(v):
        s = intake.fmt_scalar(v)
        if s is not None and comma_ok:
            s = intake.comma_to_point(np.array([s], dtype=object))[0]
        return s

    ta = [text_of(g[2]) for g in groups]
    tb = [text_of(g[3]) for g in groups]
    n = np.array([int(g[4]) for g in groups], np.int64)
    n_na = np.array([int(g[5]) for g in groups], np.int64)
    first = np.array([int(g[6]) for g in groups], np.int64)
    for f, tx in ((fa, ta), (fb, tb)):
        if all(v is None for v in tx):
            raise intake.empty_factor_error(f, n_rows)
    if int(n_na.sum()) == n_rows:
        raise intake.empty_response_error(response, n_rows)
    merged = {}
    level_sets, how = [], []
    for f, tx in ((fa, ta), (fb, tb)):
        firstrn: dict[str, int] = {}
        for v, r in zip(tx, first):
            if v is not None and (v not in firstrn or r < firstrn[v]):
                firstrn[v] = int(r)
        order = sorted(firstrn, key=firstrn.get)
        arr = intake.merge_numeric_spellings(f, np.array(order, dtype=object), levels.get(f), notes)
        canon = dict(zip(order, arr))
        merged[f] = canon
        present = pd.unique(pd.Series(arr, dtype=object)).tolist()
        lv, h = intake.factor_levels(f, present, levels.get(f))
        level_sets.append(lv)
        how.append(h)
    ma = [merged[fa].get(v) if v is not None else None for v in ta]
    mb = [merged[fb].get(v) if v is not None else None for v in tb]
    known = np.array([x is not None and z is not None for x, z in zip(ma, mb)])
    kept = np.where(known, n - n_na, 0)
    final = []
    for i, (f, lv, mm) in enumerate(((fa, level_sets[0], ma), (fb, level_sets[1], mb))):
        obs = {v: 0 for v in lv}
        for v, k in zip(mm, kept):
            if v is not None:
                obs[v] = obs.get(v, 0) + int(k)
        keep_lv = lv if levels.get(f) is not None else tuple(v for v in lv if obs[v] > 0)
        final.append((f, keep_lv, len(lv), np.array([obs[v] for v in keep_lv], np.int64), mm))
    for f, lv, n_all, counts, mm in final:
        def lc(mm=mm):
            c: dict[str, int] = {}
            for v, k in zip(mm, n):
                if v is not None:
                    c[v] = c.get(v, 0) + int(k)
            return _looks(c)

        intake.check_level_counts(f, lv, n_all, counts, factors=factors, response=response, looks_continuous=lc)
    la, lb = final[0][1], final[1][1]
    ia = {v: j for j, v in enumerate(la)}
    ib = {v: k for k, v in enumerate(lb)}

    # -- map back in SQL ----------------------------------------------------------------------
    map_a = {g[0]: v for g, v in zip(groups, ma) if v in ia and g[0] is not None}
    map_b = {g[1]: v for g, v in zip(groups, mb) if v in ib and g[1] is not None}
    backend.register("twa_map_a", pd.DataFrame({"key": list(map_a), "lv": list(map_a.values())}, dtype=object))
    backend.register("twa_map_b", pd.DataFrame({"key": list(map_b), "lv": list(map_b.values())}, dtype=object))

    # classify the unusual response texts by intake's own parser (pandas.to_numeric)
    inf_set, fin = [], {}
    for _, v in odd:
        x = pd.to_numeric(pd.Series([v], dtype=object), errors="coerce").iloc[0]
        if np.isinf(x):
            inf_set.append(v)
        elif not np.isnan(x):
            fin[v] = repr(float(x))
    tt = f"CASE WHEN {dec} THEN replace({t}, ',', '.') ELSE {t} END" if comma_ok else t
    if fin:
        tt = "CASE " + " ".join(f"WHEN {t} = {_s(k)} THEN {_s(v)}" for k, v in fin.items()) + f" ELSE {tt} END"
    in_inf = f"{t} IN ({', '.join(_s(v) for v in inf_set)})" if inf_set else "FALSE"
    in_fin = f"{t} IN ({', '.join(_s(v) for v in fin)})" if fin else "FALSE"
    if ykind == "text":
        bad1 = f"(({exo} AND NOT {in_inf} AND NOT {in_fin}) OR ({dec} AND NOT {'TRUE' if comma_ok else 'FALSE'}))"
        okv = f"({num} OR {in_fin}{' OR ' + dec if comma_ok else ''})"
        yd = f"try_cast({tt} AS DOUBLE)"
        bad2 = f"({in_inf} OR ({okv} AND {d.isinf(yd)}))"
        shown = tt
    elif ykind == "other":
        bad1, okv, yd, bad2, shown = "TRUE", "FALSE", "CAST(NULL AS DOUBLE)", "FALSE", y
    elif ykind == "decimal":
        bad1, okv, yd, bad2, shown = "FALSE", "TRUE", f"CAST({y} AS DOUBLE)", "FALSE", t
    else:
        yd = f"CAST({y} AS DOUBLE)"
        bad1, okv, bad2, shown = "FALSE", "TRUE", d.isinf(yd), yd
    kept_src = (f"SELECT r.twa_rn AS rn, {na} AS na, {bad1} AS bad1, {bad2} AS bad2, {okv} AS okv, {yd} AS yd, "
                f"{shown} AS shown, {tt} AS tt FROM {raw_rn} r "
                f"JOIN twa_map_a ma ON CAST(r.{q(fa)} AS {vc}) = ma.key "
                f"JOIN twa_map_b mb ON CAST(r.{q(fb)} AS {vc}) = mb.key")
    if fast:
        k = _fast_response(groups, map_a, map_b)
    else:
        k = backend.query(
        f"WITH s AS ({kept_src}) SELECT MIN(rn) FILTER (WHERE bad1), {d.arg_min('shown', 'rn')} FILTER (WHERE bad1), "
        f"MIN(rn) FILTER (WHERE bad2), {d.arg_min('shown', 'rn')} FILTER (WHERE bad2), "
        f"{d.arg_min('shown', 'rn')}, MIN(yd), MAX(yd), {d.arg_min('tt', 'yd')}, {d.arg_max('tt', 'yd')}, "
        f"MAX(length(regexp_extract(tt, '[.]([0-9]+)', 1))), MAX(length(regexp_extract(tt, '^[+-]?0*([0-9]*)', 1))), "
        f"COUNT(*) FILTER (WHERE lower(tt) LIKE '%e%') FROM s WHERE NOT na", label="intake (response)")[0]
    is_text = ykind in ("text", "decimal", "other")

    def parse(values, rows):
        ser = pd.Series(values, dtype=object if is_text else float)
        keep = np.ones(len(values), bool)
        return intake.parse_response(ser, is_text, response, np.asarray(rows, np.int64), keep)

    if k[0] is not None:
        try:
            raise _text_error(backend, kept_src, response, ykind, n_kept=int(kept.sum()))
        except ResponseError as exc:
            if "must be numeric" not in str(exc):
                raise
            _swapped_hint(backend, exc, factors, response, merged, groups, ta, tb, n)
            raise
    if k[2] is not None:
        parse([k[3] if is_text else float("inf") if float(k[3]) > 0 else float("-inf")], [row_of(k[2])])
    first_v = k[4]
    lo_t, hi_t = (k[7], k[8]) if is_text else (k[5], k[6])
    vals = [first_v, lo_t, hi_t] if is_text else [float(first_v), float(k[5]), float(k[6])]
    _, offset, centring = parse(vals, [0, 0, 0])
    lo, hi = float(k[5]) - offset, float(k[6]) - offset
    # the response as the passes read it: clean text (or the native column), the same offset
    if ykind == "double":
        rk = ResponseKind("double", offset=offset)
        yv = y
    elif centring is not None and "exactly" in centring:
        off = str(intake.decimal_offset(first_v, float(k[6]) - float(k[5])))
        dec_d, int_d, expo = int(k[9] or 0), int(k[10] or 0), int(k[11] or 0)
        if ykind == "decimal":
            scale = int(backend.column_type(response).split(",")[1].rstrip(") "))
            rk = ResponseKind("decimal", scale=scale, offset_text=off, offset=offset)
            yv = y
        elif expo == 0 and dec_d + int_d <= 38:
            rk = ResponseKind("text", scale=max(dec_d, -min(0, int(np.floor(np.log10(abs(float(off)) or 1))))),
                              offset_text=off, offset=offset)
            yv = f"CASE WHEN {na} THEN NULL ELSE {tt} END"
        else:
            rk = ResponseKind("text", offset=offset)
            yv = f"CASE WHEN {na} THEN NULL ELSE {tt} END"
    elif ykind == "decimal":
        rk = ResponseKind("decimal", scale=int(backend.column_type(response).split(",")[1].rstrip(") ")),
                          offset_text="0", offset=0.0)
        yv = y
    else:
        rk = ResponseKind("text", offset=offset)
        yv = f"CASE WHEN {na} THEN NULL ELSE {tt} END"
    # the source's own row numbers, where it has them (DuckDB's Parquet reader); the sample key reads them
    extra_cols = (", r.filename AS filename, r.file_row_number AS file_row_number"
                  if backend.row_number_expr() is not None else "")
    source = (f"(SELECT ma.lv AS fa, mb.lv AS fb, {yv} AS y{extra_cols} FROM {raw} r "
              f"JOIN twa_map_a ma ON CAST(r.{q(fa)} AS {vc}) = ma.key "
              f"JOIN twa_map_b mb ON CAST(r.{q(fb)} AS {vc}) = mb.key)")

    # -- rows left out, counted as the in-memory intake counts them -----------------------------
    miss = np.zeros((len(la), len(lb)), np.int64)
    for x, z, m in zip(ma, mb, n_na):
        if x in ia and z in ib:
            miss[ia[x], ib[z]] += int(m)
    n_kept = int(kept.sum())
    total = n_rows - n_kept
    rows: tuple = ()
    if total:
        rns = [int(r[0]) for r in backend.query(
            f"WITH s AS ({src}) SELECT s.rn FROM s LEFT JOIN twa_map_a ma ON s.ka = ma.key "
            f"LEFT JOIN twa_map_b mb ON s.kb = mb.key WHERE NOT s.blank AND (s.na OR ma.lv IS NULL OR mb.lv IS NULL) "
            f"ORDER BY s.rn LIMIT 1000", label="intake (dropped rows)")]
        got = backend.row_numbers(rns)
        rows = tuple(got[r] for r in rns if r in got)
    dropped = DroppedRows(total=total, missing_response=miss,
                          missing_factor=int(n[~known].sum()),
                          missing_other=0, blank_lines=n_blank, rows=rows)
    return EngineIntake(levels_a=la, levels_b=lb, level_order=(how[0], how[1]), notes=tuple(notes), rk=rk,
                        centring=centring, dropped=dropped, source=source, lo=lo, hi=hi, decimal=decimal)


def _refuse_repeated_header(backend, groups, response, factors, ykind, raw_rn, y) -> None:
    """The in-memory intake's refusal of data rows that repeat the header (each named column
    holds its own name), as when files with a header each are concatenated."""
    if ykind != "text":
        return   # a numeric response cannot hold its own name
    fa, fb = factors
    keys = [(g[0], g[1]) for g in groups if intake.fmt_scalar(g[2]) == fa and intake.fmt_scalar(g[3]) == fb]
    if not keys:
        return
    d = backend.dialect
    q, _s, vc = d.q, d.lit, d.string_type
    (ka, kb), = keys[:1]
    cond = (f"CAST({q(fa)} AS {vc}) = {_s(ka)} AND CAST({q(fb)} AS {vc}) = {_s(kb)} "
            f"AND twa_t = {_s(response)}")
    count = int(backend.query(f"SELECT COUNT(*) FROM {raw_rn} WHERE {cond}", label="intake (header)")[0][0])
    if not count:
        return
    rns = [int(r[0]) for r in backend.query(f"SELECT twa_rn FROM {raw_rn} WHERE {cond} ORDER BY twa_rn LIMIT 5",
                                            label="intake (header)")]
    got = backend.row_numbers(rns)
    _, where_all = intake.where_text([got[r] for r in rns], count)
    raise intake.repeated_header_error(backend.files[0], where_all, count, backend.columns())


def _text_error(backend, kept_src: str, response: str, ykind: str, *, n_kept: int) -> ResponseError:
    """The in-memory intake's error for text in the response, from the facts it words (how many
    kept values are not numbers, the first of them and where, the distinct ones in order)."""
    fmt = intake.fmt_scalar if ykind == "other" else str
    n_bad = int(backend.query(f"WITH s AS ({kept_src}) SELECT COUNT(*) FROM s WHERE NOT na AND bad1",
                              label="intake (response text)")[0][0])
    first = backend.query(f"WITH s AS ({kept_src}) SELECT rn, shown FROM s WHERE NOT na AND bad1 ORDER BY rn LIMIT 5",
                          label="intake (response text)")
    labels = [fmt(r[0]) for r in backend.query(
        f"WITH s AS (SELECT * FROM ({kept_src}) WHERE NOT na AND bad1 ORDER BY rn LIMIT 10000) "
        f"SELECT shown, MIN(rn) FROM s GROUP BY shown ORDER BY 2 LIMIT 21", label="intake (response text)")]
    got = backend.row_numbers([r[0] for r in first])
    where_first, where_all = intake.where_text([got[int(r[0])] for r in first], n_bad)
    return intake.text_response_error(response, found=fmt(first[0][1]), n_bad=n_bad, n_keep=n_kept, labels=labels,
                                      where_first=where_first, where_all=where_all)


def _fast_response(groups, map_a, map_b) -> tuple:
    """The response query's row for a native numeric response, from the per-group columns of the
    levels query (kept groups only): (bad1 row, value, first non-finite row, value, first value,
    min, max, then the text-only fields as None)."""
    kept = [g for g in groups if g[0] in map_a and g[1] in map_b and g[11] is not None]
    first = min(kept, key=lambda g: g[11]) if kept else None
    infs = [g for g in kept if g[15] is not None]
    inf = min(infs, key=lambda g: g[15]) if infs else None
    return (None, None, inf[15] if inf else None, inf[16] if inf else None,
            first[12] if first else None, min(g[13] for g in kept) if kept else None,
            max(g[14] for g in kept) if kept else None, None, None, None, None, None)


def _swapped_hint(backend, exc, factors, response, merged, groups, ta, tb, n):
    """Raise intake's swapped-columns hint when a factor or another column looks like the measurement."""
    d = backend.dialect
    q = d.q
    for c in (*factors, *(c for c in backend.columns() if c not in (response, *factors))):
        counts: dict[str, int] = {}
        if c in factors:
            tx = ta if c == factors[0] else tb
            for v, k in zip(tx, n):
                if v is not None:
                    m = merged[c].get(v, v)
                    counts[m] = counts.get(m, 0) + int(k)
        else:
            rows = backend.query(f"SELECT {d.any_value(q(c))}, COUNT(*) FROM {backend.raw} "
                                 f"GROUP BY CAST({q(c)} AS {d.string_type}) LIMIT 2000001")
            if len(rows) > 2_000_000:
                continue
            for v, k in rows:
                s = intake.fmt_scalar(v)
                if s is not None:
                    counts[s] = counts.get(s, 0) + int(k)
        lc = _looks(counts)
        if lc:
            raise intake.swapped_hint_error(exc, c, lc, factors, response) from None
