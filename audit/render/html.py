"""The self-contained HTML report (``report.html``).

Lays out the report model (:mod:`audit.report.model`) with a jinja2 template
(``templates/report.html.j2``) whose autoescaping is on: every column, level and
file name is user input and renders as text (a level named
``<script>alert(1)</script>`` shows those characters).  Control characters in
strings are shown escaped (``\\x1b``) before the HTML escaping.

One file: the figures are embedded as base64 ``data:`` URIs of the SVG (or PNG)
files the figure writer produced, shown through ``<img>`` (where an SVG can never run
a script); no script, font or style is loaded from anywhere, so the page reads offline, on a phone (responsive CSS) and in print (``@media print``).
Severity is a word with a colour swatch beside it, never colour alone.
"""

from __future__ import annotations

import base64
import os

from .text import sanitize

__all__ = ["render_html", "read_images", "html_template"]

_ENV = None


def _env():
    global _ENV
    if _ENV is None:
        import jinja2
        import markupsafe

        _ENV = jinja2.Environment(
            loader=jinja2.PackageLoader("audit.render", "templates"),
            autoescape=True,  # every template, whatever its name: user strings are never markup
            undefined=jinja2.StrictUndefined,
            finalize=lambda x: x if isinstance(x, markupsafe.Markup) or not isinstance(x, str) else sanitize(x),
            trim_blocks=True, lstrip_blocks=True,
        )
    return _ENV


def read_images(report, folder) -> dict:
    """{figure key: ``data:`` URI} of the report's figures found in ``folder``
    (SVG or PNG, by the file's extension)."""
    from .figures import figure_mime

    out = {}
    for fig in report.figures:
        path = os.path.join(os.fspath(folder), fig.file)
        if os.path.isfile(path):
            with open(path, "rb") as fh:
                out[fig.key] = f"data:{figure_mime(fig.file)};base64," + base64.b64encode(fh.read()).decode("ascii")
    return out


def render_html(report, images: dict | None = None) -> str:
    """The HTML report of a report model.

    Parameters
    ----------
    report : Report
    images : dict, optional
        {figure key: ``data:`` URI of the figure} (see :func:`read_images`); a figure
        without one is shown by its caption only.
    """
    return html_template().render(report=report, images=images or {})


def html_template():
    """The compiled report template (jinja2 caches it; the report writer asks for it early,
    while the figures are drawn)."""
    return _env().get_template("report.html.j2")
