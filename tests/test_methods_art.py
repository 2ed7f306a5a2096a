"""Aligned rank transform: the published alignment (marginal means of the
observations) recomputed by hand on a small unbalanced table."""

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose

from audit.errors import OptionError
from audit.fit import fit_observations
from audit.intake import load
from audit.methods.ranks import aligned_rank_transform, aligned_response

# A 2 x 2 table with cell sizes 2, 1, 3, 2 (invented; the arithmetic below is the check).
#   a1 x b1: 1, 3      (cell mean 2)
#   a1 x b2: 5         (cell mean 5)
#   a2 x b1: 4, 6, 8   (cell mean 6)
#   a2 x b2: 7, 9      (cell mean 8)
TABLE = pd.DataFrame({
    "y": [1, 3, 5, 4, 6, 8, 7, 9],
    "a": ["a1", "a1", "a1", "a2", "a2", "a2", "a2", "a2"],
    "b": ["b1", "b1", "b2", "b1", "b1", "b1", "b2", "b2"],
})

# source: Wobbrock, Findlater, Gergle & Higgins (2011), CHI, steps 1-3 of the aligned rank transform,
# effects estimated from marginal means of the observations; arithmetic by hand:
#   grand mean          = 43 / 8 = 5.375
#   row means           a1: (1 + 3 + 5) / 3 = 3       a2: (4 + 6 + 8 + 7 + 9) / 5 = 6.8
#   column means        b1: (1 + 3 + 4 + 6 + 8) / 5 = 4.4   b2: (5 + 7 + 9) / 3 = 7
#   A effect            a1: 3 - 5.375 = -2.375        a2: 6.8 - 5.375 = 1.425
#   B effect            b1: 4.4 - 5.375 = -0.975      b2: 7 - 5.375 = 1.625
#   AB effect (cell - row - column + grand):
#     a1 x b1: 2 - 3 - 4.4 + 5.375 = -0.025     a1 x b2: 5 - 3 - 7 + 5.375 = 0.375
#     a2 x b1: 6 - 6.8 - 4.4 + 5.375 = 0.175    a2 x b2: 8 - 6.8 - 7 + 5.375 = -0.425
#   residuals (y - cell mean): -1, 1 | 0 | -2, 0, 2 | -1, 1
HAND = {
    "A": [-3.375, -1.375, -2.375, -0.575, 1.425, 3.425, 0.425, 2.425],
    "B": [-1.975, 0.025, 1.625, -2.975, -0.975, 1.025, 0.625, 2.625],
    "AB": [-1.025, 0.975, 0.375, -1.825, 0.175, 2.175, -1.425, 0.575],
}
# mid-ranks of the AB-aligned values by hand: -1.825 < -1.425 < -1.025 < 0.175 < 0.375 < 0.575 < 0.975 < 2.175
HAND_RANKS_AB = [3, 7, 5, 1, 4, 8, 2, 6]


def _fit(df):
    return fit_observations(load(df, response="y", factors=("a", "b")))


@pytest.mark.parametrize("effect", ["A", "B", "AB"])
def test_alignment_equals_hand_computation(effect):
    assert_allclose(aligned_response(_fit(TABLE), effect), HAND[effect], rtol=0, atol=1e-12)


def test_art_interaction_equals_statsmodels_on_hand_ranks():
    r = aligned_rank_transform(_fit(TABLE), effect="AB")
    # reference: statsmodels OLS on the hand-computed ranks, anova_lm(typ=3), sum-to-zero coding
    m = smf.ols("rk ~ C(a, Sum) * C(b, Sum)", TABLE.assign(rk=HAND_RANKS_AB)).fit()
    tab = sm.stats.anova_lm(m, typ=3)
    assert_allclose(r.statistic, tab["F"].iloc[3], rtol=1e-10)
    assert_allclose(r.p, tab["PR(>F)"].iloc[3], rtol=1e-8)
    assert r.extra["alignment"] == "observation-means"
    assert r.extra["self_check"]["passed"]
    json.dumps(r.to_dict(), allow_nan=False)


def test_cell_means_alignment_is_a_named_option_and_differs_when_unbalanced():
    # by hand, unweighted: grand (2 + 5 + 6 + 8) / 4 = 5.25, rows 3.5 and 7, columns 4 and 6.5;
    # AB effect of a1 x b1 = 2 - 3.5 - 4 + 5.25 = -0.25, so its first aligned value is -1 - 0.25
    al = aligned_response(_fit(TABLE), "AB", alignment="cell-means")
    assert_allclose(al[0], -1.25, atol=1e-12)
    r = aligned_rank_transform(_fit(TABLE), effect="AB", alignment="cell-means")
    assert set(r.extra) == set(aligned_rank_transform(_fit(TABLE), effect="AB").extra)  # field names fixed
    with pytest.raises(OptionError, match="alignment"):
        aligned_rank_transform(_fit(TABLE), effect="AB", alignment="unweighted")


def test_balanced_self_check_below_1e8_and_alignments_agree():
    # common practice: with equal cell sizes observation means and means of cell means coincide
    rng = np.random.default_rng(5)
    df = pd.DataFrame({"y": rng.normal(size=36) * 3 + 10, "a": np.repeat(["p", "q", "r"], 12),
                       "b": np.tile(np.repeat(["u", "v", "w"], 4), 3)})
    fit = _fit(df)
    for e in ("A", "B", "AB"):
        r = aligned_rank_transform(fit, effect=e)
        assert r.extra["self_check"]["max_f_other"] < 1e-8
        assert len(r.extra["self_check"]["expected_zero"]) == 2
        assert_allclose(aligned_response(fit, e), aligned_response(fit, e, alignment="cell-means"), atol=1e-12)
