"""Output safety of the command line, run as a subprocess.

Every case checks that the input file's bytes and modification time are
unchanged.  Expected behaviour (exit 2 with one line for an unsafe output path,
exit 130 on SIGINT, atomic replacement, write-through to devices and FIFOs) is
common practice for command-line tools; the data are invented.
"""

from __future__ import annotations

import json
import os
import signal
import stat
import subprocess
import sys
import threading
import time

import pytest

from conftest import findings_json

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
ENV = dict(os.environ, PYTHONPATH=ROOT)
OPTS = ["--response", "y", "--factors", "grp", "trt"]
QUICK = ["--resamples", "0", "--no-methods", "--no-diagnostics"]  # output handling only: skip the slow stages

# invented demo data: a 2 x 2 design, three plants per cell
DATA = "grp,trt,y\n" + "".join(
    f"{g},{t},{v}\n" for g, t, vs in (("a", "x", (1.0, 2.5, 3.1)), ("a", "y", (2.2, 2.9, 4.0)),
                                       ("b", "x", (3.3, 4.1, 5.2)), ("b", "y", (7.1, 6.4, 8.3)))
    for v in vs)


def run(*args, cwd=None, timeout=120, **kw):
    return subprocess.run([sys.executable, "-m", "audit", *args], capture_output=True, text=True,
                          cwd=cwd or ROOT, env=ENV, timeout=timeout, **kw)


def run_patched(patch: str, *args, cwd=None):
    """The command with a few lines of set-up run first in the same process."""
    code = f"import sys\n{patch}\nfrom audit.cli import main\nsys.exit(main(sys.argv[1:]))\n"
    return subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True,
                          cwd=cwd or ROOT, env=ENV, timeout=120)


class Input:
    """An input file whose bytes and mtime are checked to be unchanged."""

    def __init__(self, path, text=DATA):
        self.path = str(path)
        with open(self.path, "w") as fh:
            fh.write(text)
        past = time.time() - 1000  # an mtime a rewrite could not reproduce
        os.utime(self.path, (past, past))
        self.bytes = open(self.path, "rb").read()
        self.mtime = os.stat(self.path).st_mtime_ns

    def unchanged(self) -> bool:
        st = os.lstat(self.path)
        return (stat.S_ISREG(st.st_mode) and open(self.path, "rb").read() == self.bytes
                and st.st_mtime_ns == self.mtime)


