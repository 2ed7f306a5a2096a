"""Size of the sequential resampling tests and their agreement with the full-B decision.

Seeded simulation (invented data): a 3 x 3 design, 6 observations per cell, main effects and
NO interaction, normal errors with equal variances; every resampling method's interaction test
run twice on each dataset from the same seed: sequentially (the default; stops when its
decision at alpha is settled) and with all B resamples (``exact_resamples=True``).

Reported per method:

* the rejection rate of the sequential test, with the central 99% band of
  Binomial(R, alpha) / R around alpha (scipy.stats.binom quantiles): a test that keeps its
  size lands inside the band;
* the fraction of datasets whose sequential decision differs from the full-B decision, with
  its 99% Clopper-Pearson interval, beside the stated resampling risk 1e-3 (the risk bounds
  the disagreement with the decision of infinitely many resamples; a full-B decision that is
  itself unsettled can add disagreements - counted separately);
* the mean number of resamples used.

Run from the repository root (2,000 datasets, B = 999 maximum: a few minutes on 2 cores):

    python benchmarks/bench_sequential.py
    python benchmarks/bench_sequential.py --datasets 300 --resamples 499
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import sys

import numpy as np
import pandas as pd
from scipy import stats

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)

ALPHA = 0.05
METHODS = ("permutation-freedman-lane", "permutation-ter-braak", "permutation-studentized", "wild-bootstrap")


def simulate(R: int, B: int, seed: int = 2024, J: int = 3, K: int = 3, n: int = 6) -> dict:
    """Per method: rejections (sequential), disagreements with the full-B decision (all, and
    among full-B decisions that are settled), resamples used; over ``R`` null datasets."""
    from audit.design import cells_from_observations
    from audit.fit import fit_observations
    from audit.intake import load
    from audit.methods.bootstrap import wild_bootstrap_all
    from audit.methods.permutation import permutation_all

    a = np.repeat(np.arange(J), K * n)
    b = np.tile(np.repeat(np.arange(K), n), J)
    frame = pd.DataFrame({"y": np.arange(a.size, dtype=float), "a": [f"a{i}" for i in a],
                          "b": [f"b{i}" for i in b]})
    obs0 = load(frame, response="y", factors=("a", "b"))
    rng = np.random.default_rng(seed)
    Y = 10.0 + 1.0 * a + 0.5 * b + rng.normal(size=(R, a.size))        # no interaction
    fit0 = fit_observations(obs0, alpha=ALPHA)
    out = {m: {"reject": 0, "disagree": 0, "disagree_settled": 0, "settled_full": 0, "used": 0, "early": 0}
           for m in METHODS}
    for r in range(R):
        # the resampling methods read only the observations and the cell statistics: skip the ANOVA tables
        obs = dataclasses.replace(obs0, y=Y[r])
        cells = cells_from_observations(obs.y, obs.a, obs.b, levels_a=obs.levels_a, levels_b=obs.levels_b,
                                        factors=obs.factors, offset=obs.offset, response=obs.response)
        fit = dataclasses.replace(fit0, obs=obs, cells=cells)
        runs = {}
        for exact in (False, True):
            res = [*sum(permutation_all(fit, resamples=B, seed=r, effects=("AB",), exact_resamples=exact), ()),
                   *wild_bootstrap_all(fit, resamples=B, seed=r, effects=("AB",), exact_resamples=exact)]
            runs[exact] = {m.id: m for m in res}
        for mid in METHODS:
            s, f = runs[False][mid], runs[True][mid]
            o = out[mid]
            ds, df = s.p < ALPHA, f.p < ALPHA
            o["reject"] += ds
            o["used"] += s.resamples
            o["early"] += s.extra["stopped_early"]
            o["settled_full"] += f.extra["settled"]
            o["disagree"] += ds != df
            o["disagree_settled"] += (ds != df) and f.extra["settled"]
    return out


def band(R: int, alpha: float = ALPHA, level: float = 0.99) -> tuple[float, float]:
    """Central ``level`` band of Binomial(R, alpha) / R (scipy.stats.binom quantiles)."""
    lo = stats.binom.ppf((1 - level) / 2, R, alpha) / R
    hi = stats.binom.ppf(1 - (1 - level) / 2, R, alpha) / R
    return float(lo), float(hi)


def main() -> None:
    from audit.methods.resampling import SEQUENTIAL_RISK, clopper_pearson

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--datasets", type=int, default=2000)
    ap.add_argument("--resamples", type=int, default=999)
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args()
    R = args.datasets
    out = simulate(R, args.resamples, args.seed)
    lo, hi = band(R)
    print(f"{R} null datasets (3 x 3, n = 6), alpha = {ALPHA}, B = {args.resamples} maximum; "
          f"99% binomial band for the rejection rate [{lo:.4f}, {hi:.4f}]; stated risk {SEQUENTIAL_RISK:g}")
    print("| method | rejection rate (sequential) | in band | stopped early | mean resamples used | "
          "decision differs from full B (99% CI) | of which full-B decision settled |")
    print("| --- | --- | --- | --- | --- | --- | --- |")
    for mid, o in out.items():
        rate = o["reject"] / R
        cl, ch = clopper_pearson(o["disagree"], R)
        print(f"| {mid} | {rate:.4f} | {'yes' if lo <= rate <= hi else 'NO'} | {o['early'] / R:.3f} | "
              f"{o['used'] / R:.0f} | {o['disagree']}/{R} = {o['disagree'] / R:.4f} [{cl:.4f}, {ch:.4f}] | "
              f"{o['disagree_settled']} |")


if __name__ == "__main__":
    main()
