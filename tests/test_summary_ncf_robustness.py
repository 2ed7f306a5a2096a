"""Summary mode and the noncentral F at extreme magnitudes (robustness; inputs generated here).

Failures this file keeps fixed: cell means and SDs near 1e300 (OverflowError in the rounding
ranges) and near 1e-300 (TypeError, abs(None)); n = 1e300 (C-long overflow) and n = 1e15 (a
C++ abort inside scipy's noncentral F under the effect-size interval); a raw dataset whose
within-cell SD is 1e-7 of the cell differences (minutes in the interval's root search);
summary-table levels '1', '1.0', '2' kept as three levels.
"""

from __future__ import annotations

import math
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import audit
from audit.core import (NCF_ROUTE_APPROX, ncf_cdf, ncf_tail, ncf_tail_asymptotic, partial_eta_sq_interval)
from audit.design import MAX_CELL_SIZE
from audit.errors import FactorError, ResponseError
from audit.verdict.sensitivity import detectable_noncentrality, equivalence_test

# an invented 2 x 3 table (mantissas; scaled by 10^k below)
MEANS = np.array([[10.2, 11.5, 9.8], [12.1, 10.4, 13.3]])
SDS = np.array([[2.1, 1.8, 2.5], [1.9, 2.2, 2.0]])
NS = np.array([[6, 7, 5], [8, 6, 7]])


def _table(k: int = 0, n=None) -> pd.DataFrame:
    # the values written as decimal text times 10^k, so each is the correctly rounded double
    rows = []
    for j in range(2):
        for i in range(3):
            rows.append({"a": f"a{j}", "b": f"b{i}", "mean": float(f"{float(MEANS[j, i])!r}e{k}"),
                         "sd": float(f"{float(SDS[j, i])!r}e{k}"), "n": int(NS[j, i]) if n is None else n})
    return pd.DataFrame(rows)


def _digest(f):
    tests = {(t, r.effect): (r.F, r.p) for t in ("I", "II", "III") for r in f.anova.tables[t].rows
             if r.F is not None}
    grades = {d.id: d.severity for d in f.diagnostics}
    return tests, grades, f.judgement.verdict.verdict


_BASE = None


def _base():
    global _BASE
    if _BASE is None:
        _BASE = _digest(audit.check_summary(_table(0), factors=("a", "b"), seed=0))
    return _BASE


@pytest.mark.parametrize("k", [-300, -299, -250, -200, -150, -100, -50, -10, -1, 1, 10, 50, 100, 150, 200, 250,
                               299, 300])
def test_summary_scale_sweep_same_F_p_grades(k):
    # common practice: every statistic is invariant under y -> c y; the table at 10^k must give the
    # same F and p (rtol 1e-9) for every effect and SS type, the same grades and the same verdict
    tests0, grades0, verdict0 = _base()
    f = audit.check_summary(_table(k), factors=("a", "b"), seed=0)
    tests, grades, verdict = _digest(f)
    assert tests.keys() == tests0.keys()
    for key, (F0, p0) in tests0.items():
        np.testing.assert_allclose(tests[key], (F0, p0), rtol=1e-9, atol=0, err_msg=f"k={k} {key}")
    assert grades == grades0
    assert verdict == verdict0
    assert f.to_dict()          # the JSON passes the strict meta-check (conftest)


def test_rounding_range_scale_free_at_extremes():
    # common practice: the F range over every table that rounds to the printed one is scale-free
    # (the printed precision is relative: repr of 1.02e300 and of 10.2 carry 3 significant digits)
    ranges = {}
    for k in (-300, 300):
        f = audit.check_summary(_table(k), factors=("a", "b"), seed=0)
        d = next(d for d in f.diagnostics if d.id == "rounding")
        assert d.values["available"] and d.values["F_ranges"]
        ranges[k] = (d.values["F_min"], d.values["F_max"])
    assert all(math.isfinite(x) for r in ranges.values() for x in r)


def test_granularity_runs_at_extreme_magnitudes():
    # common practice (GRIM, Brown & Heathers 2017): a mean far outside a 1-7 scale is a range error,
    # reported as a finding, never an exception, at any magnitude or number of decimals
    for k in (-300, 300):
        f = audit.check_summary(_table(k), factors=("a", "b"), seed=0, scale_items=1, scale_min=1, scale_max=7)
        d = next(d for d in f.diagnostics if d.id == "granularity")
        assert d.severity in ("clear", "concern", "critical")


