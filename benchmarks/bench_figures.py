"""Benchmark: drawing the report figures in one process, SVG against PNG, and the
figure data's cost inside the audit, measured in the same run (N = 2,004, 4 x 3,
default B = 9,999).

Invented scenario: drying time of a varnish, resin (4 levels) x coat thickness
(3 levels), unbalanced cells with unequal variances (the frame of bench_calibration.py).

What a user of ``check --report`` waits (worker processes, drawing overlapped with the
audit) is measured by bench_report.py.

Run from the repository root:  python benchmarks/bench_figures.py [--repeats 3] [--resamples 9999] [--cpu]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)
sys.path.insert(0, os.path.join(ROOT, "benchmarks"))

import audit  # noqa: E402
from audit.render.figures import write_figures  # noqa: E402
from bench_calibration import make_frame  # noqa: E402


CLOCK = time.perf_counter


def best(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t = CLOCK()
        fn()
        times.append(CLOCK() - t)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--resamples", type=int, default=9999)
    ap.add_argument("--cpu", action="store_true",
                    help="measure process CPU time instead of wall time (steadier on a busy machine)")
    args = ap.parse_args()
    global CLOCK
    if args.cpu:
        CLOCK = time.process_time
    frame = make_frame()
    kw = dict(response="drying_min", factors=("resin", "coat"), resamples=args.resamples, seed=1)
    with tempfile.TemporaryDirectory() as tmp:
        f = audit.check(frame, figures=True, **kw)
        for fmt in ("svg", "png"):
            write_figures(f.figure_data, tmp, fmt=fmt)  # warm-up (imports, font cache)
        t_svg = best(lambda: write_figures(f.figure_data, tmp, fmt="svg"), args.repeats)
        t_png = best(lambda: write_figures(f.figure_data, tmp, fmt="png"), args.repeats)
        t0 = best(lambda: audit.check(frame, **kw), args.repeats)
        t1 = best(lambda: audit.check(frame, figures=True, **kw), args.repeats)
        n_files = len(write_figures(f.figure_data, tmp))
    print(f"N = {len(frame):,}, B = {args.resamples:,}, best of {args.repeats}, "
          f"{'CPU' if args.cpu else 'wall'} time, figures drawn in this process one after another")
    print(f"check alone                       : {t0:6.2f} s")
    print(f"check + figure data               : {t1:6.2f} s  (figure data {t1 - t0:+.2f} s)")
    print(f"write_figures, {n_files} SVG              : {t_svg:6.2f} s")
    print(f"write_figures, {n_files} PNG              : {t_png:6.2f} s  (SVG / PNG = {t_svg / t_png:.2f})")
    print("the command with --report draws in worker processes while the audit runs: "
          "see bench_report.py for what a user waits")


if __name__ == "__main__":
    main()
