"""Benchmark: `check` on 1,000,000 rows (5 x 4 cells, CSV) and the ANOVA core alone.

Invented scenario: a dairy feeding trial, milk yield (litres per day) by feed ration
(5 levels) x barn (4 levels), unbalanced cell sizes.

Targets (issue 2): the whole `python -m audit check FILE ... --json OUT --no-diagnostics
--no-methods` (design and ANOVA sections only) under 15 s wall
and 2 GB peak memory on a 2-core machine; the ANOVA core alone on the in-memory data
under 1 s.  References measured in the same run: pandas.read_csv of the same file
(for intake) and statsmodels ols + anova_lm(typ=2) on the same in-memory data (for the core).

Run from the repository root:  python benchmarks/bench_check.py [--rows N] [--sm-rows N]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np
import pandas as pd

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

RATIONS = ["grass-silage", "maize-silage", "hay-concentrate", "pasture", "total-mixed"]
BARNS = ["north", "south", "east", "west"]


def make_frame(n: int, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    J, K = len(RATIONS), len(BARNS)
    w = rng.uniform(0.5, 1.5, size=J * K)
    cell = rng.choice(J * K, size=n, p=w / w.sum())
    a, b = cell // K, cell % K
    mu = 28.0 + np.array([0.0, 1.5, -1.0, 0.8, 2.2])[a] + np.array([0.0, -0.6, 0.4, 0.3])[b]
    mu = mu + 0.5 * ((a + b) % 3 == 0)
    y = np.round(mu + rng.normal(0.0, 4.0, size=n) * (1.0 + 0.1 * a), 3)
    return pd.DataFrame({
        "ration": np.array(RATIONS, dtype=object)[a],
        "barn": np.array(BARNS, dtype=object)[b],
        "milk_l": y,
    })


def best_of(fn, repeat: int = 3):
    times = []
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--sm-rows", type=int, default=None,
                    help="rows for the statsmodels reference (default: all; it is sized to fit)")
    args = ap.parse_args()

    from audit.core import anova_two_way
    from audit.design import cells_from_observations
    from audit.fit import fit_observations
    from audit.intake import load

    n = args.rows
    frame = make_frame(n)
    with tempfile.TemporaryDirectory(prefix="twoway-bench-") as tmp:
        path = os.path.join(tmp, "dairy.csv")
        t0 = time.perf_counter()
        frame.to_csv(path, index=False)
        t_write = time.perf_counter() - t0
        size_mb = os.path.getsize(path) / 1e6
        print(f"data: {n:,} rows, 5 x 4 cells, CSV {size_mb:.1f} MB (written in {t_write:.1f} s)")

        # 1. the whole command as a subprocess (the first child, so ru_maxrss is its own peak)
        out_json = os.path.join(tmp, "findings.json")
        cmd = [sys.executable, "-m", "audit", "check", path, "--response", "milk_l",
               "--factors", "ration", "barn", "--json", out_json,
               "--no-diagnostics", "--no-methods"]  # the sections of issue 2: design + ANOVA
        env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True)
        t_cli = time.perf_counter() - t0
        peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024  # KiB on Linux
        if proc.returncode != 0:
            print(f"check FAILED (exit {proc.returncode}): {proc.stderr.strip()[-2000:]}")
            cli_ok = False
        else:
            with open(out_json) as fh:
                js = json.load(fh)
            cli_ok = js.get("design", {}).get("n") == n
            print(f"check (subprocess): {t_cli:.2f} s wall, peak RSS {peak_mb:.0f} MB "
                  f"[targets < 15 s, < 2048 MB] -> {'PASS' if t_cli < 15 and peak_mb < 2048 and cli_ok else 'MISS'}"
                  + ("" if cli_ok else " (JSON design.n does not match)"))

        # 2. intake alone, against pandas.read_csv of the same file
        t_read, _ = best_of(lambda: pd.read_csv(path), repeat=2)
        t_read_str, _ = best_of(lambda: pd.read_csv(path, dtype=str), repeat=2)
        t_load, obs = best_of(lambda: load(path, response="milk_l", factors=("ration", "barn")), repeat=2)
        print(f"intake load(): {t_load:.2f} s; reference pandas.read_csv: {t_read:.2f} s native types "
              f"(ratio {t_load / t_read:.1f}), {t_read_str:.2f} s as text (ratio {t_load / t_read_str:.1f})")

    # 3. the ANOVA core alone on the in-memory data
    mem = load(frame, response="milk_l", factors=("ration", "barn"))
    t_cells, cells = best_of(lambda: cells_from_observations(
        mem.y, mem.a, mem.b, levels_a=mem.levels_a, levels_b=mem.levels_b, factors=mem.factors))
    t_anova, an = best_of(lambda: anova_two_way(cells))
    t_fit, fit = best_of(lambda: fit_observations(mem))
    t_core = t_cells + t_anova
    print(f"core anova_two_way(cells_from_observations(...)): {t_core:.3f} s "
          f"(cells {t_cells:.3f} s + tables {t_anova:.4f} s) [target < 1 s] -> {'PASS' if t_core < 1 else 'MISS'}")
    print(f"core fit_observations() incl. per-row fitted values and residuals: {t_fit:.3f} s "
          f"[target < 1 s] -> {'PASS' if t_fit < 1 else 'MISS'}")

    # 4. reference: statsmodels ols + anova_lm(typ=2) on the same in-memory data
    try:
        import statsmodels.formula.api as smf
        from statsmodels.stats.anova import anova_lm
    except ImportError:
        print("statsmodels not installed: no reference ratio")
        return 0
    m = args.sm_rows or n
    sub = frame if m >= n else frame.iloc[:m]

    def sm():
        model = smf.ols("milk_l ~ C(ration, Sum) * C(barn, Sum)", data=sub).fit()
        return anova_lm(model, typ=2)

    t_sm, tab = best_of(sm, repeat=1 if m >= 200_000 else 3)
    note = "" if m >= n else f" (on the first {m:,} rows; scaled x{n / m:.0f} for the ratio)"
    t_sm_full = t_sm * (n / m)
    print(f"reference statsmodels ols + anova_lm(typ=2): {t_sm:.2f} s{note}")
    print(f"speed ratio statsmodels / core: {t_sm_full / t_core:.0f}x (tables only), "
          f"{t_sm_full / t_fit:.0f}x (fit_observations)")
    if m >= n:
        ours = an.tables["II"].row("AB")
        ref = tab.loc["C(ration, Sum):C(barn, Sum)"]
        print(f"check: interaction F ours {ours.F:.10g} vs statsmodels {ref['F']:.10g} "
              f"(rel. diff {abs(ours.F - ref['F']) / ref['F']:.1e})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
