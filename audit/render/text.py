"""The full plain-text report (``report.txt``, ``check --full``) and :func:`sanitize`.

Lays out the report model (:mod:`audit.report.model`) only; never computes or
decides.  Sections are numbered ("3 \u00b7 Assumption and design checks"), text
is wrapped at 78 columns and indented under its heading; a check's grade is a
word in its own column.  User strings pass through :func:`sanitize`.
"""

from __future__ import annotations

import math
import unicodedata
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # annotations only: keeps sanitize() importable without the numerical stack
    from ..findings import Findings

__all__ = ["render_text", "render_report_text", "sanitize"]

_NAMED = {"\n": "\\n", "\t": "\\t", "\r": "\\r"}
_UNSAFE = {"Cc", "Cf", "Cs", "Zl", "Zp"}


def sanitize(text, *, keep_newlines: bool = False) -> str:
    """``text`` with control and format characters shown escaped (``\\x1b``, ``\\n``, ``\\u202e``).

    User strings (column, level and file names) pass through this before they
    reach a terminal or report.txt, so escape codes never act and a name never
    breaks a line.  With ``keep_newlines`` line breaks are kept (for whole
    reports whose user strings were already cleaned).
    """
    text = str(text)
    if text.isprintable() or not any(unicodedata.category(c) in _UNSAFE for c in text):
        return text
    out = []
    for c in text:
        if (c == "\n" and keep_newlines) or unicodedata.category(c) not in _UNSAFE:
            out.append(c)
        else:
            code = ord(c)
            out.append(_NAMED.get(c) or (f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"))
    return "".join(out)

WIDTH = 78
_IND = "  "


def _wrap(text: str, first: str = _IND, rest: str | None = None, width: int = WIDTH) -> list[str]:
    import textwrap

    return textwrap.wrap(sanitize(text), width=width, initial_indent=first,
                         subsequent_indent=first if rest is None else rest,
                         break_on_hyphens=False) or [first.rstrip()]


def _table(t) -> list[str]:
    head = [sanitize(c.title) for c in t.columns]
    rows = [[sanitize(x) for x in r] for r in t.rows]
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(head)]
    aligns = [c.align for c in t.columns]

    def line(cells):
        return (_IND + "  ".join(c.ljust(w) if a == "l" else c.rjust(w)
                                 for c, w, a in zip(cells, widths, aligns))).rstrip()

    out = []
    if t.caption:
        out += _wrap(t.caption + ":")
    out.append(line(head))
    out += [line(r) for r in rows]
    for n in t.notes:
        out += _wrap(n, _IND + "  ", _IND + "  ")
    return out


def _block(b) -> list[str]:
    k = b.kind
    if k == "paragraph":
        return _wrap(b.text)
    if k == "table":
        return _table(b)
    if k == "lines":
        return [ln for x in b.lines for ln in _wrap(x, _IND, _IND + "    ")]
    if k == "bullets":
        return [ln for x in b.items for ln in _wrap(x, _IND + "- ", _IND + "  ")]
    if k == "figure":
        return _wrap(f"Figure {b.file}: {b.caption}", _IND, _IND + "  ")
    if k == "verdict":
        out = _wrap(f"Verdict: {b.word} \u2014 {b.about}", _IND, _IND + "  ")
        out += [ln for e in b.effects for ln in _wrap(e, _IND + "- ", _IND + "  ")]
        return out
    if k == "reasons":
        out = []
        for i, r in enumerate(b.items, 1):
            out += _wrap(f"{r.text} [{r.weight}; {r.ref}]", f"{_IND}{i}. ", _IND + "   ")
        return out
    if k == "checks":
        nw = max((len(sanitize(c.name)) for c in b.items), default=4)
        gw = max((len(c.grade_word) for c in b.items), default=5)
        out = []
        for c in b.items:
            lead = f"{_IND}{sanitize(c.name).ljust(nw)}  {c.grade_word.ljust(gw)}  "
            out += _wrap(c.text, lead, " " * len(lead))
            for fig in c.figures:
                out += _wrap(f"Figure {fig.file}: {fig.caption}", " " * len(lead), " " * (len(lead) + 2))
        if b.legend:
            out.append("")
            out += _wrap(b.legend)
        return out
    return _wrap(str(getattr(b, "text", b)))


def render_report_text(report) -> str:
    """The full text report of a report model."""
    lines = [*_wrap(report.title, "", _IND), *_wrap(report.source, "", _IND), ""]
    for i, s in enumerate(report.sections, 1):
        lines.append(f"{i} \u00b7 {s.title}")
        lines.append("")
        for b in s.blocks:
            lines += _block(b)
            lines.append("")
    while lines and lines[-1] == "":
        lines.pop()
    # last guard: any control character a user string brought in is shown escaped
    return sanitize("\n".join(lines), keep_newlines=True) + "\n"


def render_text(f: Findings, *, figures: dict | None = None) -> str:
    """The full text report of an audit (``report.txt``; ``check --full`` prints it).

    Parameters
    ----------
    f : Findings
    figures : dict, optional
        {figure key: file name} of the figures in the report folder.
    """
    from ..report import build_report

    return render_report_text(build_report(f, figures=figures))
