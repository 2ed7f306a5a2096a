"""Write the report files of an audit into a folder (the CLI's ``--report`` builds on it).

The folder is a temporary one inside the CLI's replace-as-one-unit machinery;
this module only writes the files: the figures (by the figure writer), then
``report.txt``, ``report.md`` and ``report.html`` (figures embedded).
"""

from __future__ import annotations

import os

__all__ = ["REPORT_FILES", "write_report_files", "html_with_figures"]

#: the report files besides the figures and the findings JSON
REPORT_FILES = {"text": "report.txt", "markdown": "report.md", "html": "report.html"}


def _write(path: str, text: str) -> None:
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)


def write_report_files(findings, folder, *, report_dir: str | None = None, figures: bool = True,
                       figure_format: str = "svg", workers=None):
    """Write the figures and the three report files into ``folder``.

    Parameters
    ----------
    findings : Findings
    folder : path
        An existing, writable folder (the CLI passes its temporary folder).
    report_dir : str, optional
        The folder's final name, for the terminal summary's pointer.
    figures : bool
        Draw the figures (needs ``findings.figure_data``).
    figure_format : {"svg", "png"}
    workers : FigureWorkers, optional
        Worker processes for the figures (:mod:`audit.render.workers`).

    Returns
    -------
    report : Report
        The report model (the terminal summary is laid out from it).
    names : list of str
        The file names written, figures included.
    """
    from ..render.html import html_template, read_images, render_html
    from ..render.markdown import render_markdown
    from ..render.text import render_report_text
    from .build import build_report, figures_from_files

    folder = os.fspath(folder)
    expected: list[str] = []
    if figures and findings.figure_data:
        from ..render.figures import check_figure_format, figure_file, figure_keys

        fmt = check_figure_format(figure_format)
        expected = [figure_file(k, fmt) for k in figure_keys(findings.figure_data)]
        if workers is not None:
            workers.early(findings.figure_data)  # every figure under way before the text is laid out

    def lay_out(names):
        report = build_report(findings, figures=figures_from_files(names), report_dir=report_dir)
        return report, render_report_text(report), render_markdown(report)

    # the text reports are laid out, and the HTML template compiled, while the workers draw
    # (the figure names are known in advance)
    report, text, markdown = lay_out(expected)
    html_template()
    drawn = []
    if expected:
        from ..render.figures import write_figures

        drawn = [os.path.basename(p) for p in write_figures(findings.figure_data, folder, fmt=figure_format,
                                                             workers=workers, shown=report_dir)]
        if drawn != expected:  # a figure had nothing to show after all
            report, text, markdown = lay_out(drawn)
    _write(os.path.join(folder, REPORT_FILES["text"]), text)
    _write(os.path.join(folder, REPORT_FILES["markdown"]), markdown)
    _write(os.path.join(folder, REPORT_FILES["html"]), render_html(report, read_images(report, folder)))
    return report, [*REPORT_FILES.values(), *drawn]


def html_with_figures(findings) -> str:
    """The self-contained HTML report; figures drawn into a temporary folder when the
    findings carry figure data."""
    import tempfile

    from ..render.html import read_images, render_html
    from .build import build_report, figures_from_files

    if not findings.figure_data:
        return render_html(build_report(findings))
    from ..render.figures import write_figures

    with tempfile.TemporaryDirectory(prefix="twoway-audit-") as tmp:
        drawn = [os.path.basename(p) for p in write_figures(findings.figure_data, tmp)]
        report = build_report(findings, figures=figures_from_files(drawn))
        return render_html(report, read_images(report, tmp))
