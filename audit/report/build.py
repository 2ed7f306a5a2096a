"""Build the report model (:mod:`audit.report.model`) from a finished audit.

The one place that turns findings into sentences, tables and captions for
people.  It formats with :mod:`audit.report.format` only, and takes every
decision (verdict, trust, agreement, grades) from the findings as they are:
it selects, orders and words, and computes no statistic.  User strings
(column, level and file names) are kept raw here; each renderer escapes them
for its own medium.
"""

from __future__ import annotations

import os
import re
from typing import TYPE_CHECKING

from ..errors import shorten
from . import format as fmt
from .model import (Bullets, Check, Checks, Column, Figure, Lines, MethodRow, Paragraph, ReasonItem, Reasons, Report,
                    Section, Table, VerdictHead)

if TYPE_CHECKING:
    from ..findings import Findings

__all__ = ["build_report", "FIGURE_CAPTIONS", "CHECK_NAMES", "GRADE_WORDS", "GRADE_MEANING", "VERDICT_WORDS",
           "figure_caption", "figures_from_files"]

#: the grade words as shown (the JSON values, except 'not-run')
GRADE_WORDS = {"clear": "clear", "minor": "minor", "concern": "concern", "critical": "critical",
               "not-run": "not run"}

GRADE_MEANING = {
    "clear": "no problem worth stating",
    "minor": "a small or uncertain problem, worth knowing",
    "concern": "large enough to weigh on the interaction test",
    "critical": "the interaction test cannot be read at face value",
    "not-run": "the check needs what this input does not hold",
}

VERDICT_WORDS = {
    "holds": "holds",
    "holds-with-caveats": "holds, with caveats",
    "fragile": "fragile",
    "does-not-hold": "does not hold",
    "not-reproducible": "not reproducible",
    "cannot-judge": "cannot be judged",
}

_VERDICT_TONE = {"holds": "good", "holds-with-caveats": "caution", "fragile": "bad", "does-not-hold": "bad",
                 "not-reproducible": "bad", "cannot-judge": "caution"}

CHECK_NAMES = {
    "normality": "Normality", "homogeneity": "Equal variances", "balance": "Balance",
    "missingness": "Missing data", "outliers": "Outliers", "influence": "Influence",
    "fragility": "Fragility", "shape": "Shape", "scale": "Scale", "independence": "Independence",
}

#: captions of the report figures by figure-data key; a key not listed gets a generic caption
FIGURE_CAPTIONS = {
    "methods_p": "The interaction p-value of every method on a log scale, alpha marked. Trusted and untrusted "
                 "methods are drawn with different markers and labelled; resampled p-values carry their "
                 "Monte Carlo intervals.",
    "cell_means": "Cell means with 95% intervals, each factor on the horizontal axis in turn. Parallel lines "
                  "mean no interaction; lines that converge, diverge or cross show one.",
    "residual_qq": "Residuals against normal quantiles with a simultaneous 95% band: points outside the band "
                   "depart from normality by more than chance.",
    "spread": "Residual spread against the fitted cell mean: spread that grows with the mean (a funnel) "
              "suggests another measurement scale.",
    "sd_n": "Cell SD against cell size: large SDs in small cells make the classical F liberal, large SDs in "
            "large cells make it conservative.",
    "loo": "The interaction p-value with each row left out, alpha marked: a row whose deletion carries p "
           "across alpha decides the result on its own.",
    "boxcox": "Box-Cox profile likelihood with its 95% interval for lambda: when lambda = 1 (the raw scale) "
              "lies outside it, the data favour another scale; compare the interaction p there.",
}

#: the check each figure belongs to (shown with it); others go to the claim section or 'More figures'
_FIGURE_HOME = {"cell_means": "shape", "residual_qq": "normality", "spread": "homogeneity", "sd_n": "homogeneity",
                "loo": "influence", "boxcox": "scale", "methods_p": "@claim"}

#: a few words for each trust rule (the full reason is in the report)
_TRUST_SHORT = {
    "no-p": "no p-value", "rank-transform": "not valid", "self-check": "self-check",
    "pseudo-replication": "repeated units", "welch-small-cells": "small cells",
    "trimmed-small-cells": "small cells", "studentized-small-cells": "small cells",
    "wild-small-cells": "small cells", "hc-single": "a cell of 1",
    "equal-variance-unequal-n": "unequal var.", "art-unequal-variances": "unequal var.",
    "art-unbalanced": "unequal n", "hc4-warm": "runs liberal", "size-check-liberal": "liberal here",
}

_EFFECT_ORDER = {"AB": 0, "A": 1, "B": 2}


