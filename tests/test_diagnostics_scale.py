"""Shape (ordinal / crossover) and scale (log, Box-Cox) of the interaction.

References: statsmodels ols + anova_lm (interaction p on transformed data and
the full model's residual SS), scipy.special.boxcox (the transformation),
scipy.optimize.minimize_scalar (direct maximisation of the stated profile
likelihood, Box & Cox 1964), scipy.stats.chi2 (profile interval).
Invented data (a bakery-oven and a fish-farm scenario) only where the check is
a property of the method.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from scipy import optimize, special, stats
from statsmodels.stats.anova import anova_lm

from audit.design import cells_from_summary
from audit.diagnostics.scale import CROSSING_Z, scale, shape
from audit.fit import fit_cells, fit_observations
from audit.intake import load


def _json_ok(d):
    json.dumps(d.to_dict(), allow_nan=False)


def _frame(means, n, sd, *, seed, log_scale=False):
    """Invented: loaf volume (ml) of a bakery-oven trial, oven x flour, cells
    with the given means (or log-means) and sizes."""
    rng = np.random.default_rng(seed)
    means = np.asarray(means, dtype=float)
    n = np.broadcast_to(np.asarray(n), means.shape)
    recs = []
    for j in range(means.shape[0]):
        for k in range(means.shape[1]):
            e = rng.normal(0.0, sd, int(n[j, k]))
            v = np.exp(means[j, k] + e) if log_scale else means[j, k] + e
            recs += [(f"oven{j + 1}", f"flour{k + 1}", x) for x in v]
    return pd.DataFrame(recs, columns=["oven", "flour", "volume"])


def _fit(frame, alpha=0.05):
    return fit_observations(load(frame, response="volume", factors=("oven", "flour")), alpha=alpha)


def _ref_ab_p(frame, z):
    # reference: statsmodels ols + anova_lm(typ=2), AB row, on transformed response
    f = frame.assign(z=z)
    model = smf.ols("z ~ C(oven, Sum) * C(flour, Sum)", data=f).fit()
    return float(anova_lm(model, typ=2).loc["C(oven, Sum):C(flour, Sum)", "PR(>F)"])


def _ref_loglik(frame, lam):
    """Stated profile: l = -(N/2) log(SSE/N) + (lam - 1) sum log y, SSE of the
    full model on scipy.special.boxcox(y, lam), via a statsmodels fit."""
    y = frame.volume.to_numpy()
    z = special.boxcox(y, lam)  # reference: scipy.special.boxcox
    sse = smf.ols("z ~ C(oven) * C(flour)", data=frame.assign(z=z)).fit().ssr  # reference: statsmodels
    N = y.size
    return -(N / 2) * np.log(sse / N) + (lam - 1) * np.log(y).sum()


# -------------------------------------------------------------------- scale

def test_boxcox_lambda_equals_direct_maximisation():
    # unbalanced 3 x 2, right-skewed positive data
    counts = np.array([[8, 14], [11, 6], [9, 12]])
    frame = _frame([[3.0, 3.3], [3.5, 3.4], [3.9, 4.4]], counts, 0.35, seed=21, log_scale=True)
    fit = _fit(frame)
    d = scale(fit)
    v = d.values
    assert v["available"]
    # reference: scipy.optimize.minimize_scalar on the stated profile likelihood
    res = optimize.minimize_scalar(lambda t: -_ref_loglik(frame, t), bounds=(-3, 3), method="bounded",
                                   options={"xatol": 1e-9})
    assert abs(v["lambda_hat"] - res.x) < 1e-4
    assert_allclose(v["loglik_max"], _ref_loglik(frame, v["lambda_hat"]), rtol=1e-9)
    # profile values on the grid equal the stated formula
    for i in (0, 40, 80, 120):
        lam = v["profile_lambda"][i]
        assert_allclose(v["profile_loglik"][i], _ref_loglik(frame, lam), rtol=1e-9)
    # 95% profile interval: l(lo) = l(hi) = l_max - chi2_1(0.95)/2 (Box & Cox 1964)
    lo, hi = v["lambda_ci"]
    cut = v["loglik_max"] - stats.chi2.ppf(0.95, 1) / 2  # reference: scipy.stats.chi2
    assert lo < v["lambda_hat"] < hi
    assert_allclose([_ref_loglik(frame, lo), _ref_loglik(frame, hi)], [cut, cut], rtol=1e-9)
    assert v["lambda1_inside"] == (lo <= 1 <= hi)
    # the re-tests equal statsmodels on the transformed data
    y = frame.volume.to_numpy()
    assert_allclose(v["log_p"], _ref_ab_p(frame, np.log(y)), rtol=1e-9)
    assert_allclose(v["boxcox_p"], _ref_ab_p(frame, special.boxcox(y, v["lambda_hat"])), rtol=1e-8)
    assert_allclose(v["raw_p"], _ref_ab_p(frame, y), rtol=1e-10)
    assert len(v["profile_lambda"]) == len(v["profile_loglik"]) == 121
    _json_ok(d)


def test_multiplicative_effects_flagged_removable():
    # log-normal data, main effects multiplicative, no interaction on the log scale
    means = np.log([[20.0, 40.0, 60.0], [40.0, 80.0, 120.0], [80.0, 160.0, 240.0]])
    frame = _frame(means, 30, 0.15, seed=8, log_scale=True)
    fit = _fit(frame)
    d = scale(fit)
    v = d.values
    assert v["raw_p"] < 0.05                         # interaction on the raw scale
    assert v["log_p"] > 0.05 and v["lambda0_inside"]  # gone on the log scale
    assert v["removable"] is True and v["removable_at"]
    assert v["lambda1_inside"] is False
    assert d.severity == "concern"
    assert "removable" in d.summary
    # every lambda named as removing it lies inside the interval and really does
    lo, hi = v["lambda_ci"]
    y = frame.volume.to_numpy()
    for lam in v["removable_at"][:3]:
        assert lo - 1e-12 <= lam <= hi + 1e-12
        assert _ref_ab_p(frame, special.boxcox(y, lam)) >= 0.05  # reference: statsmodels
    # the same data are ordinal in both orientations (shape warns, Loftus 1978)
    s = shape(fit)
    assert s.values["shape"] == "ordinal" and s.severity == "concern"
    _json_ok(d)


def test_crossover_interaction_is_not_removable():
    means = [[60.0, 80.0], [80.0, 60.0]]
    frame = _frame(means, [[12, 15], [10, 14]], 3.0, seed=9)
    fit = _fit(frame)
    d = scale(fit)
    assert d.values["raw_p"] < 1e-6
    assert d.values["removable"] is False
    assert d.values["survives_log"] and d.values["survives_boxcox"]
    s = shape(fit)
    assert s.values["shape"] == "crossover" and s.severity == "clear"
    assert s.values["a_lines_across_b"]["beyond_noise"] and s.values["b_lines_across_a"]["beyond_noise"]


def test_non_positive_and_summary_mode_are_notes():
    frame = _frame([[1.0, 2.0], [2.0, 1.0]], 6, 1.5, seed=1)
    assert (frame.volume <= 0).any()
    d = scale(_fit(frame))
    assert d.severity == "minor" and d.values["available"] is False
    assert d.values["lambda_hat"] is None and "positive" in d.summary
    _json_ok(d)
    table = pd.DataFrame({"oven": ["o1", "o1", "o2", "o2"], "flour": ["f1", "f2", "f1", "f2"],
                          "mean": [10.0, 20.0, 20.0, 40.0], "sd": [1.0, 1.5, 1.2, 1.8], "n": [8, 9, 7, 8]})
    fit = fit_cells(cells_from_summary(table, factors=("oven", "flour")))
    d = scale(fit)
    assert d.severity == "not-run" and "raw observations" in d.summary
    # shape works from cell means alone
    s = shape(fit)
    assert s.values["shape"] == "ordinal"
    assert s.values["means"] == [[10.0, 20.0], [20.0, 40.0]]
    _json_ok(s)


# -------------------------------------------------------------------- shape

def _summary_fit(means, sd=1.0, n=10):
    means = np.asarray(means, dtype=float)
    J, K = means.shape
    table = pd.DataFrame({
        "a": [f"a{j}" for j in range(J) for _ in range(K)],
        "b": [f"b{k}" for _ in range(J) for k in range(K)],
        "mean": means.ravel(), "sd": sd, "n": n,
    })
    return fit_cells(cells_from_summary(table, factors=("a", "b")))


def test_shape_orientations_differ():
    # A lines cross across B (a0 - a1 = -2, +1, -1) but B lines never cross across A
    # (common practice: definition of ordinal vs disordinal interaction, Loftus 1978)
    fit = _summary_fit([[1.0, 5.0, 9.0], [3.0, 4.0, 10.0]], sd=0.5, n=20)
    s = shape(fit)
    ab, ba = s.values["a_lines_across_b"], s.values["b_lines_across_a"]
    assert ab["crosses"] and not ba["crosses"]
    assert ab["crossings"][0]["lines"] == ["a0", "a1"]
    # the strongest crossing is between b0 (-2) and b1 (+1); SE of a difference = sqrt(2 * 0.25/20)
    se = np.sqrt(2 * 0.25 / 20)
    assert set(ab["crossings"][0]["between"]) == {"b0", "b1"}
    assert_allclose(ab["crossings"][0]["strength"], 1.0 / se, rtol=1e-12)
    assert ab["beyond_noise"] and s.values["shape"] == "crossover"


def test_shape_crossing_within_noise_and_ties():
    fit = _summary_fit([[10.0, 10.1], [10.05, 10.0]], sd=1.0, n=8)
    s = shape(fit)
    assert s.values["shape"] == "crossover within noise"
    assert s.values["a_lines_across_b"]["crosses"] and not s.values["a_lines_across_b"]["beyond_noise"]
    assert s.values["a_lines_across_b"]["crossings"][0]["strength"] < CROSSING_Z
    # exact ties are not crossings: a1 equals a0 at b0 and is above at b1
    fit = _summary_fit([[5.0, 6.0], [5.0, 9.0]], sd=1.0, n=8)
    s = shape(fit)
    assert s.values["shape"] == "ordinal"
    assert not s.values["a_lines_across_b"]["crosses"] and not s.values["b_lines_across_a"]["crosses"]
    _json_ok(s)


def test_shape_empty_cell_uses_filled_pairs_only():
    counts = np.array([[6, 6, 6], [6, 0, 6]])
    means = [[10.0, 30.0, 20.0], [15.0, 0.0, 12.0]]
    rng = np.random.default_rng(2)
    recs = [(f"oven{j + 1}", f"flour{k + 1}", means[j][k] + rng.normal(0, 1))
            for j in range(2) for k in range(3) for _ in range(counts[j, k])]
    frame = pd.DataFrame(recs, columns=["oven", "flour", "volume"])
    s = shape(_fit(frame))
    assert s.values["means"][1][1] is None and s.values["se"][1][1] is None
    ab = s.values["a_lines_across_b"]
    assert ab["crosses"] and set(ab["crossings"][0]["between"]) == {"flour1", "flour3"}
    _json_ok(s)


def test_boxcox_without_interior_maximum_is_a_note():
    frame = pd.DataFrame({"volume": [1.0, 2.0, 3.0, 4.0, 5.0, 6.5, 7.0],
                          "oven": list("xxxyyyy"), "flour": list("pqrpqrr")})
    d = scale(_fit(frame))
    assert d.severity == "minor" and d.values["lambda_hat"] is None
    assert "not determined" in d.summary and d.values["removable"] is False
    assert_allclose(d.values["log_p"], _ref_ab_p(frame, np.log(frame.volume.to_numpy())), rtol=1e-9)
    _json_ok(d)


def test_scale_sentence_names_each_lambda():
    # log-normal data with multiplicative main effects (as above): the sentence must say which lambda is
    # the maximum-likelihood lambda-hat, which are the interval ends, and at which lambda the decision
    # changes, with that lambda's p equal to a statsmodels refit on the transformed response
    means = np.log([[20.0, 40.0, 60.0], [40.0, 80.0, 120.0], [80.0, 160.0, 240.0]])
    frame = _frame(means, 30, 0.15, seed=8, log_scale=True)
    d = scale(_fit(frame))
    v = d.values
    lo, hi = v["lambda_ci"]
    at = v["decision_changes_at"]
    assert at is not None and lo - 1e-12 <= at <= hi + 1e-12
    # it is the checked lambda nearest to 1 among those that change the decision
    assert at == min(v["removable_at"], key=lambda t: abs(t - 1.0))
    y = frame.volume.to_numpy()
    # reference: statsmodels anova on scipy.special.boxcox(y, lambda)
    assert_allclose(v["decision_changes_p"], _ref_ab_p(frame, special.boxcox(y, at)), rtol=1e-8)
    s = d.summary
    assert f"lambda-hat = {v['lambda_hat']:.2f}" in s
    assert f"95% profile interval [{lo:.2f}, {hi:.2f}] around lambda-hat" in s
    assert f"not at lambda = {at:.2f}" in s and "at which the decision changes" in s
    assert "raw scale (lambda = 1, p = " in s and "log scale (lambda = 0): p = " in s
    _json_ok(d)
