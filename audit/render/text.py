"""Plain-text rendering of a :class:`~audit.findings.Findings` for the terminal.

Formats only what the findings already hold; never computes a statistic.
Severity is always printed as a word (colour, if ever added, only doubles it).
"""

from __future__ import annotations

import math
import unicodedata
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # annotations only: keeps sanitize() importable without the numerical stack
    from ..findings import Findings

__all__ = ["render_text", "sanitize"]

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

RULE = "-" * 78


def _num(x, digits: int = 4) -> str:
    if x is None:
        return "-"
    if isinstance(x, str):
        return x
    if isinstance(x, float) and math.isinf(x):
        return "inf"
    if x == 0:
        return "0"
    ax = abs(x)
    if 1e4 <= ax < 1e12:
        return f"{x:,.0f}"
    if ax >= 1e12 or ax < 1e-3:
        return f"{x:.{digits - 1}e}"
    return f"{x:.{digits}g}" if ax >= 1 else f"{x:.{digits}f}".rstrip("0").rstrip(".")


def _p(p) -> str:
    if p is None:
        return "-"
    if p < 0.0001:
        return "<.0001"
    return f"{p:.4f}"


def _table(header: list[str], rows: list[list[str]], align: str | None = None) -> list[str]:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(header)]
    align = align or "l" + "r" * (len(header) - 1)
    fmt = lambda cells: "  ".join(  # noqa: E731
        c.ljust(w) if a == "l" else c.rjust(w) for c, w, a in zip(cells, widths, align)
    )
    return [fmt(header), fmt(["-" * w for w in widths])] + [fmt(r) for r in rows]


def _design_lines(f: Findings) -> list[str]:
    d = f.design
    a, b = f.factors
    la, lb = d.levels[a], d.levels[b]
    sa, sb = sanitize(a), sanitize(b)
    out = ["DESIGN", RULE]
    out.append(f"Response: {sanitize(f.response)}    N used: {d.n}")
    out.append(f"Factor A: {sa} ({len(la)} levels: {', '.join(map(sanitize, la))})")
    out.append(f"Factor B: {sb} ({len(lb)} levels: {', '.join(map(sanitize, lb))})")
    out.append("Level order: " + "; ".join(f"{sanitize(k)} {v}" for k, v in d.level_order.items()))
    ratio = f", largest/smallest cell = {d.size_ratio:.3g}" if d.size_ratio else ""
    out.append(f"Balance: {d.balance}{ratio}; empty cells: {len(d.empty_cells) or 'none'}; "
               f"cells with n = 1: {len(d.single_cells) or 'none'}")
    dr = d.dropped_rows
    if dr.get("total"):
        parts = [f"{sanitize(c['a'])} x {sanitize(c['b'])}: {c['n']}" for c in dr.get("missing_response_by_cell", [])]
        extra = []
        if dr.get("missing_factor"):
            extra.append(f"{dr['missing_factor']} with a missing factor value")
        if dr.get("missing_other"):
            extra.append(f"{dr['missing_other']} missing an order/unit value")
        out.append(f"Rows dropped: {dr['total']} (missing response by cell: {'; '.join(parts) or 'none'}"
                   + (f"; {'; '.join(extra)}" if extra else "") + ")")
    else:
        out.append("Rows dropped: none" + (f" ({sanitize(dr['note'])})" if dr.get("note") else ""))
    if d.centring:
        out.append(f"Centring: {sanitize(d.centring)}")
    out.append("")
    out.append("Cell counts and means (SD):")
    header = [f"{sa} \\ {sb}", *map(sanitize, lb)]
    rows = []
    cells = {(c["a"], c["b"]): c for c in f.cell_table()}
    for x in la:
        row = [sanitize(x)]
        for y in lb:
            c = cells[(x, y)]
            if c["n"] == 0:
                row.append("empty")
            else:
                sd = f" ({_num(c['sd'], 3)})" if c["sd"] is not None else ""
                row.append(f"n={c['n']}: {_num(c['mean'])}{sd}")
        rows.append(row)
    out += _table(header, rows, "l" + "r" * len(lb))
    for note in d.notes:
        out.append(f"Note: {sanitize(note)}")
    return out


