"""Benchmark: the whole audit (default options) at N = 2,004 (4 x 3) with this tree's
``audit`` against another tree's (by default the main worktree), in the same run.

Invented scenario: the varnish drying-time frame of bench_calibration.py (unbalanced cells,
unequal variances).  Each tree runs in its own fresh subprocess (PYTHONPATH set to it), the
two alternate, and each subprocess reports the best of ``--repeats`` timed audits after one
warm-up audit (imports and first-call costs excluded).  Prints both times and their ratio.

Target (issue 19): this tree no slower than 1.3 times the reference.

Run from the repository root:
    nice python benchmarks/bench_verdict_vs_main.py [--reference /work/main] [--rounds 3] [--repeats 3]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, os.path.join(ROOT, "benchmarks"))

CHILD = r"""
import sys, time
import pandas as pd
import audit
df = pd.read_csv(sys.argv[1])
kw = dict(response="drying_min", factors=("resin", "coat"), seed=7, timestamp=False)
audit.check(df, **kw)
best = min((lambda t0: (audit.check(df, **kw), time.perf_counter() - t0)[1])(time.perf_counter())
           for _ in range(int(sys.argv[2])))
print(best)
"""


def run(tree: str, csv: str, repeats: int) -> float:
    env = dict(os.environ, PYTHONPATH=tree)
    out = subprocess.run([sys.executable, "-c", CHILD, csv, str(repeats)], env=env, cwd=tree,
                         capture_output=True, text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--reference", default="/work/main")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args(argv)
    from bench_calibration import make_frame

    frame = make_frame()
    with tempfile.TemporaryDirectory() as tmp:
        csv = os.path.join(tmp, "frame.csv")
        frame.to_csv(csv, index=False)
        ref, this = [], []
        for _ in range(a.rounds):
            ref.append(run(a.reference, csv, a.repeats))
            this.append(run(ROOT, csv, a.repeats))
    r, t = min(ref), min(this)
    print(f"N = {len(frame):,}, 4 x 3, default options: reference ({a.reference}) {r:.3f} s, this tree {t:.3f} s, "
          f"ratio {t / r:.2f} (best of {a.rounds} x {a.repeats})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
