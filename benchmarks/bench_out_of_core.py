"""Out-of-core benchmark: the DuckDB engine's full audit on a large Parquet file
against the in-memory path on the largest size it holds, in the same run.

    python benchmarks/make_big_parquet.py /tmp/rows_100m.parquet --rows 100000000
    python benchmarks/bench_out_of_core.py /tmp/rows_100m.parquet [--memory-rows 1000000] [--resamples 9999]

Each audit runs in a child process (so peak RSS is its own: ru_maxrss of the
child); the in-memory reference is a slice of the same generator at
--memory-rows.  Prints wall time and peak RSS of each, and the engine's pass
times.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)

CHILD = r"""
import json, resource, sys, time, warnings
warnings.simplefilter("ignore")
import audit
path, engine, resamples, calibration = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
t = time.perf_counter()
f = audit.check(path, response="strength", factors=("resin", "angle"), engine=engine, seed=1,
                resamples=resamples, calibration=calibration, progress=False)
wall = time.perf_counter() - t
rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps({"wall_s": wall, "peak_rss_mb": rss, "N": f.cells.N, "verdict": f.judgement.verdict.verdict,
                  "engine": f.provenance.get("engine", {}).get("seconds"),
                  "F_AB": f.anova.tables["III"].row("AB").F}))
"""


def run(path, engine, resamples, calibration):
    env = dict(os.environ, PYTHONPATH=ROOT)
    out = subprocess.run([sys.executable, "-c", CHILD, path, engine, str(resamples), str(calibration)],
                         capture_output=True, text=True, env=env, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("parquet")
    ap.add_argument("--memory-rows", type=int, default=1_000_000)
    ap.add_argument("--resamples", type=int, default=9999)
    ap.add_argument("--calibration", type=int, default=2000)
    a = ap.parse_args(argv)
    sys.path.insert(0, HERE)
    from make_big_parquet import write

    print(f"engine duckdb on {a.parquet} (resamples {a.resamples}, size check {a.calibration}):", flush=True)
    e = run(a.parquet, "duckdb", a.resamples, a.calibration)
    print(f"  N = {e['N']:,}: {e['wall_s']:.1f} s, peak RSS {e['peak_rss_mb']:.0f} MB, passes {e['engine']}, "
          f"verdict {e['verdict']}", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        small = write(os.path.join(tmp, "mem.parquet"), a.memory_rows, chunk=min(a.memory_rows, 5_000_000), seed=1)
        m = run(small, "memory", a.resamples, a.calibration)
        print(f"in-memory path at N = {m['N']:,}: {m['wall_s']:.1f} s, peak RSS {m['peak_rss_mb']:.0f} MB", flush=True)
        d = run(small, "duckdb", a.resamples, a.calibration)
        print(f"engine duckdb at N = {d['N']:,}: {d['wall_s']:.1f} s, peak RSS {d['peak_rss_mb']:.0f} MB "
              f"(F_AB {d['F_AB']:.6f} vs memory {m['F_AB']:.6f})", flush=True)
    print(f"rows per second: engine {e['N'] / e['wall_s']:,.0f}, memory {m['N'] / m['wall_s']:,.0f}")


if __name__ == "__main__":
    main()
