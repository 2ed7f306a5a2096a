"""Benchmark: the audit with its report figures (plot data + every PNG) against the same
audit without them, measured in the same run (N = 2,004, 4 x 3, default B = 9,999).

Invented scenario: drying time of a varnish, resin (4 levels) x coat thickness
(3 levels), unbalanced cells with unequal variances (the frame of bench_calibration.py).

Target: the figures add under 1 s (and ``check --report`` stays within 1.3 times ``check``).

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
        def with_figures():
            f = audit.check(frame, figures=True, **kw)
            return write_figures(f.figure_data, tmp)

        with_figures()  # warm-up (imports, font cache)
        f = audit.check(frame, figures=True, **kw)
        t_draw = best(lambda: write_figures(f.figure_data, tmp), args.repeats)
        t0 = best(lambda: audit.check(frame, **kw), args.repeats)
        t1 = best(with_figures, args.repeats)
        n_files = len(write_figures(f.figure_data, tmp))
    print(f"N = {len(frame):,}, B = {args.resamples:,}, best of {args.repeats}, "
          f"{'CPU' if args.cpu else 'wall'} time")
    print(f"check alone                          : {t0:6.2f} s")
    print(f"check + figure_data + write_figures  : {t1:6.2f} s  ({n_files} PNG files)")
    print(f"added by the figures                 : {t1 - t0:6.2f} s  (target < 1 s)")
    print(f"write_figures alone                  : {t_draw:6.2f} s")
    print(f"ratio                                : {t1 / t0:6.2f}  (target <= 1.3)")


if __name__ == "__main__":
    main()