def _anova_lines(f: Findings) -> list[str]:
    out = ["CLASSICAL TWO-WAY ANOVA", RULE]
    names = {"I": "Type I (sequential: A, then B, then AB)",
             "II": "Type II (each main effect adjusted for the other)",
             "III": "Type III (sum-to-zero contrasts, unweighted marginal means)"}
    tables = f.anova.tables
    for t in ("I", "II", "III"):
        out.append(names[t])
        rows = []
        notes = []
        for r in tables[t].rows:
            ci = r.partial_eta_sq_ci
            eta = "-" if r.partial_eta_sq is None else (
                f"{r.partial_eta_sq:.3f} [{ci[0]:.3f}, {ci[1]:.3f}]" if ci else f"{r.partial_eta_sq:.3f}")
            rows.append([sanitize(r.label), _num(r.ss), str(r.df), _num(r.ms), _num(r.F), _p(r.p), eta,
                         _num(r.partial_omega_sq, 3) if r.partial_omega_sq is not None else "-"])
            if r.note and r.effect != "residual":
                notes.append(f"  {sanitize(r.label)}: {sanitize(r.note)}")
        out += _table(["Effect", "SS", "df", "MS", "F", "p", "partial eta2 [95% CI]", "partial omega2"], rows)
        out += notes
        out.append("")
    if f.cells.m == f.cells.J * f.cells.K:
        out.append("With every cell filled the interaction (AB) line is identical under Types I, II and III;"
                   " the SS type matters only for the main effects in unbalanced designs.")
    out.append("")
    out.append("Interaction terms (cell mean minus the additive model's prediction):")
    a, b = f.factors
    lb = f.design.levels[b]
    terms = {(x["a"], x["b"]): x["term"] for x in f.interaction_table()}
    rows = [[sanitize(x), *[_num(terms.get((x, y))) if (x, y) in terms else "empty" for y in lb]]
            for x in f.design.levels[a]]
    out += _table([f"{sanitize(a)} \\ {sanitize(b)}", *map(sanitize, lb)], rows)
    return out


SEVERITY_WORD = {"clear": "clear", "minor": "minor", "concern": "concern", "critical": "critical",
                 "not-run": "not run"}


def _wrap(text: str, indent: str, width: int = 78) -> list[str]:
    import textwrap

    return textwrap.wrap(text, width=width, initial_indent=indent, subsequent_indent=indent) or [indent]


def _diagnostic_lines(f: Findings) -> list[str]:
    out = ["ASSUMPTION AND DESIGN CHECKS", RULE]
    for d in f.diagnostics:
        head = f"[{SEVERITY_WORD[d.severity]:>7}] "
        lines = _wrap(sanitize(d.summary), " " * len(head))
        lines[0] = head + lines[0].lstrip()
        out += lines
    if f.fragility is not None:
        k = f.fragility.get("deletions_to_flip")
        rows = f.fragility.get("rows") or []
        if k is None:
            out.append(f"Fragility: the interaction decision did not flip within "
                       f"{f.fragility.get('max_steps') or 'the capped number of'} greedy deletions"
                       f" ({sanitize(f.fragility.get('stopped') or 'cap reached')}).")
        else:
            out.append(f"Fragility: deleting {k} row(s) flips the interaction decision at alpha = {f.alpha:g}"
                       f" (rows {', '.join(map(str, rows))}).")
    return out


_EFFECT_ORDER = {"AB": 0, "A": 1, "B": 2}


