"""Benchmark: the whole audit (every diagnostic and method, B = 9,999 maximum) against a
reference tree (by default the commit this branch started from), both measured in the same run.

Invented scenarios (no real data):

* N = 2,004: a glaze-firing trial, tile gloss by kiln (4) x glaze recipe (3), unequal cells;
* N = 100,000: a seedling nursery, shoot height by substrate (5) x watering plan (4);
* N = 328,521: a warehouse picking study, pick time by aisle zone (16) x shift (3), 13 of the
  48 cells empty.

Each audit runs in its own child process (``PYTHONPATH`` set to the tree under test), which
prints the wall time of ``audit.api.check(...)`` on the in-memory frame and, separately, of
``audit.methods.run_methods`` (the resampling part's own contribution).  The reference tree is
exported with ``git archive`` into a temporary folder, so the ratio compares the two codes on
the same machine at the same moment.

Run from the repository root:

    python benchmarks/bench_speed.py                      # reference: the merge base with main
    python benchmarks/bench_speed.py --ref <commit> --sizes 2004 100000
    python benchmarks/bench_speed.py --repeat 3           # best of 3 per size and tree
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

CHILD = r"""
import sys, time
import numpy as np, pandas as pd
N = int(sys.argv[1])
rng = np.random.default_rng(N)
if N == 328521:
    J, K = 16, 3
    empty = {(j, k) for j, k in [(1, 0), (2, 2), (3, 1), (5, 0), (6, 2), (7, 1), (9, 0), (10, 2), (11, 1),
                                 (12, 0), (13, 2), (14, 1), (15, 0)]}
elif N == 2004:
    J, K, empty = 4, 3, set()
else:
    J, K, empty = 5, 4, set()
cells = [(j, k) for j in range(J) for k in range(K) if (j, k) not in empty]
w = 1.0 + 0.5 * np.sin(np.arange(len(cells)))          # unequal cell sizes
n = np.floor(w / w.sum() * N).astype(int)
n[: N - n.sum()] += 1
a = np.repeat([c[0] for c in cells], n)
b = np.repeat([c[1] for c in cells], n)
y = 10 + 0.3 * a + 0.2 * b + 0.05 * ((a * b) % 3) + rng.normal(size=N) * (1 + 0.1 * b)
frame = pd.DataFrame({"y": y, "fa": [f"a{i:02d}" for i in a], "fb": [f"b{i}" for i in b]})
from audit.api import check
t0 = time.perf_counter()
f = check(frame, response="y", factors=("fa", "fb"), resamples=9999, seed=1, timestamp=False)
total = time.perf_counter() - t0
from audit.fit import fit_observations
from audit.intake import load
from audit.methods import run_methods
fit = fit_observations(load(frame, response="y", factors=("fa", "fb")), alpha=0.05)
t0 = time.perf_counter()
ms = run_methods(fit, resamples=9999, seed=1)
meth = time.perf_counter() - t0
used = {m.id: m.resamples for m in ms if m.effect == "AB" and m.resamples}
print(f"{total:.3f} {meth:.3f} {f.verdict} {used}")
"""


def run(tree: str, N: int) -> tuple[float, float, str]:
    env = dict(os.environ, PYTHONPATH=tree, MPLBACKEND="Agg")
    with tempfile.TemporaryDirectory() as tmp:
        out = subprocess.run([sys.executable, "-c", CHILD, str(N)], env=env, cwd=tmp, check=True,
                             capture_output=True, text=True).stdout.split(maxsplit=3)
    return float(out[0]), float(out[1]), " ".join(out[2:])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--ref", default=None, help="reference commit (default: git merge-base HEAD main)")
    ap.add_argument("--sizes", type=int, nargs="+", default=[2004, 100000, 328521])
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args()
    ref = args.ref or subprocess.run(["git", "merge-base", "HEAD", "main"], cwd=ROOT, check=True,
                                     capture_output=True, text=True).stdout.strip()
    with tempfile.TemporaryDirectory() as reftree:
        subprocess.run(f"git archive {ref} | tar -x -C {reftree}", shell=True, cwd=ROOT, check=True)
        print(f"reference {ref[:10]} vs working tree {ROOT}")
        print("| N | reference total (s) | this tree total (s) | ratio | reference methods (s) | "
              "this tree methods (s) | ratio | resamples used (AB) |")
        print("| --- | --- | --- | --- | --- | --- | --- | --- |")
        for N in args.sizes:
            r = [run(reftree, N) for _ in range(args.repeat)]
            s = [run(ROOT, N) for _ in range(args.repeat)]
            rt, rm = min(x[0] for x in r), min(x[1] for x in r)
            st, sm = min(x[0] for x in s), min(x[1] for x in s)
            print(f"| {N:,} | {rt:.2f} | {st:.2f} | {rt / st:.1f}x | {rm:.2f} | {sm:.2f} | {rm / sm:.1f}x | "
                  f"{s[0][2]} |", flush=True)


if __name__ == "__main__":
    main()