def one_line_error(r, *expected):
    assert r.returncode == 2, (r.returncode, r.stdout[-300:], r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr
    assert lines[0].startswith("twoway-audit: error:"), lines[0]
    for e in expected:
        assert e in lines[0], lines[0]
    assert ".tmp-" not in lines[0], lines[0]
    return lines[0]


def no_temp_files(folder) -> bool:
    return not [n for n in os.listdir(folder) if n.startswith(".tmp-")]


def snapshot(folder) -> dict:
    """Every file's bytes (findings.json without its run-specific provenance)."""
    out = {}
    for n in sorted(os.listdir(folder)):
        data = open(os.path.join(folder, n), "rb").read()
        if n == "findings.json":
            js = findings_json(data)
            data = {k: v for k, v in js.items() if k != "provenance"}, js["provenance"]["input_sha256"]
        out[n] = data
    return out


@pytest.fixture(scope="module")
def first_report(tmp_path_factory):
    """A folder with the input v.csv and a finished report folder rep/ from it."""
    base = tmp_path_factory.mktemp("first")
    Input(base / "v.csv")
    r = run("check", "v.csv", *OPTS, *QUICK, "--report", "rep", cwd=base)
    assert r.returncode == 0, r.stderr
    return base


def copy_first(first_report, tmp_path):
    import shutil

    inp = Input(tmp_path / "v.csv")
    shutil.copytree(first_report / "rep", tmp_path / "rep")
    return inp, snapshot(tmp_path / "rep")


# ---------------------------------------------------------------- outputs onto inputs


def test_json_onto_the_input_is_refused(tmp_path):
    inp = Input(tmp_path / "v.csv")
    one_line_error(run("check", "v.csv", *OPTS, *QUICK, "--json", "v.csv", cwd=tmp_path),
                   "'v.csv' is the input")
    assert inp.unchanged()


def test_json_onto_a_hard_link_or_symlink_of_the_input_is_refused(tmp_path):
    inp = Input(tmp_path / "v.csv")
    os.link(inp.path, tmp_path / "hard.json")
    os.symlink(inp.path, tmp_path / "soft.json")
    for out in ("hard.json", "soft.json"):
        one_line_error(run("check", "v.csv", *OPTS, *QUICK, "--json", out, cwd=tmp_path),
                       f"'{out}'", "input")
    assert inp.unchanged()
    assert os.path.islink(tmp_path / "soft.json")


def test_report_folder_holding_the_input_is_refused(tmp_path):
    (tmp_path / "rdir").mkdir()
    inp = Input(tmp_path / "rdir" / "report.txt")
    one_line_error(run("check", "rdir/report.txt", *OPTS, *QUICK, "--report", "rdir", cwd=tmp_path),
                   "'rdir'", "contains the input")
    assert inp.unchanged()
    assert os.listdir(tmp_path / "rdir") == ["report.txt"] and no_temp_files(tmp_path)
    # the input file itself given as the report folder
    one_line_error(run("check", "rdir/report.txt", *OPTS, *QUICK, "--report", "rdir/report.txt",
                       cwd=tmp_path), "input")
    # a folder holding a hard link to the input (under a name the report writes)
    (tmp_path / "old").mkdir()
    os.link(inp.path, tmp_path / "old" / "report.txt")
    one_line_error(run("check", "rdir/report.txt", *OPTS, *QUICK, "--report", "old", cwd=tmp_path),
                   "'old'", "hard link")
    assert inp.unchanged() and os.listdir(tmp_path / "old") == ["report.txt"]


def test_json_onto_a_report_file_is_refused(tmp_path):
    inp = Input(tmp_path / "v.csv")
    one_line_error(run("check", "v.csv", *OPTS, *QUICK, "--report", "rep", "--json", "rep/report.txt",
                       cwd=tmp_path), "'rep/report.txt'")
    assert not os.path.exists(tmp_path / "rep") and inp.unchanged()


def test_report_folder_not_ours_is_refused(tmp_path):
    inp = Input(tmp_path / "v.csv")
    (tmp_path / "notes").mkdir()
    (tmp_path / "notes" / "plan.txt").write_text("keep me")
    one_line_error(run("check", "v.csv", *OPTS, *QUICK, "--report", "notes", cwd=tmp_path),
                   "'notes'", "did not write", "'plan.txt'")
    assert (tmp_path / "notes" / "plan.txt").read_text() == "keep me"
    assert inp.unchanged()


# ---------------------------------------------------------------- symlinks, FIFOs, devices


def test_symlink_out_of_its_folder_is_refused_and_one_inside_is_followed(tmp_path):
    inp = Input(tmp_path / "v.csv")
    (tmp_path / "elsewhere").mkdir()
    target = tmp_path / "elsewhere" / "keep.json"
    target.write_text("old")
    (tmp_path / "out").mkdir()
    os.symlink(target, tmp_path / "out" / "link.json")
    one_line_error(run("check", "v.csv", *OPTS, *QUICK, "--json", "out/link.json", cwd=tmp_path),
                   "'out/link.json'", "symbolic link")
    assert target.read_text() == "old" and os.path.islink(tmp_path / "out" / "link.json")
    # a link to a file in the same folder: the file it points at is replaced, the link kept
    os.symlink("run1.json", tmp_path / "out" / "latest.json")
    r = run("check", "v.csv", *OPTS, *QUICK, "--json", "out/latest.json", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert os.path.islink(tmp_path / "out" / "latest.json")
    assert findings_json((tmp_path / "out" / "run1.json").read_text())["alpha"] == 0.05
    assert inp.unchanged() and no_temp_files(tmp_path / "out")


def test_fifo_is_written_through_to_its_reader(tmp_path):
    inp = Input(tmp_path / "v.csv")
    fifo = tmp_path / "pipe.json"
    os.mkfifo(fifo)
    got = {}

    def reader():
        with open(fifo, "rb") as fh:
            got["data"] = fh.read()

    t = threading.Thread(target=reader, daemon=True)
    t.start()
    r = run("check", "v.csv", *OPTS, *QUICK, "--json", "pipe.json", cwd=tmp_path)
    t.join(30)
    assert r.returncode == 0, r.stderr
    assert findings_json(got["data"])["factors"] == ["grp", "trt"]
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)  # still a FIFO, not replaced by a file
    assert inp.unchanged() and no_temp_files(tmp_path)


def test_json_to_dev_stdout(tmp_path):
    inp = Input(tmp_path / "v.csv")
    before = sorted(os.listdir("/dev"))
    r = run("check", "v.csv", *OPTS, *QUICK, "--json", "/dev/stdout", cwd=tmp_path)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    text, _, js = r.stdout.partition("\n{")
    assert "Verdict:" in text and "Level order:" in text  # the summary first, then the JSON
    assert findings_json("{" + js)["mode"] == "data"
    assert os.path.islink("/dev/stdout") and sorted(os.listdir("/dev")) == before
    assert inp.unchanged()


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="needs /dev/full")
def test_disk_full_names_the_path(tmp_path):
    # /dev/full answers every write with ENOSPC; it must stay a device, never be replaced
    inp = Input(tmp_path / "v.csv")
    one_line_error(run("check", "v.csv", *OPTS, *QUICK, "--json", "/dev/full", cwd=tmp_path),
                   "'/dev/full'", "no space left")
    assert stat.S_ISCHR(os.lstat("/dev/full").st_mode)
    assert inp.unchanged()


