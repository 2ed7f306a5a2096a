"""The figure worker processes (audit.render.workers): same bytes as drawing in
process, nothing left running after a kill, a dead worker or a dead parent.

References: POSIX process semantics (kill(pid, 0) tells whether a process exists;
common practice); the drawn bytes are compared with the in-process writer.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from audit.render.figures import write_figures  # noqa: E402
from audit.render.workers import FigureWorkers  # noqa: E402

pytestmark = pytest.mark.skipif(not hasattr(os, "fork") or (os.cpu_count() or 1) < 2,
                                reason="figure workers need fork and two cores; figures are drawn in process")
DEMO = os.path.join(ROOT, "fixtures", "demo")


@pytest.fixture(scope="module")
def figure_data():
    from audit.api import check

    # invented demo data (fixtures/make_demo.py)
    return check(os.path.join(DEMO, "reading_programme.csv"), response="score_gain", factors=("programme", "term"),
                 resamples=199, seed=3, figures=True, calibration=0).figure_data


def _exists(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie no longer runs
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().split(") ", 1)[1][0] != "Z"
    except OSError:
        return True


def _gone(pids, timeout=5.0) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if not any(_exists(p) for p in pids):
            return True
        time.sleep(0.05)
    return False


def _ready_pids(w, n=2, timeout=30.0):
    end = time.monotonic() + timeout
    while len(w._pids) < n and time.monotonic() < end:  # the first worker's pid, then each 'ready' message
        try:
            seq, pid, _, _ = w._results.get(timeout=0.2)
            if seq == "ready":
                w._pids.add(pid)
        except Exception:  # noqa: BLE001 - queue.Empty
            pass
    return set(w._pids)


def test_an_exception_kills_every_worker(figure_data):
    with pytest.raises(KeyboardInterrupt):
        with FigureWorkers("svg", workers=2) as w:
            assert w.parallel
            pids = _ready_pids(w)
            assert len(pids) == 2
            w.early(figure_data)
            raise KeyboardInterrupt
    assert _gone(pids)


def test_a_dead_worker_means_drawing_here(figure_data, tmp_path):
    serial = write_figures(figure_data, tmp_path / "serial")
    with FigureWorkers("svg", workers=2) as w:
        pids = _ready_pids(w)
        for p in pids:
            os.kill(p, signal.SIGKILL)
        assert _gone(pids)
        got = write_figures(figure_data, tmp_path / "after", workers=w)
    assert [open(p, "rb").read() for p in got] == [open(p, "rb").read() for p in serial]


def test_workers_end_when_their_parent_dies(tmp_path):
    code = ("import os, sys, time\n"
            f"sys.path.insert(0, {ROOT!r})\n"
            "from audit.render.workers import FigureWorkers\n"
            "w = FigureWorkers('svg', workers=2)\n"
            "pids = set(w._pids)\n"
            "while len(pids) < 2:\n"
            "    seq, pid, _, _ = w._results.get(timeout=30)\n"
            "    pids.add(pid) if seq == 'ready' else None\n"
            "print(' '.join(map(str, pids)), flush=True)\n"
            "os._exit(0)\n")  # no clean-up at all: as if killed
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    pids = {int(x) for x in out.stdout.split()}
    assert len(pids) == 2, out
    assert _gone(pids, timeout=5.0)


def test_warm_up_draws_every_figure(monkeypatch):
    # the bundled warm-up coordinates (fixtures/make_warmup.py, invented) hold every figure, and
    # each draws: a stale file would silently cost the workers their head start
    import json

    from audit.render import figures as F
    from audit.render.workers import _warm_up

    path = os.path.join(ROOT, "audit", "render", "warmup_figures.json")
    with open(path, encoding="utf-8") as fh:
        fd = json.load(fh)
    assert F.figure_keys(fd) == list(F.FIGURE_STEMS)
    drawn = []
    real = F.draw_figure

    def spy(key, data, fmt="svg"):
        out = real(key, data, fmt)
        drawn.append((key, out is not None and len(out) > 1000))
        return out

    monkeypatch.setattr(F, "draw_figure", spy)
    _warm_up("svg")
    assert drawn == [(k, True) for k in F.FIGURE_STEMS]
