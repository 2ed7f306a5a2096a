"""Benchmark: every diagnostic of issue 3 at N = 2,000 and N = 100,000 (4 x 3 cells).

Invented scenario: a bakery trial, loaf volume (ml) by flour type (4 levels) x proofing
time (3 levels), unbalanced cells, with a run-order column and a unit (batch) column.

Targets (issue 3): all diagnostics together under 1 s at N = 2,000 and under 10 s at
N = 100,000 (fragility capped at its documented number of greedy steps).  References
measured in the same run: statsmodels ols + anova_lm(typ=2) on the same data (one
classical fit), and, for the leave-one-out p-values, a statsmodels refit loop timed on a
subset of rows and extrapolated to all N rows.  Peak Python memory of the diagnostics
(tracemalloc) is printed too.

Run from the repository root:  python benchmarks/bench_diagnostics.py [--refits 100]
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import time
import tracemalloc

import numpy as np
import pandas as pd

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from audit.fit import fit_observations  # noqa: E402
from audit.intake import load  # noqa: E402

FLOURS = ["wholemeal", "spelt", "rye-blend", "strong-white"]
PROOFS = ["45min", "90min", "overnight"]

DIAGNOSTICS = [
    ("audit.diagnostics.assumptions", "normality"),
    ("audit.diagnostics.assumptions", "homogeneity"),
    ("audit.diagnostics.design_checks", "balance"),
    ("audit.diagnostics.design_checks", "missingness"),
    ("audit.diagnostics.design_checks", "independence"),
    ("audit.diagnostics.influence", "outliers"),
    ("audit.diagnostics.influence", "influence"),
    ("audit.diagnostics.influence", "fragility"),
    ("audit.diagnostics.scale", "shape"),
    ("audit.diagnostics.scale", "scale"),
]


def make_frame(n: int, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    J, K = len(FLOURS), len(PROOFS)
    w = rng.uniform(0.5, 1.5, size=J * K)
    cell = rng.choice(J * K, size=n, p=w / w.sum())
    a, b = cell // K, cell % K
    mu = 900 + 40 * a - 25 * b + 10 * ((a + b) % 2)
    y = mu * np.exp(rng.normal(0, 0.05, n))
    y[rng.random(n) < 0.01] = np.nan  # some loaves not measured
    return pd.DataFrame({
        "flour": np.array(FLOURS)[a], "proof": np.array(PROOFS)[b], "volume_ml": y,
        "run": rng.permutation(n), "batch": np.arange(n) // 2 if n < 5000 else np.arange(n),
    })


def load_functions():
    found, missing = [], []
    for mod, name in DIAGNOSTICS:
        try:
            found.append((name, getattr(importlib.import_module(mod), name)))
        except (ImportError, AttributeError):
            missing.append(f"{mod}.{name}")
    return found, missing


def time_all(fit, funcs, repeats: int) -> dict:
    best = {}
    for name, fn in funcs:
        ts = []
        for _ in range(repeats):
            t = time.perf_counter()
            fn(fit)
            ts.append(time.perf_counter() - t)
        best[name] = min(ts)
    return best


def statsmodels_fit(frame) -> float:
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    f = frame.dropna(subset=["volume_ml"])
    t = time.perf_counter()
    sm.stats.anova_lm(smf.ols("volume_ml ~ C(flour) * C(proof)", data=f).fit(), typ=2)
    return time.perf_counter() - t


def refit_loop(frame, n_refits: int) -> float:
    """Seconds per statsmodels refit with one row left out (interaction p, Type II)."""
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    f = frame.dropna(subset=["volume_ml"]).reset_index(drop=True)
    t = time.perf_counter()
    for i in range(n_refits):
        sm.stats.anova_lm(smf.ols("volume_ml ~ C(flour) * C(proof)", data=f.drop(index=i)).fit(), typ=2)
    return (time.perf_counter() - t) / n_refits


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--refits", type=int, default=100, help="statsmodels refits timed for the LOO reference")
    args = ap.parse_args()
    funcs, missing = load_functions()
    if missing:
        print("not yet available (skipped):", ", ".join(missing))
    for n, repeats, target in ((2_000, 5, 1.0), (100_000, 1, 10.0)):
        frame = make_frame(n)
        obs = load(frame, response="volume_ml", factors=("flour", "proof"), order="run", unit="batch")
        fit = fit_observations(obs)
        times = time_all(fit, funcs, repeats)
        tracemalloc.start()
        for _, fn in funcs:
            fn(fit)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        total = sum(times.values())
        ref = statsmodels_fit(frame)
        print(f"\nN = {len(obs):,} ({n:,} rows, 4 x 3 cells), best of {repeats}")
        for name, t in times.items():
            print(f"  {name:<13s} {t * 1000:9.1f} ms")
        print(f"  {'TOTAL':<13s} {total * 1000:9.1f} ms   target < {target:g} s: {'PASS' if total < target else 'FAIL'}")
        print(f"  reference statsmodels ols + anova_lm(typ=2), one fit: {ref * 1000:.1f} ms; "
              f"all diagnostics = {total / ref:.1f} x one classical fit")
        print(f"  peak Python memory of the diagnostics (tracemalloc): {peak / 2**20:.1f} MiB")
        if n == 2_000 and "influence" in times:
            per = refit_loop(frame, args.refits)
            loop = per * len(obs)
            print(f"  leave-one-out reference: statsmodels refit loop {per * 1000:.2f} ms/refit "
                  f"(timed on {args.refits} rows) -> {loop:.1f} s for all {len(obs):,} rows (extrapolated); "
                  f"influence fast path {times['influence'] * 1000:.1f} ms: {loop / times['influence']:.0f} x faster")


if __name__ == "__main__":
    main()
