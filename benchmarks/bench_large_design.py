"""Benchmark: the whole audit on designs with many cells.

Invented scenario: a greenhouse trial, leaf area (cm^2) by seed lot (L levels) x
irrigation (2 levels), two plants per combination (L x 2, n = 2, 4 L rows), at
L = 100, 400 and 1,000; and a 30 x 30 design (fertiliser blend x soil batch,
n = 3, 2,700 rows).

Each design runs ``audit.check`` with every diagnostic and method, with
``resamples=0`` and ``resamples=999`` (the size check of the verdict is timed
separately, see below), and ``fit_observations`` alone.

The reference, measured in the same run, is the previous dense algebra patched
back in (``dense_reference``): the additive model by a dense weighted
least-squares solve over all J*K cells and J+K-1 parameters
(``weighted_ls_residual`` on ``additive_design``) and the Type III Wald forms
through the r x r system of their contrast matrices.  It is timed at L = 100
and 200 only; the figures at L = 400 and 1,000 are EXTRAPOLATED from the L = 200
run (the dense solves grow as L^3; the rest of the audit is counted as in the
new run) and printed as such.

Many cells in both factors (``--square J``, default 150): a J x J design (baker's
trial, crumb weight by flour lot x oven, n = 2 per cell, and n = 1-2 drawn at random),
``audit.check`` with its defaults (9,999 resamples, the 2,000-replication size check)
and ``twoway-audit check`` on the same data as a CSV, each in a fresh process: wall
time and peak RSS (``resource.getrusage``; the acceptance target is under 1 GB and
60 s at 150 x 150, n = 2).  Before the structured homogeneity check and Wald forms a
50 x 50 design reached 0.45 GB in the homogeneity check alone, 150 x 150 passed 8 GB.

Run from the repository root:  python benchmarks/bench_large_design.py [--quick] [--square J]
"""

from __future__ import annotations

import contextlib
import os
import subprocess
import sys
import tempfile
import textwrap
import time

import numpy as np
import pandas as pd

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import audit  # noqa: E402
import audit.core as core  # noqa: E402
import audit.diagnostics.influence as influence  # noqa: E402
import audit.methods.ranks as ranks  # noqa: E402
import audit.methods.wald as wald  # noqa: E402
from audit.fit import fit_observations  # noqa: E402
from audit.intake import load  # noqa: E402


def _dense_additive_residual(n, t):
    n = np.asarray(n, dtype=float)
    J, K = n.shape
    r, rank = core.weighted_ls_residual(core.additive_design(J, K), n.ravel(), np.asarray(t, float).ravel())
    return r.reshape(J, K), rank


def _dense_type3_main_wald(means, v, J, K, effect):
    C = np.kron(core.contrast_matrix(J), np.ones((1, K)) / K) if effect == "A" else \
        np.kron(np.ones((1, J)) / J, core.contrast_matrix(K))
    Cy = np.asarray(means) @ C.T
    M = (C * np.asarray(v)[..., None, :]) @ C.T
    return np.sum(Cy * np.linalg.solve(M, Cy[..., None])[..., 0], axis=-1)


@contextlib.contextmanager
def dense_reference():
    """The previous dense solves, patched into every module that uses them."""
    saved = [(core, "additive_residual"), (influence, "additive_residual"),
             (core, "type3_main_wald"), (ranks, "type3_main_wald"), (wald, "_DENSE_WORK")]
    old = [getattr(m, a) for m, a in saved]
    core.additive_residual = influence.additive_residual = _dense_additive_residual
    core.type3_main_wald = ranks.type3_main_wald = _dense_type3_main_wald
    wald._DENSE_WORK = float("inf")
    try:
        yield
    finally:
        for (m, a), o in zip(saved, old):
            setattr(m, a, o)


