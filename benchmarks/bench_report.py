"""Benchmark: ``twoway-audit check`` with and without ``--report`` as a user runs it
(a fresh process each time, so imports, the figure workers' start and every file
written count), measured alternately in the same run.

Invented scenario: drying time of a varnish, resin (4 levels) x coat thickness
(3 levels), N = 2,004, unbalanced cells with unequal variances (the frame of
bench_calibration.py); default options (B = 9,999 maximum, sequential stopping).

Targets (issues on reports and speed): ``check --report`` within 1.3 times ``check``,
and at most 1 s added.

Run from the repository root:  python benchmarks/bench_report.py [--repeats 7] [--figure-format svg|png]
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(ROOT, "benchmarks"))


def _run(cmd, cwd) -> tuple[float, float]:
    """Wall and CPU seconds (the child and its children) of one command."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    subprocess.run(cmd, cwd=cwd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                   env=dict(os.environ, PYTHONPATH=ROOT))
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--figure-format", default="svg", choices=("svg", "png"))
    args = ap.parse_args()
    from bench_calibration import make_frame

    with tempfile.TemporaryDirectory() as tmp:
        data = os.path.join(tmp, "varnish.csv")
        make_frame().to_csv(data, index=False)
        base = [sys.executable, "-m", "audit", "check", data, "--response", "drying_min", "--factors", "resin", "coat"]
        plain, report = [], []
        _run(base, tmp)  # warm-up: file cache, font cache
        for i in range(args.repeats):
            plain.append(_run(base, tmp))
            out = os.path.join(tmp, "rep")
            shutil.rmtree(out, ignore_errors=True)
            report.append(_run([*base, "--report", out, "--figure-format", args.figure_format], tmp))
        n_fig = len([n for n in os.listdir(out) if n.endswith("." + args.figure_format)])
    w0 = statistics.median(w for w, _ in plain)
    w1 = statistics.median(w for w, _ in report)
    c0 = statistics.median(c for _, c in plain)
    c1 = statistics.median(c for _, c in report)
    print(f"N = 2,004, default resamples, {args.repeats} alternating runs each, medians; "
          f"{os.cpu_count()} CPUs; {n_fig} {args.figure_format.upper()} figures")
    print(f"check               : wall {w0:5.2f} s   CPU {c0:5.2f} s")
    print(f"check --report DIR  : wall {w1:5.2f} s   CPU {c1:5.2f} s")
    print(f"added by --report   : wall {w1 - w0:5.2f} s   CPU {c1 - c0:5.2f} s   (target: wall <= 1 s)")
    print(f"ratio               : wall {w1 / w0:5.2f}     CPU {c1 / c0:5.2f}     (target: wall <= 1.3)")


if __name__ == "__main__":
    main()
