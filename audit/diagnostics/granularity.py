"""GRIM, GRIMMER and scale-range checks of a table of cell statistics
(summary mode, when the response is the mean of L integer items per subject).

A subject's score is the mean of L integer item responses, so L x score is an
integer s_i, and over a cell of n subjects

* GRIM (Brown & Heathers 2017, Soc Psychol Personal Sci 8:363-369): the sum
  T = sum s_i is an integer, so the reported mean (d decimals) is possible only
  if some integer T has T / (n L) inside the mean's rounding interval
  [M - 0.5 10^-d, M + 0.5 10^-d] (both ends allowed: either rounding rule).
  With n L >= 10^d every mean is possible and the check is "not testable".
* GRIMMER (Anaya 2016, PeerJ Preprints 4:e2400): Q = sum s_i^2 = (n - 1) L^2 s^2
  + T^2 / n must be an integer for some SD s in the reported SD's rounding
  interval and some GRIM-consistent T, of the same parity as T (x^2 = x mod 2),
  and at least the smallest sum of squares of n integers summing to T (and, with
  the scale's bounds, at most the largest).  These are necessary conditions:
  passing them does not prove that a sample exists.
* Scale range: a mean whose rounding interval lies outside [min, max]; an SD
  above the largest SD any n integer responses in [min, max] with a
  GRIM-consistent sum can have.

All arithmetic is exact (Python integers and fractions from the reported digits).
An SE column is carried to the SD exactly: SD^2 = n SE^2.

Severity: "critical" when a mean or SD lies outside what the scale allows;
"concern" when a cell fails GRIM or GRIMMER (the reported statistics cannot come
from n integer responses: an error in the table, in n, or in the assumed number
of items); "clear" otherwise; "not-run" without a scale.
"""

from __future__ import annotations

from dataclasses import dataclass
from decimal import ROUND_HALF_EVEN, Decimal
from fractions import Fraction

import numpy as np

from ..results import NOT_RUN, Diagnostic

__all__ = ["grim", "grimmer", "granularity", "CellGranularity"]


