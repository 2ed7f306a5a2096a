"""Benchmark: the resampling methods of issue 4 (permutation tests, wild bootstrap).

Invented scenario: a greenhouse trial, tomato yield (kg per plant) by cultivar
(4 levels) x irrigation schedule (3 levels), unbalanced cells.

Targets (issue 4), each printed with a reference measured in the same run:

1. 10,000 Freedman-Lane resamples of the interaction at N = 2,004 in under 1 s;
2. at least 200 times faster per resample than refitting a statsmodels formula
   model per resample (``ols`` + ``anova_lm``; a number of refits is timed and
   scaled per resample);
3. peak memory under 500 MB at N = 100,000 and B = 9,999 (child process: peak
   resident set size from ``resource.getrusage`` and the Python-level peak from
   ``tracemalloc``);
4. the whole set of methods at N = 2,004 with B = 9,999 under 5 s (resampling
   methods for A, B and AB plus every analytic method present).

Run from the repository root:  python benchmarks/bench_resampling.py [--refits 50]
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import subprocess
import sys
import time

import numpy as np
import pandas as pd

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from audit.fit import fit_observations  # noqa: E402
from audit.intake import load  # noqa: E402
from audit.methods.permutation import freedman_lane  # noqa: E402

CULTIVARS = ["cherry-red", "plum-gold", "beef-heart", "roma-late"]
SCHEDULES = ["daily", "alternate", "deficit"]

#: (module, function) of every method family; missing modules are skipped and said so
METHOD_SET = [
    ("audit.methods.classical", "classical_f_all", {}),
    ("audit.methods.welch", "welch_james_all", {}),
    ("audit.methods.welch", "welch_james_trimmed_all", {}),
    ("audit.methods.hc", "hc_wald_all", {"kind": "hc3"}),
    ("audit.methods.hc", "hc_wald_all", {"kind": "hc4"}),
    ("audit.methods.ranks", "rank_transform_all", {}),
    ("audit.methods.ranks", "aligned_rank_transform_all", {}),
    ("audit.methods.tukey", "tukey_one_df", {}),
    ("audit.methods.permutation", "freedman_lane_all", {"resamples": 9999, "seed": 1}),
    ("audit.methods.permutation", "ter_braak_all", {"resamples": 9999, "seed": 1}),
    ("audit.methods.permutation", "studentized_permutation_all", {"resamples": 9999, "seed": 1}),
    ("audit.methods.bootstrap", "wild_bootstrap_all", {"resamples": 9999, "seed": 1}),
]


def make_frame(n: int, seed: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    J, K = len(CULTIVARS), len(SCHEDULES)
    w = np.array([1.4, 0.6, 1.0, 1.2, 0.8, 1.1, 0.7, 1.3, 0.9, 1.0, 1.5, 0.5])
    counts = np.floor(w / w.sum() * n).astype(int)
    counts[: n - counts.sum()] += 1
    cell = rng.permutation(np.repeat(np.arange(J * K), counts))
    a, b = cell // K, cell % K
    y = 4.0 + 0.3 * a - 0.2 * b + 0.15 * ((a == 1) & (b == 2)) + rng.normal(0, 0.6 + 0.1 * a, cell.size)
    return pd.DataFrame({"cultivar": np.array(CULTIVARS)[a], "irrigation": np.array(SCHEDULES)[b], "kg": y})


def fit_of(frame: pd.DataFrame):
    return fit_observations(load(frame, response="kg", factors=("cultivar", "irrigation")))


def best_of(fn, repeat=3) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def statsmodels_refits(frame: pd.DataFrame, fit, refits: int) -> tuple[float, float]:
    """Time per resample of the naive loop: permute additive residuals, refit, anova_lm."""
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(0)
    df = frame.copy()
    fitted = fit.fitted_additive + fit.cells.offset
    resid = fit.resid_additive
    formula = "kg ~ C(cultivar, Sum) * C(irrigation, Sum)"
    F0 = None
    t = time.perf_counter()
    for i in range(refits):
        df["kg"] = fitted + (resid if i == 0 else rng.permutation(resid))
        m = smf.ols(formula, df).fit()
        F = sm.stats.anova_lm(m, typ=3).loc["C(cultivar, Sum):C(irrigation, Sum)", "F"]
        if i == 0:
            F0 = float(F)
    return (time.perf_counter() - t) / refits, F0


def child_memory(n: int, B: int) -> dict:
    """Run Freedman-Lane (and the other resampling methods, AB) at N = n in a fresh process."""
    code = f"""
