"""The HTML and Markdown reports: self-contained, escaped, structurally sound, and readable in a
real browser.

reference: html5lib (an implementation of the WHATWG HTML parsing algorithm) in strict mode
raises on any parse error; headless Chromium (Debian's `chromium`) loads the page as a reader's
browser does. common practice: user strings in generated HTML are escaped (OWASP XSS prevention);
Markdown's special characters are backslash-escaped (CommonMark 0.31, section 2.4).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest

import audit
from audit.render.markdown import render_markdown
from audit.report import build_report
from audit.report.files import write_report_files

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FIXTURE = os.path.join(ROOT, "fixtures", "bakery_loaf_volume.csv")
ARTIFACTS = os.path.join(ROOT, "artifacts")
EVIL = "<script>alert(1)</script>"


@pytest.fixture(scope="module")
def bakery_report(tmp_path_factory):
    f = audit.check(FIXTURE, response="loaf_volume_ml", factors=("flour", "hydration"), resamples=199, seed=1,
                    calibration=200, figures=True)
    folder = tmp_path_factory.mktemp("report")
    report, names = write_report_files(f, folder)
    return folder, report, names


@pytest.fixture(scope="module")
def evil_findings():
    # invented demo data: a 2 x 2 tasting panel whose level, factor and response names are markup
    rng = np.random.default_rng(4)
    d = pd.DataFrame({"oven | *temp*": np.repeat([EVIL, "low_[x](y)"], 8), "crust & <b>": np.tile(["# a", "b|c"], 8)})
    d["score <i>"] = rng.normal(5, 1, 16)
    return audit.check(d, response="score <i>", factors=("oven | *temp*", "crust & <b>"), resamples=99, seed=2,
                       calibration=0, figures=True)


def test_html_is_one_structurally_sound_file(bakery_report):
    html5lib = pytest.importorskip("html5lib")
    folder, report, names = bakery_report
    html = (folder / "report.html").read_text(encoding="utf-8")
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(html)  # raises on any error
    imgs = doc.findall(".//img")
    assert len(imgs) == len([n for n in names if n.endswith(".svg")]) >= 6
    # self-contained: every image is a data URI, nothing else is referenced, no script
    assert all(i.get("src").startswith("data:image/svg+xml;base64,") for i in imgs)
    for el in doc.iter():
        for attr in ("src", "href", "srcset", "poster", "data"):
            v = el.get(attr)
            assert v is None or v.startswith(("data:", "#")), (el.tag, attr, v[:60])
    assert not doc.findall(".//script") and not doc.findall(".//link") and not doc.findall(".//iframe")
    assert not re.search(r"url\((?!data:)", html) and "@import" not in html
    # order: verdict, claim vs methods, checks, ..., ANOVA, result lines, provenance, cautions
    ids = [s.get("id") for s in doc.findall(".//section")]
    want = ["verdict", "claim", "checks", "anova", "results", "provenance", "cautions"]
    assert [i for i in ids if i in want] == want
    assert "@media print" in html and "@media (max-width" in html and 'name="viewport"' in html
    # severity is a word beside a colour swatch, never colour alone
    grades = doc.findall(".//span[@class='grade']")
    assert len(grades) == 10 and all("".join(g.itertext()).strip() in
                                      ("clear", "minor", "concern", "critical", "not run") for g in grades)


def test_user_strings_render_as_text(evil_findings, tmp_path):
    html5lib = pytest.importorskip("html5lib")
    report, _ = write_report_files(evil_findings, tmp_path)
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert EVIL not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(html)
    assert not doc.findall(".//script") and not doc.findall(".//b") and not doc.findall(".//i")
    assert EVIL in "".join(doc.find(".//body").itertext())  # shown literally to the reader
    md = (tmp_path / "report.md").read_text(encoding="utf-8")
    assert EVIL not in md and r"\<script\>alert(1)\</script\>" in md
    assert r"oven \| \*temp\*" in md and r"low\_\[x\](y)" in md
    # every table row keeps its column count (no user | splits a cell)
    for block in re.findall(r"((?:^\|.*\|$\n?)+)", md, flags=re.M):
        rows = block.strip().splitlines()
        counts = {len(re.findall(r"(?<!\\)\|", r)) for r in rows}
        assert len(counts) == 1, rows[:3]
    txt = (tmp_path / "report.txt").read_text(encoding="utf-8")
    assert EVIL in txt  # plain text shows the name as it is


def test_markdown_links_figures_by_relative_name(bakery_report):
    folder, report, names = bakery_report
    md = (folder / "report.md").read_text(encoding="utf-8")
    for n in names:
        if n.endswith(".svg"):
            assert f"]({n})" in md
    assert md.startswith("## twoway-audit") and "| Method | Statistic |" in md
    assert render_markdown(build_report(audit.check(FIXTURE, response="loaf_volume_ml",
                                                    factors=("flour", "hydration"), methods=False)))


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


def _run_chromium(*args, timeout=120):
    exe = _chromium()
    return subprocess.run([exe, "--headless", "--disable-gpu", "--no-sandbox", "--no-first-run",
                           "--disable-extensions", "--hide-scrollbars", "--disable-dev-shm-usage", *args],
                          capture_output=True, text=True, timeout=timeout)


_PROBE = """<script>
window.__errors = [];
window.addEventListener("error", function (e) { window.__errors.push(String(e.message || e.target && e.target.src)); }, true);
window.addEventListener("load", function () {
  var bad = 0, n = document.images.length;
  for (var i = 0; i < n; i++) { var im = document.images[i]; if (!im.complete || im.naturalWidth === 0) bad++; }
  var p = document.createElement("pre"); p.id = "probe-result";
  p.textContent = "images=" + n + " broken=" + bad + " errors=" + window.__errors.length
                  + " height=" + document.documentElement.scrollHeight;
  document.body.appendChild(p);
});
</script>"""


@pytest.mark.skipif(_chromium() is None, reason="chromium is not installed (Debian package 'chromium'; "
                                                 ".ci/run installs it)")
def test_html_opens_in_headless_chromium(bakery_report, tmp_path):
    folder, report, names = bakery_report
    page = folder / "report.html"
    n_png = len([n for n in names if n.endswith(".svg")])
    # 1. every figure decodes: a copy of the page with a probe script (the report itself has none)
    probe = tmp_path / "probe.html"
    probe.write_text(page.read_text(encoding="utf-8").replace("</head>", _PROBE + "</head>", 1), encoding="utf-8")
    heights = {}
    for width in (1280, 390):
        r = _run_chromium("--virtual-time-budget=5000", f"--window-size={width},2000", "--dump-dom", probe.as_uri())
        m = re.search(r"images=(\d+) broken=(\d+) errors=(\d+) height=(\d+)", r.stdout)
        assert m, (r.stdout[-500:], r.stderr[-2000:])
        assert (int(m.group(1)), int(m.group(2)), int(m.group(3))) == (n_png, 0, 0)
        heights[width] = min(int(m.group(4)) + 40, 30_000)  # the whole page in one screenshot
    # 2. the report itself: screenshots (desktop full page and phone width), console scanned
    os.makedirs(ARTIFACTS, exist_ok=True)
    shots = {}
    for name, size in (("report-desktop.png", f"1280,{heights[1280]}"), ("report-phone.png", f"390,{heights[390]}")):
        out = os.path.join(ARTIFACTS, name)
        if os.path.exists(out):
            os.remove(out)
        r = _run_chromium("--enable-logging=stderr", "--v=0", f"--window-size={size}", f"--screenshot={out}",
                          page.as_uri())
        assert os.path.getsize(out) > 20_000, r.stderr[-2000:]
        console = [ln for ln in r.stderr.splitlines() if "CONSOLE" in ln or "Failed to load resource" in ln
                   or "Refused to" in ln or "Uncaught" in ln]
        assert console == [], console
        shots[name] = out
    print("screenshots:", *shots.values())