def _method_lines(f: Findings) -> list[str]:
    out = ["THE TESTS REFITTED BY OTHER METHODS (interaction first, then main effects)", RULE]
    rows = []
    notes: dict = {}
    last = None
    a, b = map(sanitize, f.factors)
    names = {"A": a, "B": b, "AB": f"{a}:{b}"}
    for m in sorted(f.methods, key=lambda m: _EFFECT_ORDER.get(m.effect, 9)):
        if m.df1 is None:
            df = "-"
        else:
            df = f"{_num(m.df1, 3)}, {_num(m.df2, 4)}" if m.df2 is not None else _num(m.df1, 3)
        res = "-"
        if m.resamples:
            res = f"{m.resamples}"
            if m.mc_se is not None:
                res += f" (MC SE {m.mc_se:.4f})"
        flag = "" if m.valid_for_interaction or m.effect != "AB" else " (not valid for AB)"
        stat = "-" if m.statistic is None else f"{m.statistic_name} = {_num(m.statistic)}"
        if last is not None and m.effect != last:
            rows.append([""] * 6)
        last = m.effect
        rows.append([m.id + flag, names.get(m.effect, m.effect), stat, df, _p(m.p), res])
        if m.notes and (m.p is None or (not m.valid_for_interaction and m.effect == "AB")):
            notes.setdefault((m.id, m.notes[0]), []).append(names.get(m.effect, m.effect))
    out += _table(["Method", "Effect", "Statistic", "df", "p", "Resamples"], rows, "llrrrr")
    if f.provenance.get("seed") is not None and any(m.resamples for m in f.methods):
        out.append(f"Resampled p-values: B = {f.provenance.get('resamples')} per method, seed "
                   f"{f.provenance['seed']} (repeat the run with --seed {f.provenance['seed']}).")
    for (mid, text), effects in notes.items():
        out += _wrap(f"{mid} ({', '.join(effects)}): {sanitize(text)}", "  ")
    return out


_VERDICT_WORDS = {
    "holds": "HOLDS",
    "holds-with-caveats": "HOLDS, WITH CAVEATS",
    "fragile": "FRAGILE",
    "does-not-hold": "DOES NOT HOLD",
    "not-reproducible": "NOT REPRODUCIBLE",
    "cannot-judge": "CANNOT BE JUDGED",
}


def _verdict_lines(f: Findings) -> list[str]:
    j = f.judgement
    rec = j.claims[0]
    if rec.source == "stated":
        what = f"the claim {rec.claim.text!r} about the interaction"
    elif rec.present is None:
        what = "the interaction test"
    else:
        what = (f"the classical F's conclusion that the interaction is {'present' if rec.present else 'absent'} "
                "(no claim was stated)")
    lines = _wrap(f"Verdict: {_VERDICT_WORDS[j.verdict.verdict]}: {sanitize(what)}", "")
    for i, r in enumerate(j.verdict.reasons[:8], 1):
        wrapped = _wrap(sanitize(r.text) + f" [{r.ref}]", "     ")
        wrapped[0] = f"  {i}. " + wrapped[0].lstrip()
        lines += wrapped
    for e in j.verdict.effects[1:]:
        lines += _wrap(f"Main effect {e.effect}: {_VERDICT_WORDS[e.verdict]}"
                       + (f" ({sanitize(e.reasons[0].text)})" if e.reasons else ""), "  ")
    return lines


def render_text(f: Findings) -> str:
    """The terminal report: design, ANOVA tables, then the standing cautions."""
    src = f.provenance.get("input") or ("summary table" if f.mode == "summary" else "data frame")
    lines = [
        f"twoway-audit {f.provenance.get('version', '')}: {sanitize(f.response)} by {sanitize(f.factors[0])}"
        f" x {sanitize(f.factors[1])}"
        f" (alpha = {f.alpha:g})",
        f"Data: {sanitize(src)}" + (f"  [sha256 {f.provenance['input_sha256'][:12]}]" if f.provenance.get("input_sha256") else ""),
        "",
    ]
    if f.judgement is not None:
        lines += _verdict_lines(f)
        lines.append("")
    lines += _design_lines(f)
    lines.append("")
    lines += _anova_lines(f)
    lines.append("")
    if f.diagnostics:
        lines += _diagnostic_lines(f)
        lines.append("")
    if f.methods:
        lines += _method_lines(f)
        lines.append("")
    lines.append("CAUTIONS")
    lines.append(RULE)
    for c in f.cautions:
        wrapped = _wrap(sanitize(c), "  ")
        wrapped[0] = "- " + wrapped[0].lstrip()
        lines += wrapped
    # last guard: any control character a user string brought in is shown escaped
    return sanitize("\n".join(lines), keep_newlines=True) + "\n"
