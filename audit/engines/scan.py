"""The scan shared by every engine: response type, offset, the three passes of
:mod:`audit.engines.moments`, and the seeded per-cell sample.

A backend supplies a :class:`~audit.engines.moments.Dialect`, the SQL text of
its source, the expression of a seeded uniform key in [0, 1) (and of a row
number, where the source has one), and runs queries; the statistics are the
same for every backend.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ..design import CellMoments, pow2_scale
from .moments import (SAMPLE_MARGIN, assemble_moments, base_select, pass_centred_sql, pass_counts_sql,
                      pass_sample_sql)

__all__ = ["Scan", "run_scan", "DEFAULT_SAMPLE_PER_CELL"]

#: rows per cell kept in the seeded sample for the checks that need rows
DEFAULT_SAMPLE_PER_CELL = 2000


@dataclass(frozen=True, kw_only=True)
class Scan:
    """What a scan returns: the cell moments and a seeded sample of rows.

    ``sample_a``, ``sample_b`` are level codes, ``sample_y`` is y - offset
    (float64), ``sample_rows`` row numbers within their file (None where the
    source has none).  ``info`` is the JSON-ready provenance of the scan.
    """

    moments: CellMoments
    sample_a: np.ndarray
    sample_b: np.ndarray
    sample_y: np.ndarray
    sample_rows: np.ndarray | None
    centring: str | None
    info: dict
    dropped: object = None          # intake.DroppedRows, counted by the in-memory intake's rules
    notes: tuple = ()               # what intake decided for the user (merged spellings, decimal commas)
    level_order: tuple = ("first appearance", "first appearance")


def _timed(backend, sql: str, label: str, progress):
    t0 = time.perf_counter()
    rows = backend.query(sql, label=label, progress=progress)
    return rows, time.perf_counter() - t0


def run_scan(backend, *, response: str, factors: tuple[str, str], levels=None,
             sample_per_cell: int = DEFAULT_SAMPLE_PER_CELL, seed: int = 0, progress: bool = True,
             decimal: str | None = None) -> Scan:
    """Validate the data by the in-memory intake's rules (:mod:`audit.engines.rules`), run the
    three passes on ``backend`` and assemble moments and sample."""
    from .rules import apply_intake

    d = backend.dialect
    ei = apply_intake(backend, response=response, factors=factors, levels=levels, decimal=decimal)
    factors = tuple(factors)
    rk = ei.rk
    src = ei.source
    timings = {}
    # the exact power of two of both moment passes, from the kept responses' extremes (minus the
    # offset): every moment is formed on values of order one, so 1e307 or 1e-310 neither overflow
    # nor underflow (as design.pow2_scale does in memory)
    s = pow2_scale(np.asarray([abs(ei.lo), abs(ei.hi)]))
    base = base_select(d, src, response="y", factors=("fa", "fb"), rk=rk, scale=s)
    counts_rows, timings["counts"] = _timed(backend, pass_counts_sql(d, base), "pass 1/3 (counts, median)", progress)
    import pandas as pd

    good = [r for r in counts_rows if r[0] is not None and r[1] is not None and r[3]]
    params = pd.DataFrame({"fa": [r[0] for r in good], "fb": [r[1] for r in good],
                           "mu": [float(r[7]) for r in good], "md": [float(r[8]) for r in good]})
    cell_table = backend.register("twa_cells", params)
    centred_rows, timings["centred"] = _timed(backend, pass_centred_sql(d, base, cell_table),
                                              "pass 2/3 (centred moments)", progress)
    cm, lv = assemble_moments(counts_rows, centred_rows, factors=factors, response=response, offset=rk.offset,
                              levels={factors[0]: ei.levels_a, factors[1]: ei.levels_b}, unit_scale=s)
    # pass 3: the seeded sample
    k = int(sample_per_cell)
    n_by = {(r[0], r[1]): int(r[3]) for r in good}
    keep = {c: min(k, n) for c, n in n_by.items()}
    thr = {c: (2.0 if n <= k else min(2.0, SAMPLE_MARGIN * k / n + 16.0 / n)) for c, n in n_by.items()}
    key = backend.sample_key(seed)
    rowno = backend.row_number_expr()
    sbase = base_select(d, src, response="y", factors=("fa", "fb"), rk=rk, key=key, rowno=rowno)
    extra = ", src.rowno AS rowno" if rowno is not None else ""
    got = None
    t0 = time.perf_counter()
    for attempt in range(4):
        tab = pd.DataFrame({"fa": [c[0] for c in thr], "fb": [c[1] for c in thr], "thr": list(thr.values())})
        ct = backend.register("twa_sample_cells", tab)
        rows = backend.query_frame(pass_sample_sql(d, sbase, ct, extra), label="pass 3/3 (sample)",
                                   progress=progress if attempt == 0 else False, prepare=backend.prepare_sample)
        got = rows if got is None else pd.concat([got[~got.set_index(["fa", "fb"]).index.isin(list(thr))], rows])
        have = got.groupby(["fa", "fb"]).size().to_dict()
        short = {c: 2.0 for c in keep if have.get(c, 0) < keep[c]}
        if not short:
            break
        thr = short
    timings["sample"] = time.perf_counter() - t0
    got = got.sort_values(["fa", "fb", "skey"] + (["rowno"] if rowno is not None else []), kind="stable")
    got = got.groupby(["fa", "fb"], sort=False).head(k)
    ia, ib = lv["index_a"], lv["index_b"]
    a = got["fa"].map(ia).to_numpy(np.int64)
    b = got["fb"].map(ib).to_numpy(np.int64)
    y = got["yr"].to_numpy(float)
    order = np.lexsort((np.arange(a.size), b, a))
    a, b, y = a[order], b[order], y[order]
    rows_out = got["rowno"].to_numpy(np.int64)[order] if rowno is not None else None
    centring = ei.centring
    info = {
        "name": backend.dialect.name,
        "version": backend.version,
        "source": backend.describe(),
        "response_type": rk.kind,
        "passes": 3,
        "seconds": {kk: round(v, 3) for kk, v in timings.items()},
        "sample_per_cell": k,
        "sample_rows": int(a.size),
        "sample_seed": int(seed),
        "sample_key": backend.sample_key_description,
    }
    return Scan(moments=cm, sample_a=a, sample_b=b, sample_y=y, sample_rows=rows_out, centring=centring, info=info,
                dropped=ei.dropped, notes=ei.notes, level_order=ei.level_order)
