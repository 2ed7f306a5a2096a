"""Seeded size simulation: aligned rank transform with the published alignment
(marginal means of the observations) against the unweighted one (marginal
means of the cell means), on an unbalanced 3 x 3 design with normal,
equal-variance errors.

Scenarios (each R datasets, alpha = 0.05):
  AB  - main effects of A and B, no interaction: size of the interaction test;
  A   - an effect of B only: size of the A test;
  B   - an effect of A only: size of the B test.

Run: python benchmarks/sim_art_alignment.py [R] [seed] [effects, e.g. AB,A]
Prints the rejection rate of each alignment with its binomial standard error.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from audit.fit import fit_observations  # noqa: E402
from audit.methods.ranks import aligned_rank_transform  # noqa: E402

COUNTS = np.array([[3, 8, 14], [10, 4, 7], [12, 6, 3]])   # unbalanced 3 x 3, N = 67
A_EFF = np.array([-1.0, 0.0, 1.5])
B_EFF = np.array([1.2, -0.4, -0.8])


def _fit(y, a, b):
    import pandas as pd

    from audit.intake import load

    df = pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})
    return fit_observations(load(df, response="y", factors=("a", "b")))


def simulate(R: int = 400, seed: int = 20261202, alpha: float = 0.05, effects=("AB", "A", "B")):
    rng = np.random.default_rng(seed)
    a = np.repeat(np.repeat(np.arange(3), 3), COUNTS.ravel())
    b = np.repeat(np.tile(np.arange(3), 3), COUNTS.ravel())
    scen = {e: v for e, v in {"AB": (1.0, 1.0), "A": (0.0, 1.0), "B": (1.0, 0.0)}.items() if e in effects}
    out = {}
    for effect, (sa, sb) in scen.items():
        rej = {"observation-means": 0, "cell-means": 0}
        for _ in range(R):
            y = sa * A_EFF[a] + sb * B_EFF[b] + rng.normal(size=a.size)
            fit = _fit(y, a, b)
            for al in rej:
                r = aligned_rank_transform(fit, effect=effect, alignment=al)
                rej[al] += int(r.p is not None and r.p < alpha)
        out[effect] = {k: v / R for k, v in rej.items()}
    return out


if __name__ == "__main__":
    R = int(sys.argv[1]) if len(sys.argv) > 1 else 400
    seed = int(sys.argv[2]) if len(sys.argv) > 2 else 20261202
    effects = tuple(sys.argv[3].split(",")) if len(sys.argv) > 3 else ("AB", "A", "B")
    se = np.sqrt(0.05 * 0.95 / R)
    print(f"ART size at alpha = 0.05, {R} datasets per scenario, seed {seed}, counts {COUNTS.tolist()}; "
          f"binomial SE at 0.05: {se:.3f}")
    for effect, rates in simulate(R, seed, effects=effects).items():
        print(f"  {effect:>2} test ({'main effects A and B present' if effect == 'AB' else 'other main effect present'}):"
              + "".join(f"  {k} {v:.3f}" for k, v in rates.items()))