# ---------------------------------------------------------------- the report folder as one unit


def test_failed_run_leaves_the_previous_report_whole(first_report, tmp_path):
    inp, first = copy_first(first_report, tmp_path)
    assert {"report.txt", "findings.json", "cell-means.svg", ".twoway-audit-report.json"} <= set(first)
    # the second run fails after some figures are written: the disk fills up (the message names
    # the folder as typed, never the temporary file the error came from)
    patch = ("import errno, audit._io as IO\n"
             "orig, seen = IO._write_bytes_to, []\n"
             "def full(tmp, data):\n"
             "    seen.append(tmp)\n"
             "    if len(seen) == 2:\n"
             "        raise OSError(errno.ENOSPC, 'No space left on device', tmp)\n"
             "    return orig(tmp, data)\n"
             "IO._write_bytes_to = full\n")
    one_line_error(run_patched(patch, "check", "v.csv", *OPTS, *QUICK, "--alpha", "0.1",
                               "--report", "rep", cwd=tmp_path), "'rep'", "no space left")
    assert snapshot(tmp_path / "rep") == first
    assert no_temp_files(tmp_path) and inp.unchanged()


def test_sigterm_during_figure_writing_leaves_no_temp_files(first_report, tmp_path):
    inp, first = copy_first(first_report, tmp_path)
    # SIGTERM reaches the command while a figure worker draws (the workers are forked from
    # the patched process, so the drawing function below runs in a worker: it signals the command)
    patch = ("import os, signal, time, audit.render.figures as F\n"
             "CLI = os.getpid()\n"  # the command's own process (a worker may be a grandchild)
             "orig = F._sd_n\n"
             "def stop(fd, fmt='svg'):\n    os.kill(CLI, signal.SIGTERM)\n    time.sleep(2)\n"
             "    return orig(fd, fmt)\n"
             "F._sd_n = stop\n")
    r = run_patched(patch, "check", "v.csv", *OPTS, *QUICK, "--report", "rep", cwd=tmp_path)
    assert r.returncode == 143, (r.returncode, r.stderr)
    assert r.stderr.strip().splitlines() == ["twoway-audit: stopped (SIGTERM); no output file written"]
    assert snapshot(tmp_path / "rep") == first
    assert no_temp_files(tmp_path) and inp.unchanged()


