"""Sequential stopping of the resampling methods (audit/methods/resampling.py:
SequentialBoundaries, run_jobs) and the shared draws (permutation_all, the wild bootstrap's
one sign stream).

Checks against outside references: binomial probabilities from scipy.stats.binom (the
boundaries' spent risk), the 99% binomial band of scipy.stats.binom for the size simulation,
and exact properties of the seeded stream (a sequential result equals a full run with B equal
to the resamples it used; shared draws equal separate draws from the same seed)."""

import os
import sys

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from audit.fit import fit_observations
from audit.intake import load
from audit.methods.bootstrap import wild_bootstrap, wild_bootstrap_all
from audit.methods.permutation import (
    freedman_lane,
    freedman_lane_all,
    permutation_all,
    studentized_permutation_all,
    ter_braak,
    ter_braak_all,
)
from audit.methods.resampling import SEQUENTIAL_RISK, STOPPING_RULE, SequentialBoundaries, clopper_pearson

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _frame(seed=7, J=3, K=4, n=7, inter=0.0):
    rng = np.random.default_rng(seed)
    a = np.repeat(np.arange(J), K * n)
    b = np.tile(np.repeat(np.arange(K), n), J)
    y = 3 + 0.8 * a - 0.4 * b + inter * (a == 1) * (b == 2) + rng.normal(size=a.size) * (1 + 0.2 * b)
    return pd.DataFrame({"y": y, "a": [f"a{i}" for i in a], "b": [f"b{i}" for i in b]})


def _fit(df):
    return fit_observations(load(df, response="y", factors=("a", "b")))


# --------------------------------------------------------------- boundaries

def test_boundaries_spend_at_most_the_risk_under_p_alpha():
    # reference: scipy.stats.binom.  Without any earlier stop, the first upper boundary U_n is the
    # smallest j with P(Bin(n, alpha) >= j) <= eps n / (n + k) (nothing spent before); and the whole
    # risk spent on either side stays below eps (Gandy 2009, the construction of the boundaries)
    r = SequentialBoundaries(0.05, 1e-3, 1000)
    r.extend(3000)
    for n in (5, 10, 20):
        eps_n = 1e-3 * n / (n + 1000)
        j = next(j for j in range(n + 2) if stats.binom.sf(j - 1, n, 0.05) <= eps_n)
        # the first n with a possible stop carries nothing spent before; later ones may only be lower
        assert r.upper[n] <= j
    first = int(np.argmax(r.upper[1:] <= np.arange(1, 3001))) + 1
    eps_f = 1e-3 * first / (first + 1000)
    assert r.upper[first] == next(j for j in range(first + 2) if stats.binom.sf(j - 1, first, 0.05) <= eps_f)
    su, sl = r._spent
    assert 0 < su <= 1e-3 and 0 < sl <= 1e-3
    # the lower boundary: S = 0 first stops where (1 - alpha)^n <= eps_n (nothing spent before it)
    n0 = int(np.argmax(r.lower >= 0))
    assert (0.95 ** n0 <= 1e-3 * n0 / (n0 + 1000)) and not (0.95 ** (n0 - 1) <= 1e-3 * (n0 - 1) / (n0 - 1 + 1000))
    # monotone and ordered
    assert (np.diff(r.upper) >= 0).all() and (np.diff(r.lower) >= 0).all() and (r.lower < r.upper).all()


def test_boundary_risk_by_simulation_at_p_alpha():
    # common practice: simulate the stopped walk at the worst case p = alpha; each side is hit with
    # probability at most eps (bounded, not attained: the rest never stops)
    r = SequentialBoundaries(0.05, 0.05, 1000)          # a large risk so the check has power
    r.extend(2000)
    rng = np.random.default_rng(3)
    X = rng.random((4000, 2000)) < 0.05
    S = np.cumsum(X, axis=1)
    n = np.arange(1, 2001)
    up = S >= r.upper[n]
    low = S <= r.lower[n]
    hit = up | low
    first = np.where(hit.any(axis=1), hit.argmax(axis=1), -1)
    rows = np.flatnonzero(first >= 0)
    frac_up = np.mean(up[rows, first[rows]]) * rows.size / 4000
    frac_low = np.mean(low[rows, first[rows]]) * rows.size / 4000
    for f in (frac_up, frac_low):
        lo, _ = clopper_pearson(int(round(f * 4000)), 4000)
        assert lo <= 0.05


