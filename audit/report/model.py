"""The report model: a neutral structure every renderer lays out.

:func:`audit.report.build.build_report` turns a :class:`~audit.findings.Findings`
into a :class:`Report`; the terminal, text, Markdown and HTML renderers read
only this structure.  Every number in it is already a formatted string (from
:mod:`audit.report.format`), every user string is kept raw (each renderer
escapes for its own medium), and nothing here decides or computes.

A report is a tuple of :class:`Section`; a section holds blocks, each one of
:class:`Paragraph`, :class:`Table`, :class:`Checks`, :class:`Figure`,
:class:`Lines`, :class:`Reasons` or :class:`Bullets`.  The parts the short
terminal summary needs are also kept as named fields of :class:`Report`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["Report", "Section", "Paragraph", "Table", "Column", "Checks", "Check", "Figure", "Lines",
           "Reasons", "ReasonItem", "Bullets", "VerdictHead", "MethodRow"]


@dataclass(frozen=True, kw_only=True)
class Paragraph:
    """One paragraph of plain text."""

    text: str
    kind: str = "paragraph"


@dataclass(frozen=True, kw_only=True)
class Column:
    """A table column: its title and alignment ('l' or 'r')."""

    title: str
    align: str = "l"


@dataclass(frozen=True, kw_only=True)
class Table:
    """A table of formatted strings.

    Attributes
    ----------
    columns : tuple of Column
    rows : tuple of tuple of str
    caption : str
        One line saying what the table shows.
    notes : tuple of str
        Sentences printed under the table (what an abbreviation means, ...).
    tones : tuple of str or None
        Optional per-row tone for renderers that can mark it ('muted' for a
        method that is not trusted); the row's words carry the same fact.
    """

    columns: tuple[Column, ...]
    rows: tuple[tuple[str, ...], ...]
    caption: str = ""
    notes: tuple[str, ...] = ()
    tones: tuple[str | None, ...] = ()
    kind: str = "table"


@dataclass(frozen=True, kw_only=True)
class Figure:
    """A figure of the report folder.

    Attributes
    ----------
    key : str
        The figure-data key ('cell_means', 'methods_p', ...).
    file : str
        File name inside the report folder.
    caption : str
        What the figure shows and how to read it.
    """

    key: str
    file: str
    caption: str
    kind: str = "figure"


@dataclass(frozen=True, kw_only=True)
class Check:
    """One graded check.

    Attributes
    ----------
    id : str
        The diagnostic id.
    name : str
        Its name for people ('Normality').
    grade : str
        One of :data:`audit.results.SEVERITIES` or :data:`audit.results.NOT_RUN`.
    grade_word : str
        The grade as shown ('clear', ..., 'not run').
    headline : str
        A short phrase for the one-line summary.
    text : str
        The full sentence (p-values in the report's one style).
    figures : tuple of Figure
    """

    id: str
    name: str
    grade: str
    grade_word: str
    headline: str
    text: str
    figures: tuple[Figure, ...] = ()


@dataclass(frozen=True, kw_only=True)
class Checks:
    """The graded checks, in the findings' order."""

    items: tuple[Check, ...]
    legend: str = ""
    kind: str = "checks"


@dataclass(frozen=True, kw_only=True)
class Lines:
    """Lines kept as they are (APA-style result lines, provenance)."""

    lines: tuple[str, ...]
    kind: str = "lines"


@dataclass(frozen=True, kw_only=True)
class Bullets:
    """A bulleted list of sentences."""

    items: tuple[str, ...]
    kind: str = "bullets"


@dataclass(frozen=True, kw_only=True)
class ReasonItem:
    """One reason of the verdict: the sentence, the finding behind it, its weight, and a
    shorter form for the terminal (the method listing replaced by a pointer to the table)."""

    text: str
    ref: str
    weight: str
    short: str


@dataclass(frozen=True, kw_only=True)
class Reasons:
    """The verdict's reasons, most important first."""

    items: tuple[ReasonItem, ...]
    kind: str = "reasons"


@dataclass(frozen=True, kw_only=True)
class VerdictHead:
    """The verdict line.

    Attributes
    ----------
    verdict : str
        The verdict code ('holds', ...).
    word : str
        The verdict for people ('holds, with caveats').
    about : str
        What was judged ('the claim "F(4, 70) = 6.6, p < .001" about the interaction').
    tone : str
        'good', 'caution' or 'bad' (for a colour beside the word, never instead of it).
    exit_status : int
    effects : tuple of str
        One line per judged main effect.
    """

    verdict: str
    word: str
    about: str
    tone: str
    exit_status: int
    effects: tuple[str, ...] = ()
    kind: str = "verdict"


@dataclass(frozen=True, kw_only=True)
class MethodRow:
    """One method's test of the interaction, formatted.

    ``p`` states B at a resampled p's floor ('< .0001 (B = 9,999)'), ``p_short`` does not (the
    table's note then states B); ``trusted_short`` is 'yes' or 'no: <a few words>' and
    ``trust_reason`` the full sentence.
    """

    method: str
    statistic: str
    df: str
    p: str
    p_short: str
    trusted: bool | None
    trusted_short: str
    trust_reason: str
    agrees: str


@dataclass(frozen=True, kw_only=True)
class Section:
    """A titled part of the report."""

    id: str
    title: str
    blocks: tuple = ()


@dataclass(frozen=True, kw_only=True)
class Report:
    """Everything a renderer shows, already formatted.

    Attributes
    ----------
    title : str
    source : str
        The data line (file, rows used); ``source_short`` names the file without its folder.
    verdict : VerdictHead or None
    reasons : tuple of ReasonItem
    claim : str
        What is judged, for the methods table's heading.
    methods : tuple of MethodRow
        The interaction's methods (the claim against every method).
    method_notes : tuple of str
        Sentences the methods table needs (what T/c is, B and the seed).
    checks : tuple of Check
    sections : tuple of Section
        The whole report in reading order.
    figures : tuple of Figure
        Every figure, in the order shown.
    cautions : tuple of str
    design_line : str
        Levels (in the order used), balance and N on one line.
    notes_short : tuple of str
        The methods table's notes in a few words each (for the terminal).
    where : str
        Where the full report is (or how to get it).
    caution_short : str
        The standing cautions in one sentence (the full ones are in ``cautions``).
    """

    title: str
    source: str
    verdict: VerdictHead | None
    reasons: tuple[ReasonItem, ...]
    claim: str
    methods: tuple[MethodRow, ...]
    method_notes: tuple[str, ...]
    checks: tuple[Check, ...]
    sections: tuple[Section, ...]
    figures: tuple[Figure, ...] = field(default=())
    cautions: tuple[str, ...] = ()
    design_line: str = ""
    notes_short: tuple[str, ...] = ()
    where: str = ""
    caution_short: str = ""
    claim_short: str = ""
    source_short: str = ""

    def section(self, id: str) -> Section:
        for s in self.sections:
            if s.id == id:
                return s
        raise KeyError(f"no section {id!r}; the sections are: {', '.join(s.id for s in self.sections)}")