def figure_caption(key: str) -> str:
    """The caption of a figure (a generic one for a key this module does not know)."""
    return FIGURE_CAPTIONS.get(key) or f"Figure: {key.replace('_', ' ')}."


def figures_from_files(names) -> dict:
    """{figure key: file name} for the file names the figure writer produced."""
    from ..render.figures import FIGURE_FORMATS, FIGURE_STEMS

    by_file = {f"{v}.{fmt}": k for k, v in FIGURE_STEMS.items() for fmt in FIGURE_FORMATS}
    out = {}
    for n in names:
        base = str(n).replace("\\", "/").rsplit("/", 1)[-1]
        out[by_file.get(base, base.rsplit(".", 1)[0].replace("-", "_"))] = base
    return out


#: user names (factors, response, levels, files) are shown at most this long in reports; the JSON
#: keeps them whole (a 3,000-character column name must not turn a 40-line summary into 180)
NAME_SHOWN = 48


def _nm(x) -> str:
    return shorten(str(x), NAME_SHOWN)


def _levels_shown(levels, most: int = 12) -> str:
    """'a, b, c' (each name shortened; more than ``most`` levels: the first ones and a count)."""
    names = [_nm(x) for x in levels]
    if len(names) <= most:
        return ", ".join(names)
    return ", ".join(names[:most - 2]) + f", ... ({len(names)} levels)"


def _effect_names(f: Findings) -> dict:
    a, b = map(_nm, f.factors)
    return {"A": a, "B": b, "AB": f"{a} × {b}"}


# -- verdict -----------------------------------------------------------------------------------------

_LISTING = re.compile(r": ((?:[a-z0-9-]+ \(p [^)]*\)(?:, )?){3,})$")


def _short_reason(text: str) -> str:
    """The reason with a long method listing replaced by a pointer to the methods table."""
    m = _LISTING.search(text)
    if not m:
        return text
    n = len(re.findall(r"[a-z0-9-]+ \(p ", m.group(1)))
    return text[:m.start()] + f": {n} methods (table below)"


def _about(f: Findings) -> str:
    rec = f.judgement.claims[0]
    if rec.source == "stated" and rec.claim is not None:
        return f"the claim \u201c{rec.claim.text}\u201d about the interaction"
    if rec.present is None:
        return "the interaction test"
    return (f"the classical F's conclusion that the interaction is {'present' if rec.present else 'absent'} "
            "(no claim was stated)")


def _verdict(f: Findings) -> tuple[VerdictHead | None, tuple[ReasonItem, ...]]:
    j = f.judgement
    if j is None:
        return None, ()
    names = _effect_names(f)
    effects = []
    for e in j.verdict.effects[1:]:
        line = f"main effect of {names.get(e.effect, e.effect)}: {VERDICT_WORDS[e.verdict]}"
        if e.reasons:
            line += f" ({fmt.normalise_p(e.reasons[0].text)})"
        effects.append(line)
    head = VerdictHead(verdict=j.verdict.verdict, word=VERDICT_WORDS[j.verdict.verdict], about=_about(f),
                       tone=_VERDICT_TONE[j.verdict.verdict], exit_status=f.exit_status(), effects=tuple(effects))
    reasons = tuple(ReasonItem(text=fmt.normalise_p(r.text), ref=r.ref, weight=r.weight,
                               short=_short_reason(fmt.normalise_p(r.text)))
                    for r in j.verdict.reasons)
    return head, reasons


# -- methods -----------------------------------------------------------------------------------------

def _stat_text(m) -> str:
    return "-" if m.statistic is None else f"{m.statistic_name} {fmt.stat(m.statistic)}"


def _method_rows(f: Findings, effect: str = "AB") -> tuple[MethodRow, ...]:
    j = f.judgement
    rows = []
    for i, m in enumerate(f.methods):
        if m.effect != effect:
            continue
        t = j.trust[i] if j is not None else None
        agrees = j.agrees[i] if j is not None else None
        if t is None:
            short, reason = "-", "not judged (no verdict was formed)"
        elif t.trusted:
            short = "yes (conserv.)" if t.conservative else "yes"
            reason = t.reason
        elif t.rule == "no-p" and f.mode == "summary" and any("raw" in n for n in m.notes):
            short, reason = "not run", t.reason   # needs the raw observations: not a finding about the method
        else:
            short = "no: " + _TRUST_SHORT.get(t.rule or "", "see why")
            reason = t.reason
        rows.append(MethodRow(method=m.id, statistic=_stat_text(m), df=fmt.df_pair(m.df1, m.df2),
                              p=fmt.p_cell(m.p, m.resamples),
                              p_short=fmt.p_cell(m.p, m.resamples).split(" (B")[0], trusted=None if t is None else t.trusted,
                              trusted_short=short, trust_reason=fmt.normalise_p(reason),
                              agrees={True: "yes", False: "no", None: "-"}[agrees]))
    return tuple(rows)


