"""The full text report: sections in order, severity as words, cautions always shown.

common practice: severity is carried by words, not colour alone; the standing cautions
(an audit supports judgement, independence cannot be checked from data, regulatory
analyses follow their own guidelines) appear in every report.
"""

from __future__ import annotations

import os

import pandas as pd

import audit
from audit.render.text import render_text

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FIXTURE = os.path.join(ROOT, "fixtures", "bakery_loaf_volume.csv")


def test_sections_in_order_and_severity_words():
    f = audit.check(FIXTURE, response="loaf_volume_ml", factors=("flour", "hydration"), order="bake_order",
                    resamples=199, seed=3)
    text = render_text(f)
    heads = ["1 \u00b7 Verdict", "The claim against every method", "Assumption and design checks", "Design",
             "Classical ANOVA, all three SS types", "Result lines (APA style)", "Provenance", "Cautions"]
    pos = [text.index(h) for h in heads]
    assert pos == sorted(pos)
    assert "----" not in text and "CAUTIONS" not in text  # no all-caps headings with dashed underlines
    lines = text.splitlines()
    start = lines.index("3 \u00b7 Assumption and design checks")
    graded = [x for x in lines[start:start + 80]
              if x.startswith("  ") and x.split("  ")[1:] and any(
                  f"  {g}  " in x for g in ("clear", "minor", "concern", "critical", "not run"))]
    assert len(graded) == len(f.diagnostics) == 10
    flat = " ".join(text.split())
    assert "cannot be checked from the data" in flat
    assert "does not replace it" in flat
    assert "rank-transform: ranking turns main effects into interaction" in flat  # why it is not trusted
    assert "Type I (sequential" in text and "Type II (each" in text and "Type III (sum-to-zero" in text


def test_summary_mode_report_names_what_needs_raw_data():
    t = pd.DataFrame({"flour": ["w", "w", "s", "s"], "hyd": ["65", "80", "65", "80"],
                      "mean": [1450, 1640, 1420, 1580], "sd": [60, 40, 65, 40], "n": [8, 7, 9, 12]})
    text = render_text(audit.check_summary(t, factors=("flour", "hyd"), response="volume"))
    assert "summary table" in " ".join(text.split())
    flat = " ".join(text.split())
    assert "need the raw" in flat or "needs the raw" in flat
