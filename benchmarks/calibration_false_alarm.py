"""Simulation: how often does the size check's trust rule raise a false alarm?

For each condition, many datasets are drawn with a known truth; the size check
(audit.verdict.calibration.size_check, default R) runs on each, and we count how
often each method is flagged 'liberal' / 'conservative' under a grid of rule
multiples (the interval lower end above m x alpha; the upper end below f x alpha).
On homoscedastic data every flag of the classical F is a false alarm; on the
heteroscedastic conditions the flag rate is the rule's sensitivity.

Invented scenario: tensile strength of glued joints, adhesive (A) x curing
temperature (B).

Run from the repository root:
    python benchmarks/calibration_false_alarm.py [--datasets 400] [--replications 2000]
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from audit.design import cells_from_observations  # noqa: E402
from audit.fit import Fit  # noqa: E402
from audit.core import anova_two_way  # noqa: E402
from audit.verdict.calibration import size_check  # noqa: E402

U3 = np.array([[4, 12, 8], [16, 6, 10], [9, 14, 5]])
METHODS = ("classical-f", "welch-james", "hc3-wald", "hc4-wald")
LIB = (1.25, 1.5, 2.0)
CONS = (0.5, 0.6, 0.75)


class _Obs:
    """The two attributes of Observations the size check reads."""

    def __init__(self, cell):
        self.cell = cell


def _fit(counts, sd, rng, dist):
    J, K = counts.shape
    a = np.repeat(np.repeat(np.arange(J), K), counts.ravel())
    b = np.repeat(np.tile(np.arange(K), J), counts.ravel())
    if dist == "normal":
        e = rng.standard_normal(a.size)
    else:                                              # t(5), scaled to unit variance
        e = rng.standard_t(5, a.size) / np.sqrt(5 / 3)
    y = 30 + a - 0.5 * b + e * np.asarray(sd, dtype=float)[a, b]
    cells = cells_from_observations(y, a, b, levels_a=tuple(map(str, range(J))),
                                    levels_b=tuple(map(str, range(K))), factors=("adhesive", "temp"))
    cell = a * K + b
    return Fit(cells=cells, anova=anova_two_way(cells), alpha=0.05, obs=_Obs(cell),
               resid_full=y - cells.means.ravel()[cell])


CONDITIONS = [
    # name, counts, sd, errors, prior_df, truth
    ("balanced 3x3 n=5, equal var", np.full((3, 3), 5), np.ones((3, 3)), "normal", "auto", "null"),
    ("unbalanced 3x3 (10a), equal var", U3, np.ones((3, 3)), "normal", "auto", "null"),
    ("2x2 n=4, equal var", np.full((2, 2), 4), np.ones((2, 2)), "normal", "auto", "null"),
    ("unbalanced 3x3, equal var, t(5)", U3, np.ones((3, 3)), "t5", "auto", "null"),
    ("unbalanced 3x3, equal var, NO moderation", U3, np.ones((3, 3)), "normal", 0, "null"),
    ("unbalanced 3x3, var ~ 1/n (SD ratio 2)", U3, np.sqrt(4.0 / U3), "normal", "auto", "liberal"),
    ("unbalanced 3x3, SD ~ 1/n (ratio 4)", U3, 4.0 / U3, "normal", "auto", "liberal"),
    ("unbalanced 3x3, SD ~ n (ratio 4)", U3, U3 / 4.0, "normal", "auto", "conservative"),
]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--datasets", type=int, default=400)
    ap.add_argument("--replications", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--only", default="", help="run only conditions whose name contains this text")
    args = ap.parse_args()
    alpha = 0.05
    t0 = time.process_time()
    for ci, (name, counts, sd, dist, prior, truth) in enumerate(CONDITIONS):
        if args.only not in name:
            continue
        rng = np.random.default_rng([args.seed, ci])
        lo = {mth: [] for mth in METHODS}
        hi = {mth: [] for mth in METHODS}
        size = {mth: [] for mth in METHODS}
        for i in range(args.datasets):
            fit = _fit(counts, sd, rng, dist)
            cal = size_check(fit, alpha=alpha, replications=args.replications, seed=int(rng.integers(2**31)),
                             prior_df=prior, effects=("AB",))
            for r in cal.rows:
                lo[r.method].append(r.interval[0])
                hi[r.method].append(r.interval[1])
                size[r.method].append(r.size)
        print(f"\n{name} (truth: {truth}; {args.datasets} datasets, R = {args.replications})")
        print("  method       median size   " + "  ".join(f"lib>{m:g}a" for m in LIB) + "   "
              + "  ".join(f"cons<{f:g}a" for f in CONS))
        for mth in METHODS:
            lo_a, hi_a = np.array(lo[mth]), np.array(hi[mth])
            libs = "  ".join(f"{np.mean(lo_a > m * alpha):8.3f}" for m in LIB)
            cons = "  ".join(f"{np.mean(hi_a < f * alpha):9.3f}" for f in CONS)
            print(f"  {mth:12s} {np.median(size[mth]):8.3f}      {libs}    {cons}")
        sys.stdout.flush()
    print(f"\nCPU time {time.process_time() - t0:.1f} s")


if __name__ == "__main__":
    main()
