"""Benchmark: exact leave-one-out interaction p-values against a statsmodels
refit loop, and the time of the outlier / influence / fragility / shape /
scale diagnostics at N = 2,000 and N = 100,000.

Run from the repository root:

    python benchmarks/bench_leave_one_out.py            # refits timed on a sample of rows
    python benchmarks/bench_leave_one_out.py --full     # refit every one of the 2,000 rows

The reference is ols('y ~ C(a, Sum) * C(b, Sum)') + anova_lm(typ=2), refitted
with each row left out.  Without --full, the refit loop is timed on a sample
of rows and scaled to N (each refit costs the same); the ratio printed is
measured in this run.  Data: invented greenhouse trial (4 x 3, unbalanced).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import tracemalloc

import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from audit.diagnostics.influence import fragility, influence, loo_interaction, outliers  # noqa: E402
from audit.diagnostics.scale import scale, shape  # noqa: E402
from audit.fit import fit_observations  # noqa: E402
from audit.intake import load  # noqa: E402


def make_frame(N: int, seed: int = 1) -> pd.DataFrame:
    """Invented: tomato weight (g) by greenhouse (4) x irrigation (3), unbalanced."""
    rng = np.random.default_rng(seed)
    share = np.array([3, 1, 2, 2, 4, 1, 1, 2, 3, 2, 1, 4], dtype=float)
    cell = rng.choice(12, size=N, p=share / share.sum())
    a, b = cell // 3, cell % 3
    y = np.exp(4.5 + 0.1 * a + 0.15 * b + 0.03 * (a == 2) * (b == 1) + rng.normal(0, 0.2, N))
    return pd.DataFrame({"weight_g": y, "greenhouse": [f"G{i}" for i in a], "irrigation": [f"I{i}" for i in b]})


def refit_p(frame: pd.DataFrame, i: int) -> float:
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    sub = frame.drop(index=frame.index[i])
    model = smf.ols("weight_g ~ C(greenhouse, Sum) * C(irrigation, Sum)", data=sub).fit()
    return float(anova_lm(model, typ=2).loc["C(greenhouse, Sum):C(irrigation, Sum)", "PR(>F)"])


def lean_refit_p(y, a, b, J, K, i):
    """A lean refit without formula parsing: numpy least squares of the additive
    and the cell-means model on dummy matrices, row i removed (a second,
    harder reference for the speed-up)."""
    from scipy import stats

    keep = np.ones(y.size, bool)
    keep[i] = False
    yy, aa, bb = y[keep], a[keep], b[keep]
    Xa = np.hstack([np.eye(J)[aa], np.eye(K)[bb][:, 1:]])
    Xf = np.eye(J * K)[aa * K + bb]
    Xf = Xf[:, Xf.any(axis=0)]
    ra = yy - Xa @ np.linalg.lstsq(Xa, yy, rcond=None)[0]
    rf = yy - Xf @ np.linalg.lstsq(Xf, yy, rcond=None)[0]
    df1 = Xf.shape[1] - np.linalg.matrix_rank(Xa)
    df2 = yy.size - Xf.shape[1]
    sse_f = rf @ rf
    F = ((ra @ ra - sse_f) / df1) / (sse_f / df2)
    return float(stats.f.sf(F, df1, df2))


def timed(fn, *args, repeat: int = 1, **kw):
    best = np.inf
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn(*args, **kw)
        best = min(best, time.perf_counter() - t0)
    return out, best


def _others():
    """The other diagnostics of the package, when present (for the total)."""
    fns = []
    try:
        from audit.diagnostics import assumptions, design_checks
    except ImportError:
        return fns
    for mod, names in ((assumptions, ("normality", "homogeneity")),
                       (design_checks, ("balance", "missingness", "independence"))):
        fns += [getattr(mod, n) for n in names if hasattr(mod, n)]
    return fns


def run_diagnostics(fit, label: str) -> None:
    total = 0.0
    parts = []
    mine = (outliers, influence, fragility, shape, scale)
    for fn in mine:
        d, t = timed(fn, fit)
        total += t
        extra = ""
        if d.id == "fragility":
            extra = f" (deletions_to_flip={d.values['deletions_to_flip']}, steps={len(d.values['rows_tried'])})"
        parts.append(f"    {d.id:<10s} {t * 1000:9.1f} ms  [{d.severity}]{extra}")
    print(f"{label}: outliers+influence+fragility+shape+scale = {total:.3f} s")
    print("\n".join(parts))
    others = _others()
    if others:
        t_other = 0.0
        for fn in others:
            _, t = timed(fn, fit)
            t_other += t
        names = "+".join(f.__name__ for f in others)
        print(f"    other diagnostics ({names}): {t_other:.3f} s; all together {total + t_other:.3f} s")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="refit all 2,000 rows (about a minute)")
    ap.add_argument("--sample", type=int, default=200, help="rows refitted when not --full")
    args = ap.parse_args()

    N = 2000
    frame = make_frame(N)
    obs = load(frame, response="weight_g", factors=("greenhouse", "irrigation"))
    fit = fit_observations(obs)

    (F, p, _d1, _d2), t_fast = timed(loo_interaction, obs.y, obs.cell, obs.J, obs.K, repeat=5)
    _, t_diag = timed(influence, fit, repeat=5)
    rows = np.arange(N) if args.full else np.random.default_rng(0).choice(N, args.sample, replace=False)
    t0 = time.perf_counter()
    ref = np.array([refit_p(frame, int(i)) for i in rows])
    t_ref_sample = time.perf_counter() - t0
    t_ref = t_ref_sample * N / rows.size
    rel = float(np.max(np.abs(p[rows] / ref - 1.0)))
    t0 = time.perf_counter()
    lean = np.array([lean_refit_p(obs.y, obs.a, obs.b, obs.J, obs.K, int(i)) for i in rows])
    t_lean = (time.perf_counter() - t0) * N / rows.size
    rel_lean = float(np.max(np.abs(p[rows] / lean - 1.0)))
    print(f"N = {N}, 4 x 3 unbalanced, cell counts {np.bincount(obs.cell, minlength=12).tolist()}")
    print(f"fast exact leave-one-out (all {N} rows):     {t_fast * 1000:8.2f} ms (best of 5)")
    print(f"influence() diagnostic incl. packaging:       {t_diag * 1000:8.2f} ms (best of 5)")
    how = "measured on all rows" if args.full else f"{rows.size} rows measured ({t_ref_sample:.2f} s), scaled to N"
    print(f"statsmodels refit loop ({how}): {t_ref:8.2f} s")
    print(f"speed-up, refit loop / fast path:             {t_ref / t_fast:8.0f} x  (acceptance: >= 50 x)")
    print(f"speed-up, refit loop / influence():           {t_ref / t_diag:8.0f} x")
    print(f"lean numpy refit loop (no formula parsing, scaled to N): {t_lean:8.2f} s; "
          f"speed-up {t_lean / t_fast:.0f} x; max relative difference {rel_lean:.1e}")
    print(f"max relative difference in p over {rows.size} rows: {rel:.2e}  (acceptance: <= 1e-9)")
    print()
    run_diagnostics(fit, "N = 2,000 (4 x 3)")
    big = make_frame(100_000, seed=2)
    fit_big = fit_observations(load(big, response="weight_g", factors=("greenhouse", "irrigation")))
    run_diagnostics(fit_big, "N = 100,000 (4 x 3)")
    # memory in a separate pass: tracing slows the code, so it is not timed
    tracemalloc.start()
    for fn in (outliers, influence, fragility, shape, scale):
        fn(fit_big)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    print(f"    peak traced memory of these diagnostics at N = 100,000: {peak / 2**20:.1f} MiB")


if __name__ == "__main__":
    main()
