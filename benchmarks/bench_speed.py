"""Benchmark: the whole audit (every diagnostic and method, B = 9,999 maximum) against a
reference tree (by default ccc126b, main before this work), both measured in the same run.

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

    python benchmarks/bench_speed.py                      # reference: ccc126b (main before this work)
    python benchmarks/bench_speed.py --ref <commit> --sizes 2004 100000
    python benchmarks/bench_speed.py --repeat 3           # best of 3 per size and tree
    python benchmarks/bench_speed.py --primitives         # ns per element of the draw primitives
    python benchmarks/bench_speed.py --memory             # peak RSS of this tree at N = 1,000,000 (5 x 4)

``--memory`` runs the whole audit (every method, B = 9,999 maximum, sequential; with
``--memory-exact`` also with ``exact_resamples``) on 1,000,000 rows (5 x 4, as the N = 100,000 design) in a child process
and reads its peak resident set size (``ru_maxrss`` of the child). Target: under 1 GB.
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
exact = len(sys.argv) > 2 and sys.argv[2] == "exact"
kw = {"exact_resamples": True} if exact else {}
f = check(frame, response="y", factors=("fa", "fb"), resamples=9999, seed=1, timestamp=False, **kw)
if len(sys.argv) > 2:
    print(f"{time.perf_counter() - t0:.3f} {f.verdict}")
    raise SystemExit(0)
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


def primitives() -> None:
    """ns per element of the ways to draw a (b, N) block of permutations, and of sign rows."""
    import numpy as np

    def best(f, reps=5):
        t = []
        for _ in range(reps):
            t0 = time.perf_counter()
            f()
            t.append(time.perf_counter() - t0)
        return min(t)

    print("| N | b | primitive | ns per element (best of 5) |")
    print("| --- | --- | --- | --- |")
    for N, b in ((2000, 1000), (100000, 40)):
        rng = np.random.default_rng(1)
        base = np.arange(N, dtype=np.intp)
        idx = np.empty((b, N), dtype=np.intp)
        u = rng.normal(size=N)
        W = np.empty((b, N))
        words = (N + 63) // 64

        def permuted_block():
            idx[...] = base
            rng.permuted(idx, axis=1, out=idx)

        def permutation_rows():
            for r in range(b):
                idx[r] = rng.permutation(N)

        def signs_raw():
            neg = np.unpackbits(rng.bit_generator.random_raw((b, words)).view(np.uint8), axis=1, count=N,
                                bitorder="little").view(bool)
            np.copyto(W, u)
            np.negative(W, out=W, where=neg)

        def signs_uint8():
            neg = np.unpackbits(rng.integers(0, 256, (b, (N + 7) // 8), dtype=np.uint8), axis=1, count=N,
                                bitorder="little").view(bool)
            np.copyto(W, u)
            np.negative(W, out=W, where=neg)

        def signs_float():
            np.multiply(np.where(rng.random((b, N)) < 0.5, -1.0, 1.0), u, out=W)

        cases = [("rng.permuted on the (b, N) index block, in place", permuted_block),
                 ("rng.permuted(np.broadcast_to(arange(N), (b, N)))",
                  lambda: rng.permuted(np.broadcast_to(base, (b, N)), axis=1)),
                 ("argsort(rng.random((b, N)))", lambda: np.argsort(rng.random((b, N)), axis=1)),
                 ("argsort(rng.random((b, N), float32))",
                  lambda: np.argsort(rng.random((b, N), dtype=np.float32), axis=1)),
                 ("rng.permutation(N) per row", permutation_rows),
                 ("signs: random_raw bits + unpackbits, applied", signs_raw),
                 ("signs: integers(0, 256, uint8) + unpackbits, applied", signs_uint8),
                 ("signs: float draws, applied", signs_float)]
        for name, f in cases:
            f()
            print(f"| {N:,} | {b} | {name} | {best(f) / (b * N) * 1e9:.1f} |", flush=True)


def memory(N: int, mode: str) -> tuple[float, str]:
    """(peak RSS in MB, child's output) of the whole audit at ``N`` rows in a child process."""
    import resource

    env = dict(os.environ, PYTHONPATH=ROOT, MPLBACKEND="Agg")
    with tempfile.TemporaryDirectory() as tmp:
        out = subprocess.run([sys.executable, "-c", CHILD, str(N), mode], env=env, cwd=tmp, check=True,
                             capture_output=True, text=True).stdout.strip()
    return resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--ref", default="ccc126b", help="reference commit (default ccc126b: main before the "
                    "shared draw and sequential stopping)")
    ap.add_argument("--sizes", type=int, nargs="+", default=[2004, 100000, 328521])
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--memory", action="store_true", help="peak RSS at N = 1,000,000 instead")
    ap.add_argument("--memory-exact", action="store_true", help="with --memory: also with exact_resamples")
    ap.add_argument("--primitives", action="store_true", help="time the draw primitives instead")
    args = ap.parse_args()
    if args.primitives:
        primitives()
        return
    if args.memory:
        # the chunk size (hence the peak) depends on N and the budget, not on B or on stopping:
        # the exact mode only takes longer (use --memory-exact to run it too)
        for mode in ("sequential", "exact") if args.memory_exact else ("sequential",):
            mb, out = memory(1_000_000, mode)
            print(f"N = 1,000,000 (5 x 4), {mode}: peak RSS {mb:.0f} MB (max over children so far); "
                  f"seconds and verdict: {out}", flush=True)
        return
    ref = args.ref
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
