"""Benchmark: peak memory and time of the full ``audit.check`` on a 30 x 30 design
(2,700 rows, n = 3 per cell) with every method at B = 9,999.

Invented scenario: a seed-bank germination trial, germination time (days) by
storage lot (30) x priming recipe (30), three trays per combination, with
unequal spread across lots.

The check runs in a child process; the parent reads the child's peak resident
set size (``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss``) and wall time.
The reference measured in the same run is the child's import-only peak (the
interpreter plus numpy/scipy/pandas/matplotlib), so the ratio shows what the
computation itself adds.  Target: peak RSS under 1 GB.

Run from the repository root:

    python benchmarks/bench_memory.py                 # B = 9,999
    python benchmarks/bench_memory.py --resamples 999
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

CHILD = r"""
import sys, time
import numpy as np, pandas as pd
import audit
from audit.api import check
if sys.argv[1] == "imports":
    raise SystemExit(0)
J = K = 30
n = 3
rng = np.random.default_rng(30)
a = np.repeat(np.arange(J), K * n)
b = np.tile(np.repeat(np.arange(K), n), J)
y = 6.0 + 0.05 * a + 0.08 * b + 0.4 * ((a + b) % 7 == 0) + rng.normal(size=a.size) * (0.5 + 0.05 * a)
frame = pd.DataFrame({"days": y, "lot": [f"lot-{i:02d}" for i in a], "recipe": [f"prime-{k:02d}" for k in b]})
t0 = time.perf_counter()
f = check(frame, response="days", factors=("lot", "recipe"), resamples=int(sys.argv[2]), seed=1)
print(f"{time.perf_counter() - t0:.1f}")
"""


def run_child(*args: str) -> tuple[float, float, str]:
    """(peak RSS in MB, wall seconds, stdout) of one child process."""
    env = dict(os.environ, PYTHONPATH=ROOT, MPLBACKEND="Agg")
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        out = subprocess.run([sys.executable, "-c", CHILD, *args], env=env, cwd=tmp, check=True,
                             capture_output=True, text=True)
    wall = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if peak <= before:  # ru_maxrss of children is a running maximum over all of them
        print("note: this child's peak did not exceed an earlier child's; run the steps separately")
    return peak / 1024.0, wall, out.stdout.strip()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--resamples", type=int, default=9999)
    args = ap.parse_args()
    base, t_base, _ = run_child("imports")
    peak, wall, inner = run_child("check", str(args.resamples))
    print(f"30 x 30 design, 2,700 rows, every method, B = {args.resamples}")
    print(f"  imports only (reference):  peak RSS {base:8.0f} MB, {t_base:.1f} s")
    print(f"  full check:                peak RSS {peak:8.0f} MB ({peak / base:.1f} x the imports), "
          f"{wall:.1f} s wall ({inner} s inside check)")
    print(f"  target: under 1,024 MB -> {'PASS' if peak < 1024 else 'FAIL'}")


if __name__ == "__main__":
    main()
