"""Options are checked once, at the edge, before any data is read.

The ranges are this project's own rules (common practice: reject a bad value
with a message naming the option); the data are invented.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from audit import api, fit
from audit.errors import DataFileError, OptionError
from audit.options import MAX_RESAMPLES, check_alpha, check_resamples, check_seed

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DATA = "grp,trt,y\n" + "".join(f"{g},{t},{v}\n" for g in "ab" for t in "xy" for v in (1, 2.5, 3.25))


def test_check_alpha():
    assert check_alpha(0.05) == 0.05 and check_alpha("0.1") == 0.1
    for bad in (0, 1, -0.1, 5, "x", None, True, float("nan")):
        with pytest.raises(OptionError, match="alpha"):
            check_alpha(bad)
    assert fit.check_alpha is check_alpha  # kept importable from its old place


def test_check_resamples():
    assert check_resamples(0) == 0 and check_resamples(np.int64(99)) == 99
    assert check_resamples(MAX_RESAMPLES) == MAX_RESAMPLES == 1_000_000
    for bad in (-1, MAX_RESAMPLES + 1, 10**9, 99.0, 99.5, "99", None, True):
        with pytest.raises(OptionError, match="resamples"):
            check_resamples(bad)


def test_check_seed():
    assert check_seed(None) is None and check_seed(0) == 0 and check_seed(np.uint32(7)) == 7
    assert check_seed(2**63 - 1) == 2**63 - 1
    for bad in (-5, 2**63, 1.0, "3", True, np.random.default_rng(1)):
        with pytest.raises(OptionError, match="seed"):
            check_seed(bad)


@pytest.mark.parametrize("kw", [dict(resamples=-1), dict(resamples=-1, methods=False), dict(seed=-5, resamples=0),
                                dict(resamples=MAX_RESAMPLES + 1, methods=False), dict(alpha=2)])
def test_api_checks_options_before_reading_data(kw):
    # a missing file would give DataFileError if the data were read first
    with pytest.raises(OptionError):
        api.check("/nonexistent/data.csv", response="y", factors=("grp", "trt"), **kw)
    with pytest.raises(DataFileError):
        api.check("/nonexistent/data.csv", response="y", factors=("grp", "trt"), resamples=0, seed=3)


def test_check_summary_checks_alpha_first():
    with pytest.raises(OptionError, match="alpha"):
        api.check_summary(None, factors=("a", "b"), alpha=0)


def run(*args, cwd):
    return subprocess.run([sys.executable, "-m", "audit", *args], capture_output=True, text=True, cwd=cwd,
                          env=dict(os.environ, PYTHONPATH=ROOT), timeout=120)


@pytest.mark.parametrize("extra,word", [
    (["--resamples", "-1", "--no-methods"], "resamples"),
    (["--seed", "-5", "--resamples", "0"], "seed"),
    (["--resamples", "1000001"], "1,000,000"),
    (["--resamples", "1e9"], "--resamples"),
])
def test_cli_refuses_bad_options_with_one_line(tmp_path, extra, word):
    p = tmp_path / "v.csv"
    p.write_text(DATA)
    before = (p.read_bytes(), p.stat().st_mtime_ns)
    r = run("check", "v.csv", "--response", "y", "--factors", "grp", "trt", *extra, cwd=tmp_path)
    assert r.returncode == 2, (r.returncode, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("twoway-audit: error:") and word in lines[0], r.stderr
    assert r.stdout == ""  # refused before anything was computed or printed
    assert (p.read_bytes(), p.stat().st_mtime_ns) == before


def test_help_states_the_maximum(tmp_path):
    r = run("check", "--help", cwd=tmp_path)
    assert r.returncode == 0 and "1,000,000" in r.stdout
