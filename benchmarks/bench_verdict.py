"""Benchmark: the whole audit with the verdict's size check against the same audit
with ``calibration=0``, measured in the same run (N = 2,004, 4 x 3, B = 9,999).

Invented scenario: drying time of a varnish, resin (4 levels) x coat thickness
(3 levels), unbalanced cells with unequal variances (the frame of bench_calibration.py).

Target: with the size check, within 1.5 times the audit without it.

Run from the repository root:  python benchmarks/bench_verdict.py [--repeats 3] [--resamples 9999]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)
sys.path.insert(0, os.path.join(ROOT, "benchmarks"))

import audit  # noqa: E402
from bench_calibration import make_frame  # noqa: E402


def best(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--resamples", type=int, default=9999)
    args = ap.parse_args()
    frame = make_frame()
    kw = dict(response="drying_min", factors=("resin", "coat"), resamples=args.resamples, seed=1)
    audit.check(frame, calibration=0, **kw)  # warm-up (imports)
    t0 = best(lambda: audit.check(frame, calibration=0, **kw), args.repeats)
    t1 = best(lambda: audit.check(frame, **kw), args.repeats)
    print(f"N = {len(frame):,}, B = {args.resamples:,}, best of {args.repeats}")
    print(f"audit with --calibration 0 : {t0:6.2f} s")
    print(f"audit with the size check   : {t1:6.2f} s")
    print(f"ratio                       : {t1 / t0:6.2f}  (target <= 1.5)")


if __name__ == "__main__":
    main()