def long_design(L: int, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(L), 4)
    b = np.tile([0, 0, 1, 1], L)
    y = 60 + 2.0 * (a % 7) + 8.0 * b + 3.0 * (a % 9 == 0) * b + rng.gamma(6.0, 1.0, a.size)
    return pd.DataFrame({"leaf_cm2": y, "lot": [f"lot-{i:04d}" for i in a],
                         "water": np.where(b == 0, "low", "high")})


def square_design(seed: int = 2) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(30), 90)
    b = np.tile(np.repeat(np.arange(30), 3), 30)
    y = 40 + 0.5 * a + 0.3 * b + 0.05 * (a * b % 11) + rng.gamma(5.0, 1.0, a.size)
    return pd.DataFrame({"leaf_cm2": y, "lot": [f"blend-{i:02d}" for i in a],
                         "water": [f"soil-{i:02d}" for i in b]})


def timed(frame, resamples):
    t0 = time.perf_counter()
    f = audit.check(frame, response="leaf_cm2", factors=("lot", "water"), resamples=resamples, seed=7,
                    calibration=0)
    return time.perf_counter() - t0, f


def timed_fit(frame):
    obs = load(frame, response="leaf_cm2", factors=("lot", "water"))
    t0 = time.perf_counter()
    fit = fit_observations(obs)
    return time.perf_counter() - t0, fit


def main(quick: bool = False) -> None:
    audit.check(long_design(5), response="leaf_cm2", factors=("lot", "water"), resamples=0,
                calibration=0)  # warm up imports
    print("reference: the previous dense solves (measured at L = 100, 200)", flush=True)
    ref = {}
    for L in (100, 200):
        frame = long_design(L)
        with dense_reference():
            tf, fit_old = timed_fit(frame)
            tc, f_old = timed(frame, 0)
        tf_new, fit_new = timed_fit(frame)
        tc_new, f_new = timed(frame, 0)
        d = max(abs(fit_old.anova.tables[t].row(e).ss / fit_new.anova.tables[t].row(e).ss - 1.0)
                for t in ("I", "II", "III") for e in ("A", "B", "AB"))
        ref[L] = (tf, tc, tc_new)
        print(f"  L = {L:4d}: dense fit_observations {tf:6.2f} s (structured {tf_new:5.3f} s); dense check "
              f"(resamples 0) {tc:6.2f} s (structured {tc_new:5.2f} s, x{tc / tc_new:.1f}); max relative SS "
              f"difference {d:.1e}", flush=True)
    sizes = (100, 400) if quick else (100, 400, 1000)
    for L in sizes:
        frame = long_design(L)
        tf, _ = timed_fit(frame)
        t0, _ = timed(frame, 0)
        t999, f = timed(frame, 999)
        if L in ref:
            old_f, old_c, how = ref[L][0], ref[L][1], "measured"
        else:
            s = (L / 200) ** 3
            # dense part of the L = 200 run scaled as L^3, the rest as in the new run
            old_f = ref[200][0] * s
            old_c = (ref[200][1] - ref[200][2]) * s + t0
            how = "EXTRAPOLATED (L^3 from the L = 200 dense run; not run)"
        print(f"L = {L:5d} x 2 ({4 * L:5d} rows): fit_observations {tf:6.3f} s, check resamples 0 {t0:6.2f} s, "
              f"resamples 999 {t999:6.2f} s; previous dense: fit ~{old_f:8.1f} s, check ~{old_c:8.1f} s "
              f"[{how}] -> fit x{old_f / tf:,.0f}, check x{old_c / t0:,.1f}", flush=True)
    frame = square_design()
    tf, _ = timed_fit(frame)
    t0, _ = timed(frame, 0)
    t999, _ = timed(frame, 999)
    with dense_reference():
        tfo, _ = timed_fit(frame)
        t0o, _ = timed(frame, 0)
    print(f"30 x 30 (2,700 rows): fit_observations {tf:6.3f} s (dense {tfo:6.3f} s), check resamples 0 "
          f"{t0:6.2f} s (dense {t0o:6.2f} s, measured), resamples 999 {t999:6.2f} s", flush=True)
    # the verdict's size check (default 2,000 simulated datasets) on its own
    for L in (100,):
        frame = long_design(L)
        t0 = time.perf_counter()
        try:
            audit.check(frame, response="leaf_cm2", factors=("lot", "water"), resamples=0, seed=7)
            print(f"L = {L} check with the default size check: {time.perf_counter() - t0:.2f} s", flush=True)
        except Exception as exc:  # noqa: BLE001 - reported, not hidden
            print(f"L = {L} check with the default size check FAILED: {type(exc).__name__}: {exc}", flush=True)


