"""The report-folder rule: ``--report DIR`` replaces DIR as a whole, so DIR must be new,
empty, or a report folder twoway-audit wrote (a valid manifest of ours).  A folder that is
not empty and has no such manifest is refused with one line (exit 2), whatever its files are
called, and the user's files keep their bytes and modification time.

Expected behaviour (refuse to replace what the tool did not write) is common practice for
command-line tools; every folder and input here is generated in the test.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MANIFEST = ".twoway-audit-report.json"

# generated inputs: a 2 x 2 design of observations, and its table of cell statistics
DATA = "grp,trt,y\n" + "".join(f"{g},{t},{v}\n" for g, t, vs in (
    ("a", "x", (1.0, 2.5, 3.1)), ("a", "y", (2.2, 2.9, 4.0)),
    ("b", "x", (3.3, 4.1, 5.2)), ("b", "y", (7.1, 6.4, 8.3))) for v in vs)
CELLS = "grp,trt,mean,sd,n\na,x,2.20,1.05,3\na,y,3.03,0.91,3\nb,x,4.20,0.95,3\nb,y,7.27,0.96,3\n"

CHECK = ["check", "v.csv", "--response", "y", "--factors", "grp", "trt", "--resamples", "0",
         "--no-methods", "--no-diagnostics"]
SUMMARY = ["check-summary", "cells.csv", "--factors", "grp", "trt", "--mean", "mean", "--sd", "sd", "--n", "n",
           "--calibration", "0"]

# folders a user may hold: (what it is, {name: bytes})
USER_FOLDERS = {
    "hand-written report.md": {"report.md": b"# My own notes on the trial\n\nDo not lose these.\n"},
    "a findings.json alone": {"findings.json": b'{"verdict": "mine"}\n'},
    "every report name, no manifest": {n: f"user's {n}\n".encode() for n in
                                       ("report.md", "report.txt", "report.html", "findings.json",
                                        "cell-means.svg")},
    "a damaged manifest": {MANIFEST: b"{not json", "report.md": b"notes\n"},
    "another tool's manifest": {MANIFEST: b'{"tool": "something-else", "files": ["report.md"]}',
                                "report.md": b"notes\n"},
    "a manifest of another format": {MANIFEST: b'{"tool": "twoway-audit", "format": 99, "files": ["report.md"]}',
                                     "report.md": b"notes\n"},
    "a manifest listing a path": {MANIFEST: b'{"tool": "twoway-audit", "files": ["../report.md"]}',
                                  "report.md": b"notes\n"},
    "a manifest with extra keys": {MANIFEST: b'{"tool": "twoway-audit", "files": [], "owner": "me"}',
                                   "report.md": b"notes\n"},
    "only a manifest-like file that is a list": {MANIFEST: b'["twoway-audit"]'},
    "a hidden file": {".keep": b""},
}


def _make_folder(path, files: dict) -> dict:
    os.makedirs(path)
    past = time.time() - 5000  # an mtime a rewrite could not reproduce
    for name, data in files.items():
        with open(os.path.join(path, name), "wb") as fh:
            fh.write(data)
        os.utime(os.path.join(path, name), (past, past))
    return _state(path)


def _state(path) -> dict:
    out = {}
    for name in sorted(os.listdir(path)):
        p = os.path.join(path, name)
        with open(p, "rb") as fh:
            out[name] = (fh.read(), os.stat(p).st_mtime_ns)
    return out


def _inputs(tmp_path):
    (tmp_path / "v.csv").write_text(DATA)
    (tmp_path / "cells.csv").write_text(CELLS)


def _main(argv, cwd, monkeypatch, capsys):
    from audit.cli import main

    monkeypatch.chdir(cwd)
    code = main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


def _one_line(err: str, folder: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    assert lines[0].startswith("twoway-audit: error: report folder ") and repr(folder) in lines[0], lines[0]
    assert "twoway-audit did not write" in lines[0] and ".tmp-" not in lines[0], lines[0]
    return lines[0]


@pytest.mark.parametrize("what", sorted(USER_FOLDERS))
@pytest.mark.parametrize("command", ["check", "check-summary", "demo"])
def test_a_users_folder_is_refused_and_left_untouched(tmp_path, monkeypatch, capsys, what, command):
    _inputs(tmp_path)
    if command == "demo":
        from audit.demo import DEMO_DATASETS

        target = os.path.join("out", DEMO_DATASETS[-1].name)  # the last one: checked before any audit runs
        argv = ["demo", "--report", "out"]
    else:
        target = "mine"
        argv = [*(CHECK if command == "check" else SUMMARY), "--report", target]
    before = _make_folder(tmp_path / target, USER_FOLDERS[what])
    code, out, err = _main(argv, tmp_path, monkeypatch, capsys)
    assert code == 2, (code, out[-300:], err)
    line = _one_line(err, target)
    if what.startswith("a hidden"):
        assert "'.keep'" in line
    assert out == ""
    assert _state(tmp_path / target) == before  # bytes and mtimes
    assert not [n for n in os.listdir(os.path.dirname(tmp_path / target)) if n.startswith(".tmp-")]


def test_json_inside_a_users_folder_does_not_open_it(tmp_path, monkeypatch, capsys):
    # --json naming a file inside the --report folder is written with the report: the folder rule holds
    _inputs(tmp_path)
    before = _make_folder(tmp_path / "mine", USER_FOLDERS["hand-written report.md"])
    code, out, err = _main([*CHECK, "--report", "mine", "--json", "mine/out.json"], tmp_path, monkeypatch, capsys)
    assert code == 2
    _one_line(err, "mine")
    assert _state(tmp_path / "mine") == before


def test_a_users_folder_is_refused_as_a_subprocess(tmp_path):
    _inputs(tmp_path)
    before = _make_folder(tmp_path / "mine", USER_FOLDERS["hand-written report.md"])
    env = dict(os.environ, PYTHONPATH=ROOT)
    r = subprocess.run([sys.executable, "-m", "audit", *CHECK, "--report", "mine"], cwd=tmp_path, env=env,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2, (r.returncode, r.stdout[-300:], r.stderr)
    line = _one_line(r.stderr, "mine")
    assert "'report.md'" in line and "no report manifest" in line
    assert r.stdout == ""
    assert _state(tmp_path / "mine") == before


# ---------------------------------------------------------------- what may be replaced (audit._io directly)


def _build(names):
    def build(tmp):
        for n in names:
            with open(os.path.join(tmp, n), "w") as fh:
                fh.write("new " + n)
        return names
    return build


def test_new_empty_and_own_folders_are_replaced(tmp_path):
    from audit._io import MANIFEST_FORMAT, read_manifest, replace_folder

    # new
    replace_folder(tmp_path / "new", _build(["report.md"]))
    assert read_manifest(tmp_path / "new") == ["report.md"]
    man = json.loads((tmp_path / "new" / MANIFEST).read_text())
    assert man == {"tool": "twoway-audit", "format": MANIFEST_FORMAT, "files": ["report.md"]}
    # empty
    (tmp_path / "empty").mkdir()
    replace_folder(tmp_path / "empty", _build(["report.txt"]))
    assert sorted(os.listdir(tmp_path / "empty")) == [MANIFEST, "report.txt"]
    # our own, replaced as a whole (a file of the earlier report not written again is gone)
    replace_folder(tmp_path / "new", _build(["report.txt"]))
    assert sorted(os.listdir(tmp_path / "new")) == [MANIFEST, "report.txt"]
    # a report written before the manifest had a format number
    old = tmp_path / "old"
    old.mkdir()
    (old / MANIFEST).write_text('{"tool": "twoway-audit", "files": ["report.md"]}')
    (old / "report.md").write_text("earlier report")
    replace_folder(old, _build(["report.txt"]))
    assert (old / "report.txt").read_text() == "new report.txt" and not (old / "report.md").exists()


def test_own_folder_with_a_users_file_or_subfolder_is_refused(tmp_path):
    from audit._io import replace_folder
    from audit.errors import OutputError

    replace_folder(tmp_path / "rep", _build(["report.md"]))
    (tmp_path / "rep" / "plan.txt").write_text("keep me")
    before = _state(tmp_path / "rep")
    with pytest.raises(OutputError, match="did not write .'plan.txt'"):
        replace_folder(tmp_path / "rep", _build(["report.md"]))
    assert _state(tmp_path / "rep") == before
    os.remove(tmp_path / "rep" / "plan.txt")
    (tmp_path / "rep" / "sub").mkdir()
    with pytest.raises(OutputError, match="'sub'"):
        replace_folder(tmp_path / "rep", _build(["report.md"]))
    # a listed name that is a link, not a file the report wrote
    os.rmdir(tmp_path / "rep" / "sub")
    os.remove(tmp_path / "rep" / "report.md")
    (tmp_path / "elsewhere.md").write_text("the user's")
    os.symlink(tmp_path / "elsewhere.md", tmp_path / "rep" / "report.md")
    with pytest.raises(OutputError, match="'report.md'"):
        replace_folder(tmp_path / "rep", _build(["report.md"]))
    assert (tmp_path / "elsewhere.md").read_text() == "the user's"


def test_build_is_never_started_for_a_refused_folder(tmp_path):
    from audit._io import replace_folder
    from audit.errors import OutputError

    before = _make_folder(tmp_path / "mine", USER_FOLDERS["a findings.json alone"])
    started = []
    with pytest.raises(OutputError):
        replace_folder(tmp_path / "mine", lambda tmp: started.append(tmp) or [],
                       known={"findings.json", "report.md"})  # known names do not make a folder ours
    assert started == [] and _state(tmp_path / "mine") == before
    assert sorted(os.listdir(tmp_path)) == ["mine"]


@pytest.mark.parametrize("json_path", ["rep", "rep/sub/f.json"])
def test_json_onto_the_report_folder_is_refused_before_anything_is_written(tmp_path, monkeypatch, capsys,
                                                                            json_path):
    # before: the report was written, then --json failed on the folder (or nested a folder in it)
    _inputs(tmp_path)
    code, out, err = _main([*CHECK, "--report", "rep", "--json", json_path], tmp_path, monkeypatch, capsys)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and f"--json {json_path!r}" in lines[0] and "--report folder 'rep'" in lines[0], lines
    assert sorted(os.listdir(tmp_path)) == ["cells.csv", "v.csv"]