def _method_notes(f: Findings, effects=("AB",)) -> tuple[str, ...]:
    ms = [m for m in f.methods if m.effect in effects]
    notes = []
    if any(m.statistic_name == "T/c" for m in ms):
        notes.append("T/c: the Welch-James statistic T (a Wald statistic weighting each cell by its own "
                     "variance) divided by Johansen's correction c, referred to F(df1, df2) with df2 "
                     "estimated from the cell variances.")
    if any(m.statistic_name not in ("F", "T/c") and m.statistic is not None for m in ms):
        names = sorted({m.statistic_name for m in ms if m.statistic_name not in ("F", "T/c")})
        notes.append(f"Other statistics: {', '.join(names)} (see each method's notes).")
    res = [m for m in ms if m.resamples]
    if res:
        B = res[0].resamples
        seed = f.provenance.get("seed")
        floor = fmt.p_text(1.0 / (B + 1), B)
        s = (f"Resampled p-values (df shown is the statistic's, the reference is resampled): B = "
             f"{fmt.count(B)} resamples per method"
             + (f", seed {seed} (repeat the run with --seed {seed})" if seed is not None else "")
             + f"; the smallest possible value is 1/(B + 1), shown as {floor}.")
        notes.append(s)
    return tuple(notes)


def _methods_table(rows: tuple[MethodRow, ...], *, with_agree: bool = True, caption: str = "") -> Table:
    cols = [Column(title="Method"), Column(title="Statistic", align="r"), Column(title="df", align="r"),
            Column(title="p", align="r"), Column(title="Trusted")]
    if with_agree:
        cols.append(Column(title="Agrees with claim"))
    body = []
    for r in rows:
        row = [r.method, r.statistic, r.df, r.p, r.trusted_short]
        if with_agree:
            row.append(r.agrees)
        body.append(tuple(row))
    tones = tuple(None if r.trusted in (True, None) else "muted" for r in rows)
    return Table(columns=tuple(cols), rows=tuple(body), caption=caption, tones=tones)


def _claim_line(f: Findings) -> str:
    j = f.judgement
    if j is None:
        return "No verdict was formed (the methods were skipped)."
    rec = j.claims[0]
    state = {True: "present", False: "absent", None: "undetermined"}[rec.present]
    if rec.source == "stated" and rec.claim is not None:
        return f"Claim judged: \u201c{rec.claim.text}\u201d, read as: the interaction is {state} at alpha {_alpha(f)}."
    return (f"Claim judged: the interaction is {state} (the classical F's decision at alpha "
            f"{_alpha(f)}; no claim was stated).")


def _alpha(f: Findings) -> str:
    s = fmt.prop(f.alpha, 4).rstrip("0")
    return s if s not in (".", "") else "0"


# -- checks ------------------------------------------------------------------------------------------

def _drop_parens(text: str) -> str:
    out, depth, i = [], 0, 0
    while i < len(text):
        c = text[i]
        if text.startswith("(s)", i) and depth == 0:
            out.append("(s)")
            i += 3
            continue
        if c == "(":
            depth += 1
        elif c == ")" and depth:
            depth -= 1
        elif depth == 0:
            out.append(c)
        i += 1
    return re.sub(r"\s+([,;:.])", r"\1", re.sub(r"\s{2,}", " ", "".join(out))).strip()


_NAME_PREFIX = re.compile(r"^([A-Z][\w-]*(?: [\w-]+)?)(?: \([^)]*(?:\([^)]*\)[^)]*)*\))?: ")


def _strip_name(text: str, id: str, name: str) -> str:
    """The sentence without its leading 'Normality: ' (the check's name is shown beside it);
    a parenthesis in the prefix ('Balance (unbalanced, ...): ') is kept as the sentence's start."""
    m = _NAME_PREFIX.match(text)
    if not (m and m.group(1).lower() in (id, name.lower(), id.replace("-", " "))):
        return text
    rest = text[m.end():]
    inner = text[len(m.group(1)):m.end() - 2].strip()
    if inner.startswith("(") and inner.endswith(")"):
        rest = inner[1:-1] + ": " + rest
    return rest[:1].upper() + rest[1:]


def _generic_headline(d, name: str) -> str:
    text = fmt.normalise_p(d.summary)
    m = _NAME_PREFIX.match(text)
    if m and m.group(1).lower() in (d.id, name.lower(), d.id.replace("-", " ")):
        text = text[m.end():]
    text = _drop_parens(text)
    text = re.split(r"; |: |\. ", text, maxsplit=1)[0]
    text = text.rstrip(" .,;:")
    return text[:1].lower() + text[1:] if text[:2] != text[:2].upper() else text