@pytest.mark.parametrize("n", [10**15, 10**300, MAX_CELL_SIZE + 1])
def test_cell_size_above_maximum_is_one_line_typed_error(n):
    # common practice: a cell size beyond MAX_CELL_SIZE (10^12) is not a count of observations
    with pytest.raises(ResponseError) as e:
        audit.check_summary(_table(0, n=n), factors=("a", "b"), seed=0)
    msg = str(e.value)
    assert "\n" not in msg and "MAX_CELL_SIZE" in msg and "'n'" in msg


def test_cell_size_above_maximum_cli_exit_2(tmp_path):
    p = tmp_path / "cells.csv"
    _table(0, n=10**15).to_csv(p, index=False)
    r = subprocess.run([sys.executable, "-m", "audit", "check-summary", str(p), "--factors", "a", "b",
                        "--mean", "mean", "--sd", "sd", "--n", "n"], capture_output=True, text=True, timeout=120)
    assert r.returncode == 2
    assert len(r.stderr.strip().splitlines()) == 1 and "MAX_CELL_SIZE" in r.stderr


def test_cell_size_at_maximum_runs():
    # n = 10^12 per cell (the stated maximum): a result, F and p checked against scipy's F
    f = audit.check_summary(_table(0, n=MAX_CELL_SIZE), factors=("a", "b"), seed=0)
    r = f.anova.tables["II"].row("AB")
    assert r.F is not None and math.isfinite(r.F)
    # reference: scipy.stats.f.sf at the table's own F and df
    assert r.p == pytest.approx(float(stats.f.sf(r.F, r.df, f.anova.df_error)), rel=1e-9, abs=1e-300)


_ABORT_SCRIPT = """
import math, sys
from audit.core import partial_eta_sq_interval, ncf_tail
ci, note = partial_eta_sq_interval(6.016860879904876e17, 1, 3999999999999996)
assert ci is not None and 0.99 < ci[0] <= ci[1] <= 1.0, (ci, note)
for lam in (6.016860880068502e17, 1e12, 1e300):
    for upper in (False, True):
        v, _ = ncf_tail(6.016860879904876e17, 1, 3999999999999996, lam, upper=upper)
        assert math.isnan(v) or 0.0 <= v <= 1.0
print("ok")
"""


