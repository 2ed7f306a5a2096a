"""Per-stage seconds of the in-memory audit at large N (300,000 and 1,000,000 rows).

Invented scenario (``make_big_parquet.py``): tensile strength of printed brackets by
resin (4) x print angle (5), unbalanced cells, spread growing with the cell mean.

    python benchmarks/bench_large_memory.py                    # 300,000 and 1,000,000 rows
    python benchmarks/bench_large_memory.py --rows 300000      # one size
    python benchmarks/bench_large_memory.py --no-total         # stages only

For each size the script writes the Parquet file into a temporary folder (seed 1, one
chunk), then times, in this process and in the order the audit runs them: ``load`` +
``fit_observations``, every diagnostic, every method family (B = 9,999 maximum,
sequential stopping, seed 1), the size check (R = 2,000, seed 1) and the verdict; then
the whole ``audit.check(path, engine="memory", seed=1)`` once more end to end (imports
already loaded).  Stage times are wall seconds (``time.perf_counter``); before/after
figures are recorded in benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))
sys.path.insert(0, HERE)

RESPONSE, FACTORS = "strength", ("resin", "angle")


def _t(label, fn, out):
    t0 = time.perf_counter()
    r = fn()
    out.append((label, time.perf_counter() - t0))
    return r


def stages(path):
    from audit.diagnostics.assumptions import homogeneity, normality
    from audit.diagnostics.design_checks import balance, independence, missingness
    from audit.diagnostics.influence import fragility, influence, outliers
    from audit.diagnostics.scale import scale, shape
    from audit.fit import fit_observations
    from audit.intake import load
    from audit.methods.bootstrap import wild_bootstrap_all
    from audit.methods.classical import classical_f_all
    from audit.methods.hc import hc_wald_all
    from audit.methods.permutation import permutation_all
    from audit.methods.ranks import aligned_rank_transform_all, rank_transform_all
    from audit.methods.welch import welch_james_all, welch_james_trimmed_all
    from audit.verdict.calibration import size_check
    from audit.verdict.judge import judge

    out = []
    obs = _t("load", lambda: load(path, response=RESPONSE, factors=FACTORS), out)
    fit = _t("fit", lambda: fit_observations(obs), out)
    diags = []
    for fn in (normality, homogeneity, balance, missingness, outliers, influence, fragility, shape, scale,
               independence):
        diags.append(_t(f"diag {fn.__name__}", lambda fn=fn: fn(fit), out))
    meths = []
    meths += _t("meth classical+welch+hc", lambda: (classical_f_all(fit) + welch_james_all(fit)
                                                     + hc_wald_all(fit, kind="hc3") + hc_wald_all(fit, kind="hc4")),
                out)
    meths += _t("meth welch-james-trimmed", lambda: welch_james_trimmed_all(fit), out)
    meths += _t("meth ranks (RT, ART)", lambda: rank_transform_all(fit) + aligned_rank_transform_all(fit), out)
    perm = _t("meth permutation (3)", lambda: permutation_all(fit, resamples=9999, seed=1), out)
    for r in perm:
        meths += r
    meths += _t("meth wild bootstrap", lambda: wild_bootstrap_all(fit, resamples=9999, seed=1), out)
    cal = _t("size check", lambda: size_check(fit, alpha=fit.alpha, seed=1), out)
    _t("verdict", lambda: judge(fit, diagnostics=tuple(diags), methods=tuple(meths), calibration=cal), out)
    return out, cal, meths


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, nargs="*", default=[300_000, 1_000_000])
    ap.add_argument("--no-total", action="store_true", help="skip the end-to-end audit.check run")
    a = ap.parse_args(argv)
    import audit
    from make_big_parquet import write

    with tempfile.TemporaryDirectory() as tmp:
        for rows in a.rows:
            path = os.path.join(tmp, f"mem{rows}.parquet")
            write(path, rows, chunk=rows, seed=1)
            out, cal, meths = stages(path)
            print(f"\nN = {rows:,}")
            for label, s in out:
                print(f"  {label:<28} {s:7.2f} s")
            print(f"  {'sum of stages':<28} {sum(s for _, s in out):7.2f} s")
            used = {m.id: m.resamples for m in meths if m.effect == "AB" and m.resamples is not None}
            if used:
                print(f"  AB resamples used: {used}")
            print("  size check AB: " + ", ".join(f"{r.method} {r.size if r.size is None else round(r.size, 4)}"
                                                  for r in cal.rows if r.effect == "AB"))
            if not a.no_total:
                t0 = time.perf_counter()
                audit.check(path, response=RESPONSE, factors=FACTORS, engine="memory", seed=1)
                print(f"  {'audit.check total':<28} {time.perf_counter() - t0:7.2f} s")


if __name__ == "__main__":
    main()
