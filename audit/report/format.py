"""The one number formatter of every report (terminal, text, Markdown, HTML).

APA style (Publication Manual, 7th ed., section 6.36, from memory): p to three
decimals without a leading zero (``p = .030``), below .001 as ``p < .001``;
statistics to two decimals; quantities that cannot exceed 1 (proportions,
effect sizes such as partial eta squared) without a leading zero.

A resampled p-value has a floor: with B resamples the smallest value the
estimator ``(1 + #{T* >= T}) / (B + 1)`` can take is ``1 / (B + 1)``.  At that
floor it is shown as a bound with B stated, ``p < .0001 (B = 9,999)``, never as
the number itself (common practice; Phipson & Smyth 2010).

Only formats: never computes a statistic and never decides anything.
"""

from __future__ import annotations

import math
import re

__all__ = ["p_text", "p_cell", "stat", "df", "df_pair", "prop", "num", "count", "ci", "test_line",
           "normalise_p", "is_floor"]

DASH = "-"


def _finite(x) -> bool:
    return x is not None and not isinstance(x, str) and math.isfinite(float(x))


def _no_lead(s: str) -> str:
    """'0.030' -> '.030', '-0.01' -> '-.01'."""
    if s.startswith("0."):
        return s[1:]
    if s.startswith("-0."):
        return "-" + s[2:]
    return s


def count(n) -> str:
    """An integer with thousands separators: 9999 -> '9,999'."""
    return f"{int(n):,}"


def is_floor(p, resamples) -> bool:
    """True when a resampled p sits at its floor 1/(B+1)."""
    if not _finite(p) or not resamples:
        return False
    return float(p) <= 1.0 / (int(resamples) + 1) * (1 + 1e-9)


def _floor_text(resamples: int) -> str:
    v = 1.0 / (int(resamples) + 1)
    s = f"{v:.2g}"
    if "e" in s:  # 1e-06 and the like: write the decimal out
        exp = int(s.split("e")[1])
        s = f"{v:.{-exp + 1}f}".rstrip("0")
    s = s.rstrip("0").rstrip(".") if "." in s else s
    return _no_lead(s)


def p_cell(p, resamples=None) -> str:
    """A p-value for a table cell: '.030', '< .001', '< .0001 (B = 9,999)'; '-' when missing."""
    if not _finite(p):
        return DASH
    p = float(p)
    if resamples and is_floor(p, resamples):
        return f"< {_floor_text(resamples)} (B = {count(resamples)})"
    if p < 0.001:
        return "< .001"
    if p > 0.999:
        return "> .999"
    return _no_lead(f"{p:.3f}")


def p_text(p, resamples=None) -> str:
    """A p-value in a sentence: 'p = .030', 'p < .001', 'p < .0001 (B = 9,999)'; 'p not computed'."""
    c = p_cell(p, resamples)
    if c == DASH:
        return "p not computed"
    return "p " + c if c[0] in "<>" else "p = " + c


def stat(x) -> str:
    """A test statistic: two decimals, thousands separated ('6.65', '1,234.56'); '-' when missing."""
    if not _finite(x):
        return DASH
    x = float(x)
    ax = abs(x)
    if ax >= 1e9:
        return f"{x:.3g}".replace("e+", "e")
    if ax != 0 and ax < 0.005:
        return f"{x:.2g}"
    return f"{x:,.2f}"


def df(x) -> str:
    """Degrees of freedom: whole numbers as integers, others to one decimal ('70', '27.1')."""
    if not _finite(x):
        return DASH
    x = float(x)
    if abs(x - round(x)) < 1e-9:
        return count(round(x))
    return f"{x:,.1f}"


def df_pair(df1, df2) -> str:
    """'4, 70' or '4' (a reference without a second df) or '-'."""
    if not _finite(df1):
        return DASH
    return f"{df(df1)}, {df(df2)}" if _finite(df2) else df(df1)


def prop(x, digits: int = 2) -> str:
    """A quantity bounded by 1 (an effect size, a proportion): '.28', '-.01'."""
    if not _finite(x):
        return DASH
    return _no_lead(f"{float(x):.{digits}f}")


def ci(lo, hi, fmt=prop) -> str:
    """'[.08, .40]'."""
    if not (_finite(lo) and _finite(hi)):
        return DASH
    return f"[{fmt(lo)}, {fmt(hi)}]"


def num(x, digits: int = 4) -> str:
    """A descriptive number (a mean, an SD, a sum of squares) to about ``digits`` significant
    digits, thousands separated: 1456.3 -> '1,456', 55.31 -> '55.31', 0.00123 -> '0.00123'."""
    if not _finite(x):
        return DASH
    x = float(x)
    ax = abs(x)
    if x == 0:
        return "0"
    if ax >= 10 ** (digits - 1):
        return f"{x:,.0f}" if ax < 1e15 else f"{x:.3e}"
    if ax >= 1e-3:
        decimals = max(0, digits - 1 - math.floor(math.log10(ax)))
        s = f"{x:.{decimals}f}"
        return s.rstrip("0").rstrip(".") if "." in s else s
    return f"{x:.{digits - 1}e}"


def test_line(name: str, df1, df2, statistic, p, resamples=None) -> str:
    """An APA-style result: 'F(4, 70) = 6.65, p < .001'; 'F = 6.65, p < .0001 (B = 9,999)' for a
    resampled reference (no df); missing pieces are left out."""
    parts = []
    if _finite(statistic):
        d = df_pair(df1, df2) if not resamples else DASH
        head = f"{name}({d})" if d != DASH else name
        parts.append(f"{head} = {stat(statistic)}")
    parts.append(p_text(p, resamples))
    return ", ".join(parts)


_NUM = r"(\d*\.\d+(?:[eE][-+]?\d+)?|\d+(?:[eE][-+]?\d+)?)"
_P_IN_TEXT = re.compile(r"(?<![\w-])p( = | |=| < | > )" + _NUM + r"(?![\w.])")
_P_RANGE = re.compile(r"(p-values? range(?:s)?(?: from)? )" + _NUM + r" to " + _NUM)


def _bound(v: float) -> str:
    return p_cell(v)


def normalise_p(text: str) -> str:
    """Rewrite the p-values inside a finished sentence into this module's style.

    'p = 0.603' -> 'p = .603', 'p 0.0001' -> 'p < .001', 'p = 1.1e-05' -> 'p < .001',
    'p-values range 1.5e-05 to 0.0007' -> 'p-values range < .001 to < .001' ... A
    bound ('p < 0.05') keeps its operator.  Used on sentences the earlier stages
    wrote (diagnostic summaries) so that one report shows one style.
    """
    def one(m: re.Match) -> str:
        op, v = m.group(1), float(m.group(2))
        if op.strip() in ("<", ">"):
            return f"p {op.strip()} {_no_lead(m.group(2)) if 'e' not in m.group(2).lower() else p_cell(v).lstrip('<> ')}"
        return p_text(v)

    def rng(m: re.Match) -> str:
        lo, hi = p_cell(float(m.group(2))), p_cell(float(m.group(3)))
        if lo == hi:
            return m.group(1).replace("range ", "").replace("from ", "").rstrip() + f" all {lo}"
        return f"{m.group(1)}{lo} to {hi}"

    return _P_IN_TEXT.sub(one, _P_RANGE.sub(rng, text))