def _ceil(fr: Fraction) -> int:
    return -((-fr.numerator) // fr.denominator)


def _floor(fr: Fraction) -> int:
    return fr.numerator // fr.denominator


def _digits(value: float, decimals: int) -> int:
    """The reported number in units of its last digit, from its shortest repr (the digits as
    read), in exact decimal arithmetic: no float overflow at any magnitude or number of decimals."""
    d = Decimal(repr(float(value))).scaleb(int(decimals))
    return int(d.to_integral_value(rounding=ROUND_HALF_EVEN))


def _sum_range(mean: float, decimals: int, n: int, items: int) -> tuple[int, int]:
    """Integers T with T / (n L) in the mean's rounding interval."""
    M = _digits(mean, decimals)
    den = 2 * 10 ** decimals
    nl = n * items
    return _ceil(Fraction((2 * M - 1) * nl, den)), _floor(Fraction((2 * M + 1) * nl, den))


def grim(mean: float, n: int, *, decimals: int, items: int = 1) -> bool | None:
    """GRIM: can n subjects' means of ``items`` integer items average to ``mean``
    (reported with ``decimals`` decimals)?  None when not testable (n L >= 10^d).

    Examples: grim(5.19, 28, decimals=2) is False; grim(5.18, 28, decimals=2) is True.
    """
    if n * items >= 10 ** decimals:
        return None
    lo, hi = _sum_range(mean, decimals, n, items)
    return lo <= hi


def _q_min(T: int, n: int) -> int:
    q, r = divmod(T, n)
    return (n - r) * q * q + r * (q + 1) * (q + 1)


def _q_max(T: int, n: int, a: int, b: int) -> int | None:
    """Largest sum of squares of n integers in [a, b] summing to T (None: impossible)."""
    if not n * a <= T <= n * b:
        return None
    if a == b:
        return n * a * a
    k, r = divmod(T - n * a, b - a)
    if k >= n:
        return n * b * b
    return k * b * b + (n - k - 1) * a * a + (a + r) * (a + r)


def _var_interval(spread: float, decimals: int, n: int, kind: str) -> tuple[Fraction, Fraction]:
    S = _digits(spread, decimals)
    den = 2 * 10 ** decimals
    lo = Fraction(max(2 * S - 1, 0), den) ** 2
    hi = Fraction(2 * S + 1, den) ** 2
    if kind == "se":
        lo, hi = lo * n, hi * n
    return lo, hi


def grimmer(mean: float, sd: float, n: int, *, mean_decimals: int, sd_decimals: int, items: int = 1,
            scale_min: float | None = None, scale_max: float | None = None, kind: str = "sd") -> bool:
    """GRIMMER: can n subjects' integer item sums give this mean and SD (or SE
    with ``kind='se'``)?  Parity and bounds of the sum of squares (a necessary
    condition; see the module docstring)."""
    return _grimmer_detail(mean, sd, n, mean_decimals=mean_decimals, sd_decimals=sd_decimals, items=items,
                           scale_min=scale_min, scale_max=scale_max, kind=kind)[0]


def _bounds(items, scale_min, scale_max):
    if scale_min is None or scale_max is None:
        return None, None
    return _ceil(Fraction(scale_min).limit_denominator(10**9) * items), \
        _floor(Fraction(scale_max).limit_denominator(10**9) * items)


def _grimmer_detail(mean, sd, n, *, mean_decimals, sd_decimals, items, scale_min, scale_max, kind):
    """(consistent, sd_too_large)"""
    lo, hi = _sum_range(mean, mean_decimals, n, items)
    a, b = _bounds(items, scale_min, scale_max)
    if a is not None:
        lo, hi = max(lo, n * a), min(hi, n * b)
    vlo, vhi = _var_interval(sd, sd_decimals, n, kind)
    L2 = items * items
    any_room = False
    if hi - lo > 100_000:  # too many sums to walk: no constraint from the mean's granularity
        return True, False
    for T in range(lo, hi + 1):
        base = Fraction(T * T, n)
        qlo = max(_ceil((n - 1) * L2 * vlo + base), _q_min(T, n))
        qmax = _q_max(T, n, a, b) if a is not None else None
        if qmax is not None and (n - 1) * L2 * vlo + base <= qmax:
            any_room = True
        elif a is None:
            any_room = True
        qhi = _floor((n - 1) * L2 * vhi + base)
        if qmax is not None:
            qhi = min(qhi, qmax)
        if qlo > qhi:
            continue
        if qlo % 2 != T % 2:
            qlo += 1
        if qlo <= qhi:
            return True, False
    return False, not any_room and lo <= hi


@dataclass(frozen=True, kw_only=True)
class CellGranularity:
    """One cell's checks: each 'consistent', 'inconsistent' or 'not testable'."""

    a: str
    b: str
    n: int
    grim: str
    grimmer: str
    range: str
    message: str

    def to_dict(self) -> dict:
        return {"a": self.a, "b": self.b, "n": self.n, "grim": self.grim, "grimmer": self.grimmer,
                "range": self.range, "message": self.message}


def _word(v) -> str:
    return "not testable" if v is None else ("consistent" if v else "inconsistent")


def granularity(table, *, items: int | None, scale_min: float | None = None,
                scale_max: float | None = None) -> Diagnostic:
    """GRIM, GRIMMER and scale-range checks of every cell of a summary table.

    Parameters
    ----------
    table : audit.summary.SummaryTable
    items : int or None
        Integer items averaged into each subject's score (1: a single integer
        response); None: not run.
    scale_min, scale_max : float, optional
        The scale's smallest and largest item response (both or neither).

    Notes
    -----
    values keys: ``items``, ``scale_min``, ``scale_max``, ``decimals``,
    ``cells`` (one dict per filled cell: ``a``, ``b``, ``n``, ``grim``,
    ``grimmer``, ``range``, ``message``), ``inconsistent`` (count).
    """
    if items is None:
        return Diagnostic(id="granularity", severity=NOT_RUN,
                          summary="Granularity (GRIM/GRIMMER): not run; give the scale (--scale-items L, and "
                                  "--scale-min/--scale-max) when each response is the mean of integer items.",
                          values={"available": False, "reason": "no scale given"})
    cells = table.cells
    md, sdd = table.decimals.get("mean"), table.decimals.get("spread")
    means = cells.display_means
    out: list[CellGranularity] = []
    worst = "clear"
    rank = {"clear": 0, "concern": 1, "critical": 2}
    for j, la in enumerate(cells.levels_a):
        for k, lb in enumerate(cells.levels_b):
            n = int(cells.counts[j, k])
            if n == 0:
                continue
            m = float(means[j, k])
            s = float(table.spread_values[j, k])
            msgs = []
            rng = "consistent"
            if scale_min is not None and md is not None:
                h = 0.5 * 10 ** -md
                if m + h < scale_min or m - h > scale_max:
                    rng = "inconsistent"
                    msgs.append(f"mean {m:.{md}f} lies outside the scale [{scale_min:g}, {scale_max:g}]")
            g = grim(m, n, decimals=md, items=items) if md is not None else None
            if g is False:
                msgs.append(f"GRIM: no {n} subjects' sums of {items} integer item(s) average to {m:.{md}f}")
            gm = None
            if n >= 2 and md is not None and sdd is not None and np.isfinite(s) and rng == "consistent":
                ok, too_big = _grimmer_detail(m, s, n, mean_decimals=md, sd_decimals=sdd, items=items,
                                              scale_min=scale_min, scale_max=scale_max, kind=table.spread)
                gm = ok
                if too_big:
                    rng = "inconsistent"
                    msgs.append(f"{table.spread.upper()} {s:.{sdd}f} is above the largest possible for {n} "
                                f"responses in [{scale_min:g}, {scale_max:g}] with this mean")
                elif not ok:
                    msgs.append(f"GRIMMER: no integer sum of squares of the right parity fits mean "
                                f"{m:.{md}f} and {table.spread.upper()} {s:.{sdd}f} with n = {n}")
            sev = "critical" if rng == "inconsistent" else ("concern" if g is False or gm is False else "clear")
            if rank[sev] > rank[worst]:
                worst = sev
            out.append(CellGranularity(a=la, b=lb, n=n, grim=_word(g), grimmer=_word(gm), range=rng,
                                       message="; ".join(msgs) if msgs else "consistent"))
    bad = [c for c in out if c.message != "consistent"]
    if bad:
        first = f"{bad[0].a} x {bad[0].b}: {bad[0].message}"
        summary = (f"Granularity: {len(bad)} of {len(out)} cells are impossible for means of {items} integer "
                   f"item(s) with these n (first: {first}); the table, its n or the assumed scale is wrong.")
    else:
        untested = sum(c.grim == "not testable" for c in out)
        summary = (f"Granularity: every cell's mean and {table.spread.upper()} are possible for means of {items} "
                   f"integer item(s) (GRIM, GRIMMER{', scale range' if scale_min is not None else ''})"
                   + (f"; GRIM cannot test {untested} cell(s) (n x items >= 10^decimals)" if untested else "")
                   + ".")
    values = {"available": True, "items": items, "scale_min": scale_min, "scale_max": scale_max,
              "decimals": dict(table.decimals), "cells": [c.to_dict() for c in out], "inconsistent": len(bad)}
    return Diagnostic(id="granularity", severity=worst, summary=summary, values=values)
