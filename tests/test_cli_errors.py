"""Every bad input gets one line on stderr, exit status 2 and no traceback.

source: issue acceptance list; the expected behaviour is common practice for
command-line tools (exit 2 for usage/input errors).
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from conftest import findings_json

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def run(*args, cwd=None):
    env = dict(os.environ, PYTHONPATH=ROOT)
    return subprocess.run([sys.executable, "-m", "audit", *args], capture_output=True, text=True,
                          cwd=cwd or ROOT, env=env, timeout=120)


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return str(p)


GOOD = "grp,trt,y\n" + "".join(f"{g},{t},{v}\n" for g in "ab" for t in "xy" for v in (1, 2.5, 3))

CASES = {
    "missing file": (lambda t: ["check", str(t / "nope.csv"), "--response", "y", "--factors", "grp", "trt"],
                     "not found"),
    "unreadable format": (lambda t: ["check", write(t, "d.json", "{}"), "--response", "y", "--factors", "grp", "trt"],
                          "unsupported file type"),
    "missing column": (lambda t: ["check", write(t, "d.csv", GOOD), "--response", "yield", "--factors", "grp", "trt"],
                       "the columns are: grp, trt, y"),
    "non-numeric response": (lambda t: ["check", write(t, "d.csv", GOOD.replace("2.5", "two")), "--response", "y",
                                        "--factors", "grp", "trt"], "'two' on line"),
    "infinite response": (lambda t: ["check", write(t, "d.csv", GOOD.replace("2.5", "inf")), "--response", "y",
                                     "--factors", "grp", "trt"], "infinite"),
    "one level": (lambda t: ["check", write(t, "d.csv", GOOD.replace(",y,", ",x,").replace("a,", "b,")),
                             "--response", "y", "--factors", "grp", "trt"], "at least 2"),
    "same factor twice": (lambda t: ["check", write(t, "d.csv", GOOD), "--response", "y", "--factors", "grp", "grp"],
                          "same column"),
    "constant response": (lambda t: ["check", write(t, "d.csv", "grp,trt,y\n" + "a,x,1\nb,y,1\na,y,1\nb,x,1\n" * 2),
                                     "--response", "y", "--factors", "grp", "trt"], "constant"),
    "level with one observation": (lambda t: ["check", write(t, "d.csv", GOOD + "c,x,4\n"), "--response", "y",
                                              "--factors", "grp", "trt"], "fewer than two observations"),
    "bad alpha": (lambda t: ["check", write(t, "d.csv", GOOD), "--response", "y", "--factors", "grp", "trt",
                             "--alpha", "5"], "alpha"),
    "missing option": (lambda t: ["check", write(t, "d.csv", GOOD), "--factors", "grp", "trt"], "--response"),
    "empty file": (lambda t: ["check", write(t, "d.csv", ""), "--response", "y", "--factors", "grp", "trt"],
                   "empty"),
    "response is a factor": (lambda t: ["check", write(t, "d.csv", GOOD), "--response", "grp", "--factors",
                                        "grp", "trt"], "also named as a factor"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_input_one_line_exit_2(case, tmp_path):
    # source: issue 2 acceptance ("exit code 2, one-line message, no traceback")
    make, expected = CASES[case]
    r = run(*make(tmp_path))
    assert r.returncode == 2, (r.returncode, r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert "Traceback" not in r.stderr
    assert lines[0].startswith("twoway-audit: error:")
    assert expected in lines[0], lines[0]


def test_good_input_exit_0_and_json(tmp_path):
    # common practice: a clean run exits 0; JSON on stdout is parseable
    r = run("check", os.path.join(ROOT, "fixtures", "bakery_loaf_volume.csv"), "--response", "loaf_volume_ml",
            "--factors", "flour", "hydration", "--json", "-")
    assert r.returncode == 0, r.stderr
    d = findings_json(r.stdout)
    assert set(d) >= {"design", "anova", "provenance", "diagnostics", "methods"}
    assert set(d["anova"]) == {"I", "II", "III"}
    assert [row["effect"] for row in d["anova"]["II"]] == ["A", "B", "AB", "residual"]
    assert d["design"]["dropped_rows"]["total"] == 3
    assert len(d["provenance"]["input_sha256"]) == 64


def test_report_folder_written_and_input_unchanged(tmp_path):
    # common practice: outputs written, input file never modified
    import hashlib

    src = os.path.join(ROOT, "fixtures", "bakery_loaf_volume.csv")
    before = hashlib.sha256(open(src, "rb").read()).hexdigest()
    out = tmp_path / "rep"
    r = run("check", src, "--response", "loaf_volume_ml", "--factors", "flour", "hydration",
            "--report", str(out), "--json", str(tmp_path / "f.json"))
    assert r.returncode == 0, r.stderr
    assert (out / "report.txt").exists() and (out / "findings.json").exists()
    assert (tmp_path / "f.json").exists()
    assert hashlib.sha256(open(src, "rb").read()).hexdigest() == before


def test_outputs_get_ordinary_file_permissions(tmp_path):
    # common practice: a written report is readable like any new file (0666 less the umask)
    import stat

    out = tmp_path / "f.json"
    r = run("check", os.path.join(ROOT, "fixtures", "bakery_loaf_volume.csv"), "--response", "loaf_volume_ml",
            "--factors", "flour", "hydration", "--no-methods", "--json", str(out))
    assert r.returncode == 0, r.stderr
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(os.stat(out).st_mode) == 0o666 & ~mask