def test_concurrent_runs_never_mix(tmp_path):
    # references: each input audited alone, with the same relative names as in the race below
    texts = [DATA, DATA.replace("8.3", "9.3")]
    ref = []
    for i, text in enumerate(texts):
        d = tmp_path / f"alone{i}"
        d.mkdir()
        Input(d / f"v{i}.csv", text)
        r = run("check", f"v{i}.csv", *OPTS, *QUICK, "--no-timestamp", "--report", "rep", cwd=d)
        assert r.returncode == 0, r.stderr
        ref.append(snapshot(d / "rep"))
    assert ref[0]["cell-means.svg"] != ref[1]["cell-means.svg"]
    race = tmp_path / "race"
    race.mkdir()
    inputs = [Input(race / f"v{i}.csv", text) for i, text in enumerate(texts)]
    cmd = [sys.executable, "-m", "audit", "check"]
    procs = [subprocess.Popen([*cmd, f"v{i}.csv", *OPTS, *QUICK, "--no-timestamp", "--report", "rep"], cwd=race,
                              env=ENV, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE) for i in range(2)]
    for p in procs:
        _, err = p.communicate(timeout=120)
        assert p.returncode == 0, err
    assert snapshot(race / "rep") in ref  # one run's complete set, never a mix
    assert no_temp_files(race)
    assert all(i.unchanged() for i in inputs)


# ---------------------------------------------------------------- interrupts and memory


def test_sigint_during_a_long_run(tmp_path):
    inp = Input(tmp_path / "v.csv")
    p = subprocess.Popen([sys.executable, "-m", "audit", "check", "v.csv", *OPTS, "--resamples", "200000",
                          "--seed", "1", "--json", "out.json", "--report", "rep"],
                         cwd=tmp_path, env=ENV, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(1.5)
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 130, (p.returncode, err)
    assert err.strip().splitlines() == ["twoway-audit: interrupted; no output file written"]
    assert sorted(os.listdir(tmp_path)) == ["v.csv"]
    assert inp.unchanged()


def test_memory_error_is_one_line(tmp_path):
    inp = Input(tmp_path / "v.csv")
    patch = "import audit.api as A\ndef big(*a, **k):\n    raise MemoryError()\nA.check = big\n"
    one_line_error(run_patched(patch, "check", "v.csv", *OPTS, "--resamples", "900000", cwd=tmp_path),
                   "out of memory", "--resamples 900000")
    assert inp.unchanged()


# ---------------------------------------------------------------- terminal and figure text


def test_control_characters_are_escaped_and_markup_is_literal(tmp_path):
    odd = DATA.replace("a,", "\"a\x1b[2J\nz\",").replace("b,", "$\\undefinedmacro$,").replace("grp,trt", "grp,trt\tment")
    inp = Input(tmp_path / "v.csv", odd)
    r = run("check", "v.csv", "--response", "y", "--factors", "grp", "trt\tment", "--no-methods",
            "--report", "rep", "--json", "rep/extra.json", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert r.stderr == ""  # no warnings (missing glyphs, math text) on a successful run
    assert "\x1b" not in r.stdout and "a\\x1b[2J\\nz" in r.stdout and "trt\\tment" in r.stdout
    report = (tmp_path / "rep" / "report.txt").read_text()
    assert "\x1b" not in report and "\t" not in report and "$\\undefinedmacro$" in report
    # a --json file inside the report folder is written with it and listed in its manifest
    manifest = json.loads((tmp_path / "rep" / ".twoway-audit-report.json").read_text())
    assert "extra.json" in manifest["files"] and (tmp_path / "rep" / "extra.json").read_text().startswith("{")
    assert inp.unchanged()


def test_error_with_a_newline_in_a_column_name_stays_one_line(tmp_path):
    inp = Input(tmp_path / "v.csv")
    line = one_line_error(run("check", "v.csv", "--response", "y\nz\x1b[31m", "--factors", "grp", "trt",
                              cwd=tmp_path))
    assert "\x1b" not in line
    assert inp.unchanged()
