"""Benchmark: the size check (audit.verdict.calibration.size_check) at N = 2,004 in a
4 x 3 design, against the resampling methods measured in the same run.

Invented scenario: drying time of a varnish, resin (4 levels) x coat thickness
(3 levels), unbalanced cells with unequal variances.

Target: the whole size check at the default R (2,000) within 0.5 s, well under the
resampling methods (studentized permutation and wild bootstrap, B = 9,999).

Run from the repository root:  python benchmarks/bench_calibration.py [--repeats 7]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np
import pandas as pd

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from audit.fit import fit_observations  # noqa: E402
from audit.intake import load  # noqa: E402
from audit.verdict.calibration import DEFAULT_REPLICATIONS, size_check  # noqa: E402

COUNTS = np.array([[100, 200, 150], [250, 120, 180], [160, 140, 220], [130, 170, 184]])


def make_frame(seed: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    J, K = COUNTS.shape
    a = np.repeat(np.repeat(np.arange(J), K), COUNTS.ravel())
    b = np.repeat(np.tile(np.arange(K), J), COUNTS.ravel())
    sd = (60.0 / np.sqrt(COUNTS))[a, b]
    y = 120 + 6 * a - 4 * b + sd * rng.standard_gamma(3.0, a.size) / np.sqrt(3.0)
    return pd.DataFrame({"resin": [f"resin-{i}" for i in a], "coat": [f"coat-{i}" for i in b],
                         "drying_min": y})


def best_of(fn, repeats):
    wall, cpu = [], []
    for _ in range(repeats):
        t, c = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - t)
        cpu.append(time.process_time() - c)
    return min(wall), float(np.median(wall)), min(cpu)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--resamples", type=int, default=9999)
    args = ap.parse_args()
    fit = fit_observations(load(make_frame(), response="drying_min", factors=("resin", "coat")))
    print(f"N = {fit.cells.N}, {fit.cells.J} x {fit.cells.K}, R = {DEFAULT_REPLICATIONS}")
    size_check(fit, seed=1)                                  # warm-up (imports)
    w, med, c = best_of(lambda: size_check(fit, seed=1), args.repeats)
    print(f"size check (all effects, 4 methods): best {w:.3f} s wall, median {med:.3f} s, best CPU {c:.3f} s")
    w1, med1, c1 = best_of(lambda: size_check(fit, seed=1, effects=("AB",)), args.repeats)
    print(f"size check (AB only):                best {w1:.3f} s wall, median {med1:.3f} s, best CPU {c1:.3f} s")
    from audit.methods.bootstrap import wild_bootstrap_all
    from audit.methods.permutation import studentized_permutation_all

    for name, fn in (("permutation-studentized", studentized_permutation_all), ("wild-bootstrap", wild_bootstrap_all)):
        wr, medr, cr = best_of(lambda: fn(fit, resamples=args.resamples, seed=1), 2)
        print(f"{name} (A, B, AB; B = {args.resamples}): best {wr:.3f} s wall, best CPU {cr:.3f} s "
              f"-> size check / this = {w / wr:.2f}")
    cal = size_check(fit, seed=1)
    for r in cal.rows:
        print(f"  {r.method:12s} {r.effect:2s} size {r.size:.4f} {r.status}")


if __name__ == "__main__":
    main()