def _headline(d, name: str, f: Findings) -> str:
    v = d.values or {}
    try:
        if d.id == "homogeneity" and v.get("sd_ratio") is not None:
            s = f"largest/smallest cell SD {v['sd_ratio']:.2f}"
            if v.get("direction"):
                s += f": {v['direction']}"
            elif v.get("within_chance") is not None:
                s += ", within chance" if v["within_chance"] else ", beyond chance"
            return s
        if d.id == "influence" and v.get("available"):
            rows = v.get("flipping_rows") or []
            if rows:
                more = f" and {v['n_flipping'] - 3} more" if v.get("n_flipping", 0) > 3 else ""
                return (f"deleting row {', '.join(map(str, rows[:3]))}{more} alone flips the interaction "
                        "decision")
            return "no single deletion flips the interaction decision"
        if d.id == "fragility" and v.get("available"):
            k = v.get("deletions_to_flip")
            if k is None:
                return f"the decision did not flip within {len(v.get('rows_tried') or [])} deletions"
            if k == 1:
                return "one deletion flips the decision (the row is under influence)"
            rows = v.get("rows") or []
            shown = ", ".join(map(str, rows[:min(k, 3)])) + (", ..." if k > 3 else "")
            return f"{k} deletions flip the decision: rows {shown}"
        if d.id == "outliers" and v.get("available"):
            fl = v.get("flagged") or []
            if not fl:
                return "no observation beyond the Bonferroni cut-off"
            rows = ", ".join(str(x["row"]) for x in fl[:3]) + (" ..." if len(fl) > 3 else "")
            expl = all(x.get("explained_by_cell") for x in fl)
            return f"row {rows} beyond the cut-off" + (", but not within its cell" if expl else "")
        if d.id == "shape" and v.get("shape"):
            sh = v["shape"]
            return {"none": "no significant interaction to describe",
                    "crossover within noise": "lines cross only within noise: possibly ordinal",
                    "crossover": "crossover: the lines cross beyond noise",
                    "ordinal": "ordinal: the lines do not cross (a scale may remove it)"}.get(sh, sh)
        if d.id == "scale" and v.get("available") and d.facts is not None and v.get("raw_p") is not None:
            if getattr(d.facts, "removable", False):
                return "removable: not significant on a scale the data support"
            parts = [f"raw {fmt.p_text(v['raw_p'])}"]
            if v.get("log_p") is not None:
                parts.append(f"log {fmt.p_text(v['log_p'])}")
            if v.get("boxcox_p") is not None:
                parts.append(f"Box-Cox {fmt.p_text(v['boxcox_p'])}")
            return ", ".join(parts)
        if d.id == "independence" and not v.get("order_column") and not v.get("unit_column") \
                and "order_column" in v:
            return "not testable: no run-order or unit column given"
    except (KeyError, TypeError, ValueError):
        pass
    return _generic_headline(d, name)


def _checks(f: Findings, figs: dict) -> tuple[Check, ...]:
    out = []
    used = set()
    for d in f.diagnostics:
        name = CHECK_NAMES.get(d.id, d.id.replace("-", " ").replace("_", " ").capitalize())
        mine = []
        for key, file in figs.items():
            if _FIGURE_HOME.get(key) == d.id:
                mine.append(Figure(key=key, file=file, caption=figure_caption(key)))
                used.add(key)
        out.append(Check(id=d.id, name=name, grade=d.severity, grade_word=GRADE_WORDS.get(d.severity, d.severity),
                         headline=_headline(d, name, f), text=_strip_name(fmt.normalise_p(d.summary), d.id, name),
                         figures=tuple(mine)))
    return tuple(out)


def _grade_legend() -> str:
    return "Grades: " + "; ".join(f"{GRADE_WORDS[g]}: {GRADE_MEANING[g]}"
                                  for g in ("clear", "minor", "concern", "critical", "not-run")) + "."


# -- design and ANOVA --------------------------------------------------------------------------------

def _why_order(d, factor) -> str:
    """Why the levels come in this order: 'numeric', 'first appearance' or 'given'."""
    return (getattr(d, "level_order", None) or {}).get(factor) or "first appearance"


