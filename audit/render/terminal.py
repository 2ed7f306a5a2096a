"""The short terminal summary of ``check``: the answer first, in at most 40 lines of 80 columns
for a typical audit.

Lays out the report model (:mod:`audit.report.model`) only: the verdict and its
ranked reasons, the interaction tested by every method (one row each), the
graded checks (one line each, the grade as a word in its own column) and where
the full report is.  Never computes or decides; user strings are shown with
control characters escaped.
"""

from __future__ import annotations

import textwrap

from .text import sanitize

__all__ = ["render_terminal", "WIDTH", "MAX_LINES"]

WIDTH = 80
MAX_LINES = 40
_IND = "  "


def _wrap(text: str, first: str, rest: str, width: int = WIDTH - 1) -> list[str]:
    return textwrap.wrap(sanitize(text), width=width, initial_indent=first, subsequent_indent=rest,
                         break_on_hyphens=False) or [first.rstrip()]


def _clip(text: str, width: int) -> str:
    return text if len(text) <= width else text[:max(0, width - 1)].rstrip() + "\u2026"


def _method_table(report) -> list[str]:
    head = ("method", "statistic", "df", "p", "trusted", "agrees")
    rows = [(sanitize(r.method), r.statistic, r.df, r.p_short, r.trusted_short, r.agrees) for r in report.methods]
    if report.verdict is None:
        head, rows = head[:4], [r[:4] for r in rows]
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(head)]
    align = "lrrrll"
    # fit 80 columns: the trusted column gives way first, then the method column
    over = len(_IND) + sum(widths) + 2 * (len(widths) - 1) - (WIDTH - 1)
    if over > 0 and len(widths) > 4:
        cut = min(over, widths[4] - len(head[4]))
        widths[4] -= cut
        over -= cut
    if over > 0:
        widths[0] = max(len(head[0]), widths[0] - over)

    def line(cells):
        out = []
        for c, w, a in zip(cells, widths, align):
            c = _clip(c, w)
            out.append(c.ljust(w) if a == "l" else c.rjust(w))
        return (_IND + "  ".join(out)).rstrip()

    return [line(head)] + [line(r) for r in rows]


def _at_most(lines: list[str], k: int) -> list[str]:
    """The first ``k`` wrapped lines, the last clipped with an ellipsis when more were cut (long
    user names: the full report and the JSON keep them)."""
    if len(lines) <= k:
        return lines
    return lines[:k - 1] + [_clip(lines[k - 1] + " \u2026", WIDTH - 1)]


def render_terminal(report) -> str:
    """The summary printed by ``check`` (see the module docstring)."""
    def lay_out(note_lines: int, reason_lines: int, name_lines: int = 2) -> list[str]:
        source = report.source if len(report.source) < WIDTH or not report.source_short else report.source_short
        top = [*_at_most(_wrap(report.title, "", _IND), name_lines), *_at_most(_wrap(source, "", _IND), name_lines), ""]
        v = report.verdict
        verdict: list[str] = []
        if v is not None:
            verdict += _wrap(f"Verdict: {v.word} \u2014 {v.about}", "", " " * 9)
        else:
            verdict.append("Verdict: none (the methods were skipped with --no-methods)")
        methods: list[str] = []
        if report.methods:
            methods.append("")
            methods += _wrap(report.claim_short or "Interaction by method:", "", _IND)
            methods += _method_table(report)
            for n in report.notes_short:
                wrapped = _wrap(n, _IND, _IND + "  ")
                if len(wrapped) > note_lines:  # squeezed: one line, clipped
                    wrapped = [_clip(_IND + " ".join(w.strip() for w in wrapped), WIDTH - 1)]
                methods += wrapped
        checks: list[str] = []
        if report.checks:
            checks.append("")
            checks.append("Checks (grade: clear, minor, concern, critical):")
            graded = [c for c in report.checks if c.grade != "not-run"]
            not_run = [c for c in report.checks if c.grade == "not-run"]
            nw = max(len(c.name) for c in report.checks)
            gw = max(len(c.grade_word) for c in report.checks)
            for c in graded:
                lead = f"{_IND}{sanitize(c.name).ljust(nw)}  {c.grade_word.ljust(gw)}  "
                checks.append(lead + _clip(sanitize(c.headline), WIDTH - 1 - len(lead)))
            if not_run:  # one line: what could not be checked on this input (never shown like a grade)
                checks += _wrap("Not run here: " + ", ".join(sanitize(c.name) for c in not_run)
                                + " (they need the raw observations or an order/unit column)", _IND, _IND + "  ")
        tail = [""]
        if report.design_line:
            tail += _at_most(_wrap(report.design_line, "Level order: ", _IND), name_lines)
        tail += [*_wrap(report.where, "", _IND), *_wrap(report.caution_short, "", _IND)]
        effects = [ln for e in (v.effects if v is not None else ()) for ln in _wrap(e, _IND, _IND + "  ")][:2]

        # the reasons get the lines that are left (each at most two lines; the rest are counted)
        budget = MAX_LINES - len(top) - len(verdict) - len(methods) - len(checks) - len(tail) - len(effects)
        reasons: list[str] = []
        order = {"decisive": 0, "caveat": 1}
        items = sorted(report.reasons, key=lambda r: order.get(r.weight, 2))  # supporting lines last
        for i, r in enumerate(items, 1):
            wrapped = _wrap(r.short, f"{_IND}{i}. ", _IND + "   ")
            if reason_lines == 1 and len(wrapped) > 1:  # squeezed: one line, clipped
                wrapped = [_clip(_IND + " ".join(w.strip() for w in wrapped), WIDTH - 1)]
            if len(wrapped) > 2:
                wrapped = wrapped[:2]
                wrapped[1] = _clip(wrapped[1], WIDTH - 2) if len(wrapped[1]) < WIDTH - 2 else wrapped[1]
                if not wrapped[1].endswith("\u2026"):
                    wrapped[1] = _clip(wrapped[1] + " \u2026", WIDTH - 1)
            left = len(items) - i
            room = budget - len(reasons) - (1 if left else 0)
            must = i == 1 or (i == 2 and r.weight == "caveat")  # the decisive reason and the first caveat always show
            if len(wrapped) > room and not must:
                reasons += _wrap(f"... and {len(items) - i + 1} more reason(s) in the full report", _IND, _IND)
                break
            reasons += wrapped
        return top + verdict + reasons + effects + methods + checks + tail

    # the must-show reasons and wrapped notes can overrun the budget: squeeze the reasons to one
    # line each (the verdict line above says the same in short), then the method notes, then the
    # title, data and level-order lines (very long user names)
    for note_lines, reason_lines, name_lines in ((3, 2, 2), (3, 1, 2), (1, 1, 2), (1, 1, 1)):
        lines = lay_out(note_lines, reason_lines, name_lines)
        if len(lines) <= MAX_LINES:
            break
    return sanitize("\n".join(lines), keep_newlines=True) + "\n"
