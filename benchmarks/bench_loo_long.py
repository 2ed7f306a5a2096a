"""Benchmark: leave-one-out influence + greedy fragility on long L x 2 designs
(n = 2 per cell, 4 L rows) at L = 50, 200 and 1,000.

Invented scenario: a bakery line trial, loaf volume (ml) by oven rack position
(L levels) x proofing time (2 levels), two loaves per combination.

The reference, measured in the same run, is the previous implementation kept
below (``per_cell_solve_loo``: weighted least-squares solves of the whole
additive design for every filled cell, O(m p^2) each), counted as one pass for
influence plus one per greedy fragility step.  One pass is timed at L = 50 and L = 100 only; the
figures at L = 200 and 1,000 are extrapolated from the L = 100 pass with the
operation count (L^4) and printed as such.  The new closed form is timed at every L
and its leave-one-out p-values are compared with the reference where both ran.

Run from the repository root:  python benchmarks/bench_loo_long.py
"""

from __future__ import annotations

import math
import os
import sys
import time

import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from audit.core import additive_design, weighted_ls_residual  # noqa: E402
from audit.diagnostics.influence import _f_and_p, cell_sums, fragility, influence  # noqa: E402
from audit.fit import fit_observations  # noqa: E402
from audit.intake import load  # noqa: E402


def per_cell_solve_loo(y, cell, J, K):
    """The previous leave-one-out: one weighted least-squares solve per filled cell."""
    JK = J * K
    N = y.size
    X = additive_design(J, K)
    n, mean, css = cell_sums(y, cell, JK)
    filled = n > 0
    m = int(filled.sum())
    sse = float(css.sum())
    centre = float(np.sum(n * mean) / N)
    target = np.where(filled, mean - centre, 0.0)
    p = np.full(N, np.nan)
    order = np.argsort(cell, kind="stable")
    starts = np.concatenate([[0], np.cumsum(n)])
    for c in np.flatnonzero(filled):
        idx = order[starts[c]:starts[c + 1]]
        nc = int(n[c])
        w = n.astype(float)
        w[c] -= 1.0
        r0, rank = weighted_ls_residual(X, w, target)
        if nc == 1:
            Q = np.array([float(np.sum(w * r0 * r0))])
            sse_i = np.array([sse - css[c]])
            d1, d2 = (m - 1) - rank, (N - 1) - (m - 1)
        else:
            e = np.zeros(JK)
            e[c] = 1.0
            u, _ = weighted_ls_residual(X, w, e)
            keep = w > 0
            d = y[idx] - mean[c]
            delta = -d / (nc - 1)
            R = r0[keep][None, :] + delta[:, None] * u[keep][None, :]
            Q = (R * R) @ w[keep]
            sse_i = sse - (nc / (nc - 1.0)) * d * d
            d1, d2 = m - rank, (N - 1) - m
        p[idx] = _f_and_p(Q, sse_i, np.full(idx.size, d1), np.full(idx.size, d2))[1]
    return p


def make(L: int, seed: int = 1):
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(L), 4)
    b = np.tile([0, 0, 1, 1], L)
    y = 900 + 3.0 * (a % 11) + 25.0 * b + 4.0 * (a % 13 == 0) * b + rng.normal(0, 6, a.size)
    frame = pd.DataFrame({"volume_ml": y, "rack": [f"rack-{i:04d}" for i in a],
                          "proof": np.where(b == 0, "short", "long")})
    return frame, y, a * 2 + b


def main() -> None:
    # reference: one pass of the previous routine, measured at small L only
    ref_pass = {}
    for L in (50, 100):
        frame, y, cell = make(L)
        fit = fit_observations(load(frame, response="volume_ml", factors=("rack", "proof")))
        t0 = time.perf_counter()
        p_old = per_cell_solve_loo(np.asarray(fit.obs.y, float), np.asarray(fit.obs.cell), fit.cells.J, fit.cells.K)
        ref_pass[L] = time.perf_counter() - t0
        p_new = np.array([np.nan if v is None else v for v in influence(fit).values["loo_p"]], float)
        ok = np.isfinite(p_old)
        rel = float(np.max(np.abs(p_new[ok] / p_old[ok] - 1.0)))
        print(f"reference pass (previous per-cell solves), L = {L}: {ref_pass[L]:.2f} s measured; "
              f"max relative difference of the leave-one-out p against the closed form {rel:.1e}", flush=True)
    # growth of one pass: m = 2L least-squares solves of an m x (L + 1) design, O(L^4)
    # operations (the measured ratio between L = 50 and 100 is printed but too noisy on a
    # shared machine to extrapolate with)
    k = 4.0
    print(f"measured growth L = 50 -> 100: x{ref_pass[100] / ref_pass[50]:.0f} "
          f"(operation count: x{2 ** k:.0f})", flush=True)
    for L in (50, 200, 1000):
        frame, y, cell = make(L)
        fit = fit_observations(load(frame, response="volume_ml", factors=("rack", "proof")))
        t0 = time.perf_counter()
        influence(fit)
        t1 = time.perf_counter()
        fr = fragility(fit)
        t2 = time.perf_counter()
        passes = 1 + len(fr.values["rows_tried"])      # influence + one pass per greedy step
        per_pass = ref_pass[L] if L in ref_pass else ref_pass[100] * (L / 100) ** k
        est = per_pass * passes
        how = "measured pass" if L in ref_pass else f"EXTRAPOLATED pass (L^{k:.0f} from the L = 100 pass; not run)"
        print(f"L = {L:5d} ({4 * L:5d} rows): closed form influence {t1 - t0:6.2f} s + fragility {t2 - t1:6.2f} s "
              f"({passes - 1} steps) = {t2 - t0:6.2f} s; previous routine ~{est:9.1f} s ({passes} x {how}) "
              f"-> ~{est / (t2 - t0):,.0f} x", flush=True)


if __name__ == "__main__":
    main()