def _design_section(f: Findings) -> Section:
    d = f.design
    a, b = f.factors
    la, lb = d.levels[a], d.levels[b]
    lines = [f"Response: {_nm(f.response)}; N used: {fmt.count(d.n)}.",
             f"{_nm(a)}: {len(la)} levels, in this order ({_why_order(d, a)}): {', '.join(map(_nm, la))}.",
             f"{_nm(b)}: {len(lb)} levels, in this order ({_why_order(d, b)}): {', '.join(map(_nm, lb))}."]
    ratio = f", largest/smallest cell {fmt.num(d.size_ratio, 3)}" if d.size_ratio else ""
    lines.append(f"Balance: {d.balance}{ratio}; empty cells: {len(d.empty_cells) or 'none'}; "
                 f"cells with one observation: {len(d.single_cells) or 'none'}.")
    dr = d.dropped_rows
    if dr.get("total"):
        parts = [f"{_nm(c['a'])} × {_nm(c['b'])}: {c['n']}" for c in dr.get("missing_response_by_cell", [])]
        extra = []
        if dr.get("missing_factor"):
            extra.append(f"{dr['missing_factor']} with a missing factor value")
        if dr.get("missing_other"):
            extra.append(f"{dr['missing_other']} missing an order or unit value")
        lines.append(f"Rows dropped: {dr['total']} (missing response by cell: {'; '.join(parts) or 'none'}"
                     + (f"; {'; '.join(extra)}" if extra else "") + ").")
    else:
        lines.append("Rows dropped: none" + (f" ({dr['note']})" if dr.get("note") else "") + ".")
    if d.centring:
        lines.append(f"Centring: {d.centring}")
    blocks: list = [Bullets(items=tuple(lines))]
    cells = {(c["a"], c["b"]): c for c in f.cell_table()}
    rows = []
    for x in la:
        row = [_nm(x)]
        for y in lb:
            c = cells[(x, y)]
            if c["n"] == 0:
                row.append("empty")
            else:
                sd = f" ({fmt.num(c['sd'], 3)})" if c["sd"] is not None else ""
                row.append(f"n = {c['n']}: {fmt.num(c['mean'])}{sd}")
        rows.append(tuple(row))
    blocks.append(Table(columns=(Column(title=f"{_nm(a)} \\ {_nm(b)}"), *(Column(title=_nm(y), align="r") for y in lb)),
                        rows=tuple(rows), caption="Cells: n, mean (SD)"))
    if d.notes:
        blocks.append(Bullets(items=tuple(str(n) for n in d.notes)))
    return Section(id="design", title="Design", blocks=tuple(blocks))


def _ss_sentence(f: Findings) -> str:
    c = f.cells
    filled = c.m == c.J * c.K
    balanced = f.design.balance == "balanced"
    if filled and balanced:
        return ("The design is balanced, so Types I, II and III give the same test of every effect: no "
                "conclusion here depends on the SS type.")
    if filled:
        s = ("With every cell filled the interaction line is the same under Types I, II and III, so the "
             "interaction conclusion does not depend on the SS type; in this unbalanced design the main effects "
             "differ by type, and the main-effect conclusions here rest on Type III (unweighted marginal means).")
    else:
        s = ("With empty cells the interaction is tested on its estimable contrasts, the same under every type; "
             "the main-effect conclusions here rest on Type II, because the Type III hypotheses are not the "
             "usual ones when cells are empty.")
    from ..decision import decision

    flips = []
    for eff in ("A", "B"):
        ds = set()
        for t in ("I", "II", "III"):
            try:
                p = f.anova.tables[t].row(eff).p
            except (KeyError, AttributeError):
                p = None
            if p is not None:
                ds.add(decision(p, f.alpha))
        if len(ds) > 1:
            flips.append(_effect_names(f)[eff])
    if flips:
        s += f" Note: the decision at alpha {_alpha(f)} for {' and '.join(flips)} differs between the types."
    else:
        s += f" Here every type reaches the same decision at alpha {_alpha(f)} for both main effects."
    return s


_TYPE_NAMES = {"I": "Type I (sequential: A, then B, then the interaction)",
               "II": "Type II (each main effect adjusted for the other)",
               "III": "Type III (sum-to-zero contrasts, unweighted marginal means)"}


