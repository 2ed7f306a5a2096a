"""`twoway-audit demo`: each bundled invented dataset gets the verdict it was built to show,
--report writes one folder per dataset, and the shipped files are the generator's output.

The datasets are invented (fixtures/make_demo.py); what each is built to show is known by
construction (see the generator's docstring and tests/test_verdict_scenarios.py).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(ROOT, "fixtures"))

import make_demo  # noqa: E402

import audit  # noqa: E402
from audit import cli, demo  # noqa: E402


RAW = [d for d in demo.DEMO_DATASETS if not d.summary]


def test_shipped_files_equal_the_generator_output():
    for ds in RAW:
        want = make_demo.csv_bytes(ds.name)
        for folder in (os.path.join(ROOT, "audit", "demo_data"), os.path.join(ROOT, "fixtures", "demo")):
            with open(os.path.join(folder, ds.file), "rb") as fh:
                assert fh.read() == want, f"{folder}/{ds.file}: rerun python fixtures/make_demo.py"
        with demo.demo_file(ds) as path:  # what the installed package reads
            with open(path, "rb") as fh:
                assert fh.read() == want


def test_catalogue_matches_the_generator():
    assert [d.name for d in RAW] == list(make_demo.DATASETS)
    for d in RAW:
        _make, response, factors = make_demo.DATASETS[d.name]
        assert (d.response, d.factors) == (response, tuple(factors))
    # together they show the four verdicts of a finished audit that reaches a decision
    assert {d.shows for d in RAW} == {"holds", "holds-with-caveats", "fragile", "does-not-hold"}
    # and the bundled manuscript table (fixtures/make_manuscript.py) shows an irreproducible reported test
    assert [d.shows for d in demo.DEMO_DATASETS if d.summary] == ["not-reproducible"]


def test_demo_command_gets_every_verdict_and_writes_reports(tmp_path):
    out = tmp_path / "reports"
    env = dict(os.environ, PYTHONPATH=ROOT)
    r = subprocess.run([sys.executable, "-m", "audit", "demo", "--report", str(out)], capture_output=True,
                       text=True, cwd=str(tmp_path), env=env, timeout=600)
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr
    text = r.stdout
    assert f"seed {demo.DEMO_SEED}" in text and f"{demo.DEMO_RESAMPLES:,} resamples" in text
    table = text[text.index("\nSummary\n"):].splitlines()
    from audit.findings import findings_schema
    import jsonschema

    schema = findings_schema()
    for ds in demo.DEMO_DATASETS:
        assert f"{ds.file}: built to show '{ds.shows}'" in text
        row = next(ln for ln in table if ln.startswith(ds.name + " "))
        assert row.split() == [ds.name, ds.shows, ds.shows, "yes"]
        folder = out / ds.name
        names = set(os.listdir(folder))
        assert {"report.txt", "findings.json"} <= names
        d = json.loads((folder / "findings.json").read_text(encoding="utf-8"))
        jsonschema.validate(d, schema)
        assert d["verdict"] == ds.shows
        assert d["provenance"]["seed"] == demo.DEMO_SEED
        assert (folder / "report.txt").read_text(encoding="utf-8").count("Verdict:") == 1
    assert text.count("Verdict:") == len(demo.DEMO_DATASETS)
    assert max(len(ln) for ln in text.splitlines() if not ln.startswith("Report: ")) <= 80
    assert r.stderr == ""


def _small_findings():
    import pandas as pd

    rows = [(a, b, 10.0 + i + 2 * k + (i * k) * 3 + 0.1 * r) for i, a in enumerate("pq") for k, b in enumerate("xy")
            for r in range(4)]
    frame = pd.DataFrame(rows, columns=["a", "b", "y"])
    return audit.check(frame, response="y", factors=("a", "b"), resamples=0, calibration=0)


def test_exit_1_when_a_dataset_misses_its_verdict(monkeypatch, capsys):
    f = _small_findings()
    ds = demo.DemoDataset(name="made_up", response="y", factors=("a", "b"), scenario="An invented check.",
                          shows="fragile" if f.verdict != "fragile" else "holds")
    monkeypatch.setattr(demo, "DEMO_DATASETS", (ds,))
    monkeypatch.setattr(demo, "run_demo", lambda **kw: iter([demo.DemoResult(dataset=ds, findings=f)]))
    assert cli.main(["demo"]) == 1
    text = capsys.readouterr().out
    assert "did not get the verdict" in text and next(ln for ln in text.splitlines() if ln.startswith("made_up ")).split()[-1] == "NO"


def test_terminal_summary_is_the_check_summary():
    # the demo prints the same summary lines as `check` (render_terminal on the report model)
    from audit.render.terminal import render_terminal
    from audit.report import build_report

    f = _small_findings()
    lines = demo.terminal_lines(f)
    assert lines == render_terminal(build_report(f)).rstrip("\n").splitlines()
    assert any(ln.startswith("Verdict:") for ln in lines)


def test_report_folder_holding_foreign_files_is_refused_before_any_audit(tmp_path, capsys):
    target = tmp_path / "reports" / demo.DEMO_DATASETS[0].name
    target.mkdir(parents=True)
    (target / "notes.docx").write_text("mine")
    assert cli.main(["demo", "--report", str(tmp_path / "reports")]) == 2
    captured = capsys.readouterr()
    assert "notes.docx" in captured.err and captured.out == ""