import json, resource, sys, time, tracemalloc
sys.path.insert(0, {ROOT!r})
sys.path.insert(0, {os.path.join(ROOT, 'benchmarks')!r})
from bench_resampling import make_frame, fit_of
from audit.methods.permutation import freedman_lane, ter_braak, studentized_permutation
from audit.methods.bootstrap import wild_bootstrap
fit = fit_of(make_frame({n}))
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
out = {{"rss_before_kb": base}}
tracemalloc.start()
for name, fn in [("fl", freedman_lane), ("tb", ter_braak), ("stud", studentized_permutation), ("wild", wild_bootstrap)]:
    tracemalloc.reset_peak()
    t = time.perf_counter()
    r = fn(fit, resamples={B}, seed=1)
    out[name] = {{"seconds": time.perf_counter() - t, "py_peak_mb": tracemalloc.get_traced_memory()[1] / 2**20,
                 "p": r.p, "chunk": r.extra["chunk_size"]}}
out["rss_peak_kb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps(out))
"""
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--refits", type=int, default=50, help="statsmodels refits timed for the reference")
    ap.add_argument("--big", type=int, default=100_000, help="N for the memory check")
    args = ap.parse_args()

    frame = make_frame(2004)
    fit = fit_of(frame)
    print(f"design: 4 x 3, N = {fit.cells.N}, cell counts {fit.cells.counts.tolist()}")

    # 1. 10,000 Freedman-Lane resamples of AB
    t_fl = best_of(lambda: freedman_lane(fit, resamples=10_000, seed=1))
    r = freedman_lane(fit, resamples=10_000, seed=1)
    print(f"[1] Freedman-Lane AB, B = 10,000, N = 2,004: {t_fl:.3f} s (best of 3)  target < 1 s  "
          f"{'PASS' if t_fl < 1 else 'FAIL'}  (F = {r.statistic:.4f}, p = {r.p:.4f}, chunk {r.extra['chunk_size']})")

    # 2. against a statsmodels refit per resample
    per_sm, F0 = statsmodels_refits(frame, fit, args.refits)
    per_ours = t_fl / 10_000
    ratio = per_sm / per_ours
    print(f"[2] per resample: ours {per_ours * 1e6:.1f} us, statsmodels ols + anova_lm refit {per_sm * 1e3:.2f} ms "
          f"({args.refits} refits timed) -> {ratio:,.0f} x faster  target >= 200 x  {'PASS' if ratio >= 200 else 'FAIL'}")
    print(f"    unpermuted F: ours {r.statistic:.12g}, statsmodels {F0:.12g}, "
          f"relative difference {abs(r.statistic - F0) / F0:.1e}")

    # 3. memory at N = 100,000, B = 9,999 (fresh process)
    mem = child_memory(args.big, 9999)
    rss_mb = mem["rss_peak_kb"] / 1024
    print(f"[3] N = {args.big:,}, B = 9,999 in a child process: peak RSS {rss_mb:.0f} MB "
          f"(before resampling {mem['rss_before_kb'] / 1024:.0f} MB)  target < 500 MB  "
          f"{'PASS' if rss_mb < 500 else 'FAIL'}")
    for k, lab in (("fl", "Freedman-Lane"), ("tb", "ter Braak"), ("stud", "studentized"), ("wild", "wild bootstrap")):
        v = mem[k]
        print(f"    {lab:15s} {v['seconds']:6.2f} s, Python peak {v['py_peak_mb']:6.1f} MB, chunk {v['chunk']}, "
              f"p = {v['p']:.4f}")

    # 4. the whole set at N = 2,004, B = 9,999
    total, missing, rows = 0.0, [], []
    for mod, fn, kw in METHOD_SET:
        try:
            f = getattr(importlib.import_module(mod), fn)
        except (ImportError, AttributeError):
            missing.append(f"{mod}.{fn}")
            continue
        t = time.perf_counter()
        out = f(fit, **kw)
        dt = time.perf_counter() - t
        total += dt
        n_res = len(out) if isinstance(out, tuple) else 1
        rows.append((f"{fn}{'(' + kw['kind'] + ')' if 'kind' in kw else ''}", dt, n_res))
    print(f"[4] whole set at N = 2,004, B = 9,999: {total:.2f} s  target < 5 s  {'PASS' if total < 5 else 'FAIL'}")
    for name, dt, n_res in rows:
        print(f"    {name:34s} {dt:6.3f} s  ({n_res} result(s))")
    if missing:
        print(f"    not present (skipped): {', '.join(missing)}")


if __name__ == "__main__":
    main()