def test_no_abort_where_scipy_ncf_aborts():
    # source: scipy.stats.ncf.sf(6.016860879904876e17, 1, 3999999999999996, 6.016860880068502e17) aborts the
    # process (C++ std::out_of_range; the n = 1e15 table of a 2 x 2 design): run in a child process
    r = subprocess.run([sys.executable, "-c", _ABORT_SCRIPT], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr[-500:]
    assert r.stdout.strip() == "ok"


def _noise_dataset(rel: float) -> pd.DataFrame:
    # 45 rows, 3 x 3, n = 5: cell means differing by units, within-cell SD rel (invented)
    rng = np.random.default_rng(3)
    a = np.repeat(["a1", "a2", "a3"], 15)
    b = np.tile(np.repeat(["b1", "b2", "b3"], 5), 3)
    mu = np.array([[10, 12, 15], [11, 16, 13], [14, 10, 12]], dtype=float)
    y = mu[np.repeat(np.arange(3), 15), np.tile(np.repeat(np.arange(3), 5), 3)] + rng.standard_normal(45) * rel
    return pd.DataFrame({"a": a, "b": b, "y": y})


@pytest.mark.parametrize("rel", [1e-6, 1e-7, 1e-9])
def test_tiny_noise_dataset_finishes_fast(rel):
    # common practice: the whole audit of 45 rows takes seconds, whatever the F
    t = time.monotonic()
    f = audit.check(_noise_dataset(rel), response="y", factors=("a", "b"), seed=0)
    elapsed = time.monotonic() - t
    assert elapsed < 5.0, elapsed
    for t_ in ("I", "II", "III"):
        for r in f.anova.tables[t_].rows[:3]:
            assert r.F is not None and r.F > 1e10
            assert r.partial_eta_sq_ci is not None or "could not be computed" in (r.note or "")
            if r.partial_eta_sq_ci is not None:
                lo, hi = r.partial_eta_sq_ci
                assert 0.999 < lo <= hi <= 1.0


def test_summary_levels_numeric_spellings_merged_with_note():
    # common practice (check mode's rule): '1' and '1.0' are one level, with a note
    d = pd.DataFrame({"a": ["a0", "a0", "a1", "a1"], "b": ["1", "2", "1.0", "2"], "mean": [1.2, 2.3, 3.1, 2.2],
                      "sd": [1.1, 1.2, 1.3, 1.0], "n": [5, 5, 5, 5]})
    f = audit.check_summary(d, factors=("a", "b"), seed=0)
    assert f.design.levels["b"] == ("1", "2")
    assert any("'1', '1.0'" in note and "merged" in note for note in f.design.notes)
    assert f.anova.df_interaction == 1


def test_summary_levels_merged_duplicate_cell_and_text_errors():
    d = pd.DataFrame({"a": ["a0", "a0", "a0", "a1", "a1"], "b": ["1", "1.0", "2", "1", "2"],
                      "mean": [1.2, 1.4, 2.3, 3.1, 2.2], "sd": [1.1, 1.1, 1.2, 1.3, 1.0], "n": [5] * 5})
    with pytest.raises(audit.errors.AuditInputError, match="already appears"):
        audit.check_summary(d, factors=("a", "b"), seed=0)
    d = pd.DataFrame({"a": ["a0", "a0", "a1", "a1", "a0"], "b": ["1", "2", "1.0", "2", "low"],
                      "mean": [1.2, 2.3, 3.1, 2.2, 1.0], "sd": [1.1, 1.2, 1.3, 1.0, 1.0], "n": [5] * 5})
    with pytest.raises(FactorError, match="same number"):
        audit.check_summary(d, factors=("a", "b"), seed=0)


@pytest.mark.parametrize("df1,df2,lam", [(1, 36, 1e5), (15, 36, 1e5), (4, 5, 1e6), (15, 1000, 1e5), (2, 1e5, 1e6),
                                         (4, 36, 1e8)])
def test_asymptotic_route_against_scipy_where_defined(df1, df2, lam):
    # reference: scipy.stats.ncf.cdf inside the range where it returns a number, to 1e-8
    kl = df1 + lam
    sd = math.sqrt(2 * (df1 + 2 * lam)) / kl + math.sqrt(2 / df2)
    for z in (-3.0, -1.0, 0.0, 1.0, 3.0):
        F = kl / df1 * math.exp(z * sd)
        ref = float(stats.ncf.cdf(F, df1, df2, lam))
        assert np.isfinite(ref)
        lo = ncf_tail_asymptotic(F, df1, df2, lam)
        hi = ncf_tail_asymptotic(F, df1, df2, lam, upper=True)
        assert lo == pytest.approx(ref, abs=1e-8)
        assert lo + hi == pytest.approx(1.0, abs=1e-12)


def test_asymptotic_route_infinite_df2_is_noncentral_chi_square():
    # reference: scipy.stats.ncx2 (the df2 -> infinity limit of F' df1)
    for lam in (1e2, 1e5):
        x = (2 + lam) / 2 * 1.01
        assert ncf_tail(x, 2, math.inf, lam)[0] == pytest.approx(float(stats.ncx2.cdf(x * 2, 2, lam)), abs=1e-8)


def test_ncf_tail_bad_arguments_are_nan():
    for args in ((1.0, 0, 10, 1.0), (1.0, 2, -1, 1.0), (math.nan, 2, 10, 1.0), (1.0, 2, 10, -1.0),
                 (1.0, 2, 10, math.inf)):
        assert math.isnan(ncf_cdf(*args))


def test_interval_at_huge_F_uses_approximation_with_note_and_is_fast():
    # common practice: at F = 1e14 on (4, 36) df the interval of partial eta^2 is just below 1
    t = time.monotonic()
    ci, note = partial_eta_sq_interval(1e14, 4, 36)
    assert time.monotonic() - t < 2.0
    assert ci is not None and 1 - 1e-10 < ci[0] < ci[1] <= 1.0
    assert note and "approximation" in note
    v, route = ncf_tail(1e14, 4, 36, 4e14)
    assert route == NCF_ROUTE_APPROX and 0.0 <= v <= 1.0


def test_sensitivity_and_equivalence_at_huge_df_and_bounds():
    # reference: the chi-square limit (df2 -> infinity) for df2 = 1e20; scipy gives 15.4 for its sf there
    lam_inf, _ = detectable_noncentrality(2, math.inf)
    lam, method = detectable_noncentrality(2, 1e20)
    assert lam == pytest.approx(lam_inf, rel=1e-6) and method is not None
    e = equivalence_test(6.0e17, 1, 4e15, bound_eta_sq=0.05)
    assert e.p is not None and 0.0 <= e.p <= 1.0 and e.equivalent is False
    e = equivalence_test(3.0, 2, 50, bound_rms=1e200, n_obs=10**12, ms_error=1e-300)
    assert e.p is None and e.note and e.bound_partial_eta_sq is None