# --------------------------------------------------------------- the stream

def test_sequential_equals_exact_run_with_the_resamples_used():
    # exact property: an effect frozen after n resamples reports what a run of B = n gives
    fit = _fit(_frame())
    seq = freedman_lane_all(fit, resamples=4999, seed=11)
    assert any(r.extra["stopped_early"] for r in seq)
    for r in seq:
        assert r.extra["max_resamples"] == 4999 and r.extra["stopping_rule"] == STOPPING_RULE
        ref = freedman_lane_all(fit, resamples=r.resamples, seed=11, exact_resamples=True, effects=(r.effect,))[0]
        assert ref.p == r.p and ref.extra["count"] == r.extra["count"]
        if r.extra["stopped_early"]:
            assert r.extra["settled"] and any("stopped early" in n for n in r.notes)
    ex = freedman_lane_all(fit, resamples=199, seed=11, exact_resamples=True)
    assert all(r.resamples == 199 and not r.extra["stopped_early"] for r in ex)
    assert ex[0].extra["stopping_rule"].startswith("none")


@pytest.mark.parametrize("exact", [True, False])
def test_shared_permutation_draw_equals_separate_draws(exact):
    # documented behaviour: the three permutation methods drawn once give the p-values each gets
    # alone from the same seed (they used the same permutations before: rng.permuted row by row)
    fit = _fit(_frame(inter=1.2))
    fl, tb, st = permutation_all(fit, resamples=999, seed=5, exact_resamples=exact)
    for shared, alone in ((fl, freedman_lane_all), (tb, ter_braak_all), (st, studentized_permutation_all)):
        sep = alone(fit, resamples=999, seed=5, exact_resamples=exact)

        def strip(rs):      # the largest chunk drawn depends on how long the other methods ran
            return [{**r.to_dict(), "extra": {k: v for k, v in r.extra.items() if k != "chunk_size"}} for r in rs]
        assert strip(shared) == strip(sep)


def test_wild_bootstrap_one_sign_draw_for_every_effect():
    # documented behaviour: every effect sees the same signs, as when each re-seeded the generator
    fit = _fit(_frame(inter=1.2))
    allr = wild_bootstrap_all(fit, resamples=999, seed=8, exact_resamples=True)
    for r in allr:
        one = wild_bootstrap(fit, effect=r.effect, resamples=999, seed=8, exact_resamples=True)
        assert one.p == r.p and one.extra["count"] == r.extra["count"]


def test_decisive_cases_stop_early_and_close_cases_do_not():
    big = _fit(_frame(inter=6.0))
    for fn in (freedman_lane, ter_braak, wild_bootstrap):
        r = fn(big, resamples=9999, seed=2)
        assert r.extra["stopped_early"] and r.resamples < 1000 and r.p < 0.05
    # p = alpha exactly is never settled: a stream of exceedances at rate alpha runs to B
    # (checked on the rule, as data with p exactly alpha cannot be made)
    r = SequentialBoundaries(0.05)
    n = np.arange(1, 2001)
    assert r.first_stop(n, np.floor(0.05 * n).astype(np.int64))[0] == -1


# --------------------------------------------------------------- size (simulation)

@pytest.mark.slow
def test_sequential_tests_keep_their_size_and_agree_with_full_b():
    # 300 null datasets (3 x 3, n = 6, normal errors), alpha = 0.05, B = 199 maximum; the
    # 2,000-dataset run is benchmarks/bench_sequential.py (figures in benchmarks/README.md).
    # reference: the central 99% band of Binomial(300, 0.05) / 300 (scipy.stats.binom quantiles)
    sys.path.insert(0, ROOT)
    from benchmarks.bench_sequential import band, simulate

    R = 300
    out = simulate(R, 199, seed=2024)
    lo, hi = band(R)
    for mid, o in out.items():
        assert lo <= o["reject"] / R <= hi, (mid, o)
        assert o["early"] > 0.5 * R, (mid, o)
        # disagreements with a settled full-B decision: consistent with a risk <= 1e-3
        # (the lower end of their 99% Clopper-Pearson interval does not exceed it)
        assert clopper_pearson(o["disagree_settled"], R)[0] <= SEQUENTIAL_RISK, (mid, o)
