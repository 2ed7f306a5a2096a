"""The Markdown report (``report.md``): fit to paste as a pull-request comment.

Lays out the report model (:mod:`audit.report.model`) only.  The verdict, the
claim against every method and the checks are shown; the long parts (design,
ANOVA tables, main effects, size check, provenance) fold into ``<details>``.
Figures are linked by their relative file name in the report folder.  Every
string is escaped: Markdown's special characters (``| * _ [ ] < >`` ...) in
column, level and file names render as themselves.
"""

from __future__ import annotations

import re

from .text import sanitize

__all__ = ["render_markdown", "md_escape"]

_SPECIAL = re.compile(r"([\\`*_\[\]<>|~&])")
_LEAD = re.compile(r"^(\s*)([#+!=-]|\d+(?=[.)]))")
_OPEN = ("verdict", "claim", "checks", "results", "cautions")


def md_escape(text) -> str:
    """Plain text made literal in Markdown (and inside a table cell)."""
    s = sanitize(str(text)).replace("\n", " ")
    s = _SPECIAL.sub(r"\\\1", s)
    m = _LEAD.match(s)  # a list marker, heading or ordered-list number at the start stays literal
    if m:
        s = s[:m.end()] + "\\" + s[m.end():] if m.group(2)[0].isdigit() else s[:m.start(2)] + "\\" + s[m.start(2):]
    return s


def _link(file: str) -> str:
    # a relative link to a file of the same folder; characters that break a link are percent-encoded
    from urllib.parse import quote

    return quote(sanitize(file), safe="")


def _table(t) -> list[str]:
    out = []
    if t.caption:
        out += [f"*{md_escape(t.caption)}*", ""]
    out.append("| " + " | ".join(md_escape(c.title) for c in t.columns) + " |")
    out.append("|" + "|".join("---:" if c.align == "r" else ":---" for c in t.columns) + "|")
    for r in t.rows:
        out.append("| " + " | ".join(md_escape(x) or " " for x in r) + " |")
    if t.notes:
        out.append("")
        out += [f"- {md_escape(n)}" for n in t.notes]
    return out


def _figure(fig) -> list[str]:
    return [f"- Figure [{md_escape(fig.file)}]({_link(fig.file)}): {md_escape(fig.caption)}"]


def _block(b) -> list[str]:
    k = b.kind
    if k == "paragraph":
        return [md_escape(b.text)]
    if k == "table":
        return _table(b)
    if k == "lines":
        return [md_escape(x) + ("  " if i < len(b.lines) - 1 else "") for i, x in enumerate(b.lines)]
    if k == "bullets":
        return [f"- {md_escape(x)}" for x in b.items]
    if k == "figure":
        return _figure(b)
    if k == "verdict":
        out = [f"**Verdict: {md_escape(b.word)}** \u2014 {md_escape(b.about)}"]
        if b.effects:
            out.append("")
            out += [f"- {md_escape(e)}" for e in b.effects]
        return out
    if k == "reasons":
        return [f"{i}. {md_escape(r.text)} ({md_escape(r.weight)}; `{sanitize(r.ref).replace('`', '')}`)"
                for i, r in enumerate(b.items, 1)]
    if k == "checks":
        out = ["| Check | Grade | Finding |", "|:---|:---|:---|"]
        for c in b.items:
            out.append(f"| {md_escape(c.name)} | **{md_escape(c.grade_word)}** | {md_escape(c.text)} |")
        figs = [fig for c in b.items for fig in c.figures]
        if figs:
            out.append("")
            for fig in figs:
                out += _figure(fig)
        if b.legend:
            out += ["", f"<sub>{md_escape(b.legend)}</sub>"]
        return out
    return [md_escape(getattr(b, "text", b))]


def render_markdown(report) -> str:
    """The Markdown report of a report model."""
    out = [f"## {md_escape(report.title)}", "", md_escape(report.source), ""]
    for s in report.sections:
        body = []
        for b in s.blocks:
            body += _block(b)
            body.append("")
        if s.id in _OPEN:
            out += [f"### {md_escape(s.title)}", "", *body]
        else:
            import html

            out += ["<details>", f"<summary><b>{html.escape(sanitize(s.title))}</b></summary>", "", *body,
                    "</details>", ""]
    while out and out[-1] == "":
        out.pop()
    return "\n".join(out) + "\n"
