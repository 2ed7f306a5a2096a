"""Where may the size check draw a cell's mean and variance from their moment-matched
normal approximation instead of resampling every error?  A seeded study, not a timing.

    python benchmarks/study_large_cell.py                     # R = 10,000, seed 20261202
    python benchmarks/study_large_cell.py --reps 4000 --sizes 50 200

Invented scenario: a 4 x 5 design (cell sizes a multiple ``n`` of the weights
1-5, variances paired with the cell sizes so that the classical F is liberal), errors
from three shapes: normal, t(4) (heavy tails) and lognormal(0, 1) centred (strong skew,
kurtosis near 110).  For each shape and base size the size check (classical F,
Welch-James, HC3, HC4; A, B and AB) is run twice with the same seed and R: every cell
resampled exactly (``LARGE_CELL`` above every cell size) and every cell drawn from the
approximation (``LARGE_CELL`` = 2).  The two estimates are independent Monte Carlo
estimates, so their difference is judged against its standard error
sqrt(p1 (1 - p1) / R + p2 (1 - p2) / R); the script prints the largest |z| per row.
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

WEIGHTS = np.array([[1, 2, 3, 4, 5], [5, 4, 3, 2, 1], [2, 2, 3, 3, 4], [4, 1, 5, 2, 3]])


def dataset(n_base, shape, rng):
    import pandas as pd

    counts = WEIGHTS * n_base
    sd = 3.0 / np.sqrt(WEIGHTS)          # variance ~ 1 / n: the classical F is liberal
    rows = []
    for j in range(4):
        for k in range(5):
            n = int(counts[j, k])
            if shape == "normal":
                e = rng.standard_normal(n)
            elif shape == "t4":
                e = rng.standard_t(4, n) / np.sqrt(2.0)
            else:
                e = (rng.lognormal(0.0, 1.0, n) - np.exp(0.5)) / np.sqrt((np.e - 1) * np.e)
            y = 10 + j + 0.5 * k + sd[j, k] * e
            rows.append(pd.DataFrame({"kiln": f"k{j}", "glaze": f"g{k}", "hardness": y}))
    return pd.concat(rows, ignore_index=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=10_000)
    ap.add_argument("--sizes", type=int, nargs="*", default=[10, 40, 100, 200])
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--shapes", nargs="*", default=["normal", "t4", "lognormal"])
    a = ap.parse_args(argv)
    import audit.verdict.calibration as cal
    from audit.fit import fit_observations
    from audit.intake import load

    print(f"R = {a.reps}, seed {a.seed}; cell sizes = base x (1..5)")
    print("shape   base  method        effect  exact   approx  z")
    for shape in a.shapes:
        for nb in a.sizes:
            df = dataset(nb, shape, np.random.default_rng(a.seed + nb))
            fit = fit_observations(load(df, response="hardness", factors=("kiln", "glaze")))
            res = {}
            pool = cal._standardised_pool(fit)
            mom = cal._pool_moments(pool)
            cv = cal._s2_cv(fit.cells.counts.ravel(), mom)
            print(f"# {shape} base {nb}: pool kurtosis {mom[3] / mom[1] ** 2:.1f}, "
                  f"CV of s^2 {cv.min():.3f}-{cv.max():.3f}")
            for label, n0, mcv in (("exact", 10**12, 0.0), ("approx", 2, np.inf)):
                old = cal.LARGE_CELL, cal.LARGE_CELL_CV
                cal.LARGE_CELL, cal.LARGE_CELL_CV = n0, mcv
                try:
                    res[label] = cal.size_check(fit, replications=a.reps, seed=a.seed)
                finally:
                    cal.LARGE_CELL, cal.LARGE_CELL_CV = old
            for r1 in res["exact"].rows:
                r2 = res["approx"].row(r1.method, r1.effect)
                if r1.size is None or r2.size is None:
                    continue
                se = np.sqrt(r1.size * (1 - r1.size) / r1.replications + r2.size * (1 - r2.size) / r2.replications)
                z = (r2.size - r1.size) / se if se > 0 else 0.0
                print(f"{shape:<9}{nb:>4}  {r1.method:<13} {r1.effect:<6}  {r1.size:.4f}  {r2.size:.4f}  {z:+.2f}")


if __name__ == "__main__":
    main()