_CHILD = textwrap.dedent("""
    import resource, sys, time
    import numpy as np, pandas as pd
    J, n_lo, n_hi, mode, path = int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), sys.argv[4], sys.argv[5]
    if mode == "cli":
        import subprocess
        t0 = time.perf_counter()
        r = subprocess.run([sys.executable, "-m", "audit", "check", path, "--response", "crumb_g",
                            "--factors", "lot", "oven", "--json", path + ".json"], capture_output=True, text=True)
        wall = time.perf_counter() - t0
        rss = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        err = r.stderr.strip().splitlines()[-1] if r.returncode == 2 else ""
        print(f"{wall:.1f} {rss:.0f} exit={r.returncode} {err}")
    else:
        import audit
        frame = pd.read_csv(path)
        t0 = time.perf_counter()
        f = audit.check(frame, response="crumb_g", factors=("lot", "oven"))
        wall = time.perf_counter() - t0
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        print(f"{wall:.1f} {rss:.0f} verdict={f.judgement.verdict.verdict if f.judgement else None}")
""")


def square_frame(J: int, n_lo: int, n_hi: int, seed: int = 3) -> pd.DataFrame:
    """Invented baker's trial: crumb weight (g) by flour lot x oven, n_lo..n_hi loaves per cell."""
    rng = np.random.default_rng(seed)
    n = rng.integers(n_lo, n_hi + 1, size=(J, J))
    a = np.repeat(np.repeat(np.arange(J), J), n.ravel())
    b = np.repeat(np.tile(np.arange(J), J), n.ravel())
    y = 410 + 0.2 * a - 0.1 * b + 2.0 * ((a * b) % 13 == 0) + rng.normal(0, 6, a.size)
    return pd.DataFrame({"crumb_g": np.round(y, 2), "lot": [f"lot{i:03d}" for i in a],
                         "oven": [f"oven{i:03d}" for i in b]})


def square(J: int = 150) -> None:
    """Whole-audit wall time and peak RSS of a J x J design, API and command line, fresh processes."""
    env = dict(os.environ, PYTHONPATH=os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    with tempfile.TemporaryDirectory() as tmp:
        for n_lo, n_hi in ((2, 2), (1, 2)):
            frame = square_frame(J, n_lo, n_hi)
            path = os.path.join(tmp, f"square_{J}_{n_lo}_{n_hi}.csv")
            frame.to_csv(path, index=False)
            for mode in ("api", "cli"):
                out = subprocess.run([sys.executable, "-c", _CHILD, str(J), str(n_lo), str(n_hi), mode, path],
                                     capture_output=True, text=True, env=env)
                if out.returncode:
                    print(f"{J} x {J}, n = {n_lo}-{n_hi}, {mode}: FAILED {out.stderr.strip()[-300:]}", flush=True)
                    continue
                wall, rss, rest = out.stdout.split(maxsplit=2)
                label = "audit.check (defaults)" if mode == "api" else "twoway-audit check (CSV, --json)"
                print(f"{J} x {J}, n = {n_lo}-{n_hi} ({len(frame):,} rows): {label}: {wall} s, peak RSS {rss} MB "
                      f"[{rest.strip()}]", flush=True)


if __name__ == "__main__":
    if "--square" in sys.argv:
        i = sys.argv.index("--square")
        square(int(sys.argv[i + 1]) if len(sys.argv) > i + 1 and sys.argv[i + 1].isdigit() else 150)
    else:
        main(quick="--quick" in sys.argv)