def _anova_section(f: Findings) -> Section:
    names = _effect_names(f)
    blocks: list = [Paragraph(text=_ss_sentence(f))]
    cols = (Column(title="Effect"), Column(title="SS", align="r"), Column(title="df", align="r"),
            Column(title="MS", align="r"), Column(title="F", align="r"), Column(title="p", align="r"),
            Column(title="partial eta sq. [95% CI]", align="r"), Column(title="partial omega sq.", align="r"))
    for t in ("I", "II", "III"):
        table = f.anova.tables.get(t)
        if table is None:
            continue
        rows, notes = [], []
        for r in table.rows:
            label = names.get(r.effect, "Residual" if r.effect == "residual" else r.label)
            ci = r.partial_eta_sq_ci
            eta = "-" if r.partial_eta_sq is None else (
                f"{fmt.prop(r.partial_eta_sq)} {fmt.ci(*ci)}" if ci else fmt.prop(r.partial_eta_sq))
            rows.append((label, fmt.num(r.ss), fmt.df(r.df), fmt.num(r.ms), fmt.stat(r.F),
                         fmt.p_cell(r.p), eta, fmt.prop(r.partial_omega_sq)))
            if r.note and r.effect != "residual":
                notes.append(f"{label}: {fmt.normalise_p(r.note)}")
        blocks.append(Table(columns=cols, rows=tuple(rows), caption=_TYPE_NAMES[t], notes=tuple(notes)))
    a, b = f.factors
    lb = f.design.levels[b]
    terms = {(x["a"], x["b"]): x["term"] for x in f.interaction_table()}
    rows = tuple((_nm(x), *[fmt.num(terms[(x, y)]) if (x, y) in terms else "empty" for y in lb])
                 for x in f.design.levels[a])
    blocks.append(Table(columns=(Column(title=f"{_nm(a)} \\ {_nm(b)}"), *(Column(title=_nm(y), align="r") for y in lb)),
                        rows=rows, caption="Interaction terms: each cell mean minus the additive model's "
                                           "prediction (in response units)"))
    return Section(id="anova", title="Classical ANOVA, all three SS types", blocks=tuple(blocks))


def _result_lines(f: Findings) -> Section:
    names = _effect_names(f)
    c = f.cells
    t = "III" if c.m == c.J * c.K else "II"
    lines = []
    table = f.anova.tables.get(t)
    for eff in ("AB", "A", "B"):
        try:
            r = table.row(eff)
        except (KeyError, AttributeError):
            continue
        s = f"{names[eff]}: " + fmt.test_line("F", r.df, f.anova.df_error if r.F is not None else None, r.F, r.p)
        if r.partial_eta_sq is not None:
            s += f", partial eta sq. = {fmt.prop(r.partial_eta_sq)}"
            if r.partial_eta_sq_ci:
                s += f", 95% CI {fmt.ci(*r.partial_eta_sq_ci)}"
        lines.append(s)
    blocks: list = [Paragraph(text=f"Classical F (Type {t} sums of squares; the interaction line is the same under "
                                   "every type):"), Lines(lines=tuple(lines))]
    j = f.judgement
    other = []
    for i, m in enumerate(f.methods):
        if m.effect != "AB" or m.id == "classical-f":
            continue
        if j is not None and not j.trust[i].trusted:
            continue
        other.append(f"{m.id}: " + fmt.test_line(m.statistic_name, m.df1, m.df2, m.statistic, m.p, m.resamples))
    if other:
        blocks.append(Paragraph(text=f"The interaction by the other {'trusted ' if j is not None else ''}methods:"))
        blocks.append(Lines(lines=tuple(other)))
    return Section(id="results", title="Result lines (APA style)", blocks=tuple(blocks))


def _main_effects_section(f: Findings) -> Section | None:
    names = _effect_names(f)
    rows = []
    tones = []
    for eff in ("A", "B"):
        for r in _method_rows(f, eff):
            rows.append((names[eff], r.method, r.statistic, r.df, r.p, r.trusted_short))
            tones.append(None if r.trusted in (True, None) else "muted")
    if not rows:
        return None
    cols = (Column(title="Effect"), Column(title="Method"), Column(title="Statistic", align="r"),
            Column(title="df", align="r"), Column(title="p", align="r"), Column(title="Trusted"))
    blocks = [Table(columns=cols, rows=tuple(rows), tones=tuple(tones),
                    caption="Each main effect tested by every method (T/c and resampled p as in the claim section)")]
    return Section(id="main-effects", title="Main effects by method", blocks=tuple(blocks))


def _calibration_section(f: Findings) -> Section | None:
    cal = f.calibration
    if cal is None or not getattr(cal, "rows", None):
        return None
    names = _effect_names(f)
    rows = tuple((r.method, names.get(r.effect, r.effect), fmt.prop(r.size, 3),
                  fmt.ci(*r.interval, fmt=lambda x: fmt.prop(x, 3)) if r.interval else "-", r.status)
                 for r in sorted(cal.rows, key=lambda r: (_EFFECT_ORDER.get(r.effect, 9))))
    cols = (Column(title="Method"), Column(title="Effect"), Column(title="Rejection rate", align="r"),
            Column(title="99% interval", align="r"), Column(title="Status"))
    cap = (f"How often each analytic method rejects a true null on {fmt.count(cal.replications)} simulated "
           f"datasets with no effect, shaped like these (alpha {_alpha(f)})")
    return Section(id="size-check", title="Size check on data shaped like these",
                   blocks=(Table(columns=cols, rows=rows, caption=cap,
                                 notes=tuple(str(n) for n in getattr(cal, "notes", ()))),))


