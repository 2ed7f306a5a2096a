"""Benchmark: `twoway-audit run --cache` rerun against an uncached run, measured in the same run.

The worked example repository (fixtures/example-repo: an invented sourdough study, two data
files and a cell table, default resamples 9,999 and size check 2,000) is copied to a temporary
folder and run

1. in-process (``audit.runner.run_config``, imports already loaded): uncached, then with an
   empty cache (fills it), then cached; best of ``--repeats``;
2. as the command (``python -m audit run --cache DIR --json OUT``, a subprocess, interpreter
   start and imports included): uncached and cached.

Both cached runs must give the same combined JSON as the uncached one.
Target: the cached rerun at least 10 times faster than the uncached run (in-process figure).

Run from the repository root:  python benchmarks/bench_run_cache.py [--repeats 3]
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

from audit.config import load_config  # noqa: E402
from audit.runner import render_json, run_config  # noqa: E402

EXAMPLE = os.path.join(ROOT, "fixtures", "example-repo")


def best(fn, repeats: int):
    times, out = [], None
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return min(times), out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        repo = os.path.join(tmp, "repo")
        shutil.copytree(EXAMPLE, repo)
        cfg = os.path.join(repo, "pyproject.toml")
        cache = os.path.join(tmp, "cache")
        config = load_config(cfg)
        run_config(config)  # warm-up: imports and first-call costs
        t_plain, plain = best(lambda: render_json(run_config(load_config(cfg))), args.repeats)
        run_config(config, cache=cache)  # fills the cache
        t_cached, cached = best(lambda: render_json(run_config(load_config(cfg), cache=cache)), args.repeats)
        assert cached == plain, "cached rerun gave a different JSON"
        print(f"in-process, {len(config.audits)} audits (best of {args.repeats}):")
        print(f"  uncached run        {t_plain * 1000:9.1f} ms")
        print(f"  cached rerun        {t_cached * 1000:9.1f} ms")
        print(f"  speed-up            {t_plain / t_cached:9.1f} x   (target >= 10 x)")

        env = {**os.environ, "PYTHONPATH": ROOT}
        cache2 = os.path.join(tmp, "cache2")

        def cli(*extra, out):
            t = time.perf_counter()
            r = subprocess.run([sys.executable, "-m", "audit", "run", "--json", out, *extra], cwd=repo, env=env,
                               capture_output=True, text=True)
            assert r.returncode in (0, 1), r.stderr
            return time.perf_counter() - t

        c_plain = cli(out=os.path.join(tmp, "a.json"))
        cli("--cache", cache2, out=os.path.join(tmp, "b.json"))
        c_cached = cli("--cache", cache2, out=os.path.join(tmp, "c.json"))
        with open(os.path.join(tmp, "a.json"), "rb") as a, open(os.path.join(tmp, "c.json"), "rb") as c:
            assert a.read() == c.read(), "cached command gave a different JSON"
        print("command as a subprocess (interpreter start and imports included):")
        print(f"  uncached run        {c_plain * 1000:9.1f} ms")
        print(f"  cached rerun        {c_cached * 1000:9.1f} ms")
        print(f"  speed-up            {c_plain / c_cached:9.1f} x")


if __name__ == "__main__":
    main()