def _provenance(f: Findings) -> Section:
    p = f.provenance
    lines = []
    if p.get("version"):
        libs = p.get("libraries") or {}
        lib = ", ".join(f"{k} {v}" for k, v in libs.items())
        lines.append(f"twoway-audit {p['version']}" + (f" on Python {p['python']}" if p.get("python") else "")
                     + (f" ({lib})" if lib else ""))
    src = p.get("input") or ("a table of cell summaries" if f.mode == "summary" else "a data frame")
    lines.append(f"Input: {src}" + (f", SHA-256 {p['input_sha256']}" if p.get("input_sha256") else ""))
    if p.get("timestamp"):
        lines.append(f"Run at: {p['timestamp']}")
    if p.get("resamples") is not None:
        lines.append(f"Resamples per method: {fmt.count(p['resamples'])}"
                     + (f"; seed {p['seed']}" if p.get("seed") is not None else ""))
    if p.get("calibration_replications"):
        lines.append(f"Size check: {fmt.count(p['calibration_replications'])} simulated datasets")
    if p.get("command"):
        lines.append(f"Command: {shorten(str(p['command']), 400)}")
    return Section(id="provenance", title="Provenance", blocks=(Lines(lines=tuple(lines)),))


def _claim_section(f: Findings, rows, notes, figs: dict) -> Section:
    blocks: list = [Paragraph(text=_claim_line(f))]
    if rows:
        blocks.append(_methods_table(rows, with_agree=f.judgement is not None,
                                     caption="The interaction tested by every method"))
        why = [f"{r.method}: {r.trust_reason}" for r in rows if r.trusted is False]
        if why:
            blocks.append(Paragraph(text="Why a method is not trusted here:"))
            blocks.append(Bullets(items=tuple(why)))
        if notes:
            blocks.append(Bullets(items=notes))
        mc = [f"{m.id} {fmt.ci(*m.p_interval, fmt=lambda x: fmt.prop(x, 4))}" for m in f.methods
              if m.effect == "AB" and m.p_interval]
        if mc:
            blocks.append(Paragraph(text="99% Monte Carlo (Clopper-Pearson) intervals of the resampled p-values: "
                                         + "; ".join(mc) + "."))
    else:
        blocks.append(Paragraph(text="No alternative methods were run (--no-methods)."))
    j = f.judgement
    if j is not None and j.sensitivity is not None and j.sensitivity.partial_eta_sq is not None:
        s = j.sensitivity
        txt = (f"Sensitivity: with {100 * s.power:.0f}% power at alpha {_alpha(f)} the design detects an interaction "
               f"of partial eta sq. {fmt.prop(s.partial_eta_sq)}")
        if s.rms_term is not None:
            txt += f" (an RMS interaction term of {fmt.num(s.rms_term, 3)} in response units)"
        if s.observed_partial_eta_sq is not None:
            txt += f"; observed: {fmt.prop(s.observed_partial_eta_sq)}"
        blocks.append(Paragraph(text=txt + "."))
    if j is not None and j.equivalence is not None:
        e = j.equivalence
        bound = (f"partial eta sq. {fmt.prop(e.bound_partial_eta_sq)}" if e.bound_partial_eta_sq is not None
                 else "the bound")
        res = {True: "the interaction is smaller than the bound", False: "smaller than the bound is not shown",
               None: "not decided"}[e.equivalent]
        blocks.append(Paragraph(text=f"Equivalence test against {bound}: {fmt.p_text(e.p)}: {res}"
                                     + (f" ({e.note})" if e.note else "") + "."))
    for rec in (j.claims if j is not None else ()):
        rc = rec.reconciliation
        if rc is None:
            continue
        items = tuple(f"{'ok' if c.ok else 'not reproduced'}: {fmt.normalise_p(c.message)}" for c in rc.checks)
        if items:
            blocks.append(Paragraph(text=f"Reconciliation of \u201c{rec.claim.text}\u201d with the data:"))
            blocks.append(Bullets(items=items))
    if "methods_p" in figs:
        blocks.append(Figure(key="methods_p", file=figs["methods_p"], caption=figure_caption("methods_p")))
    return Section(id="claim", title="The claim against every method", blocks=tuple(blocks))


def build_report(f: Findings, *, figures: dict | None = None, report_dir: str | None = None) -> Report:
    """The report model of an audit.

    Parameters
    ----------
    f : Findings
    figures : dict, optional
        {figure key: file name} of the figures drawn (see :func:`figures_from_files`);
        without it the report has no figures.
    report_dir : str, optional
        Where the report folder was written (named in the summary).
    """
    figs = dict(figures or {})
    src = f.provenance.get("input") or ("summary table" if f.mode == "summary" else "data frame")
    a, b = f.factors
    title = f"twoway-audit {f.provenance.get('version', '')}".strip() + \
        f": {_nm(f.response)} by {_nm(a)} × {_nm(b)} (alpha {_alpha(f)})"
    source = f"Data: {shorten(str(src), 200)} ({fmt.count(f.design.n)} observations used)"
    source_short = f"Data: {_nm(os.path.basename(str(src)))} ({fmt.count(f.design.n)} observations used)"
    head, reasons = _verdict(f)
    rows = _method_rows(f) if f.methods else ()
    notes = _method_notes(f) if f.methods else ()
    checks = _checks(f, figs)
    sections = []
    if head is not None:
        sections.append(Section(id="verdict", title="Verdict", blocks=(head, Reasons(items=reasons))))
    else:
        sections.append(Section(id="verdict", title="Verdict", blocks=(Paragraph(
            text="No verdict was formed: the alternative methods were skipped (--no-methods)."),)))
    sections.append(_claim_section(f, rows, notes, figs))
    if checks:
        sections.append(Section(id="checks", title="Assumption and design checks",
                                blocks=(Checks(items=checks, legend=_grade_legend()),)))
    sections.append(_design_section(f))
    sections.append(_anova_section(f))
    me = _main_effects_section(f)
    if me is not None:
        sections.append(me)
    sections.append(_result_lines(f))
    cal = _calibration_section(f)
    if cal is not None:
        sections.append(cal)
    placed = {fig.key for c in checks for fig in c.figures} | {"methods_p"}
    rest = [Figure(key=k, file=v, caption=figure_caption(k)) for k, v in figs.items() if k not in placed]
    if rest:
        sections.append(Section(id="more-figures", title="More figures", blocks=tuple(rest)))
    sections.append(_provenance(f))
    sections.append(Section(id="cautions", title="Cautions", blocks=(Bullets(items=tuple(f.cautions)),)))
    all_figs = []
    for s in sections:
        for blk in s.blocks:
            if isinstance(blk, Figure):
                all_figs.append(blk)
            elif isinstance(blk, Checks):
                for c in blk.items:
                    all_figs.extend(c.figures)
    d = f.design
    design_line = (f"{_nm(a)}: {_levels_shown(d.levels[a])}; {_nm(b)}: {_levels_shown(d.levels[b])} "
                   f"({d.balance}" + (f", {len(d.empty_cells)} empty cell(s)" if d.empty_cells else "") + ")")
    short = []
    ms = [m for m in f.methods if m.effect == "AB"]
    if any(m.statistic_name == "T/c" for m in ms):
        short.append("T/c: the Welch-James statistic over Johansen's c, referred to F(df1, df2).")
    res = [m for m in ms if m.resamples]
    if res:
        Bs = sorted({m.resamples for m in res})
        B = Bs[0]
        seed = f.provenance.get("seed")
        used = (f"B = {fmt.count(B)} each" if len(Bs) == 1
                else f"B = {fmt.count(Bs[0])} to {fmt.count(Bs[-1])} (each stops once its decision is settled)")
        short.append(f"Resampled p: {used}" + (f", seed {seed}" if seed is not None else "")
                     + f"; {fmt.p_cell(1.0 / (B + 1), B).split(' (B')[0]}"
                     " is the floor 1/(B + 1)" + (" at the smallest B." if len(Bs) > 1 else "."))
    if report_dir is not None:
        where = f"Full report: {os.path.join(report_dir, 'report.html')} (also .md, .txt, JSON, figures)."
    else:
        where = "Full report: --full prints it; --report DIR writes HTML, Markdown, figures."
    caution = "An audit supports judgement; independence cannot be checked from the data."
    rec = f.judgement.claims[0] if f.judgement is not None else None
    if rec is None:
        claim_short = "Interaction by method:"
    else:
        state = {True: "present", False: "absent", None: "undetermined"}[rec.present]
        claim_short = (f"Interaction by method (claim: {state}"
                       + (", the classical F's decision)" if rec.source != "stated" else ", as stated)") + ":")
    return Report(design_line=design_line, claim_short=claim_short, source_short=source_short, notes_short=tuple(short), where=where, caution_short=caution,
                  title=title, source=source, verdict=head, reasons=reasons, claim=_claim_line(f), methods=rows,
                  method_notes=notes, checks=checks, sections=tuple(sections), figures=tuple(all_figs),
                  cautions=tuple(f.cautions))
