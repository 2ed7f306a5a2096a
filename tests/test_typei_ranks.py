"""Type I error of the rank tests for the interaction under large main effects.

Blair, Sawilowsky & Higgins (1987): with main effects present and no
interaction, the rank-transform interaction test rejects far more often than
alpha, while the aligned rank transform (Higgins & Tashtoush 1994) keeps its
level.  Invented data (simulation), seeded.
"""

import dataclasses

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from audit.fit import fit_observations
from audit.intake import load
from audit.methods.ranks import aligned_rank_transform, rank_transform

ALPHA = 0.05
REPS = 600


def _band(reps, alpha, level=0.99):
    """Central binomial interval for the number of rejections (source: binomial distribution)."""
    lo = stats.binom.ppf((1 - level) / 2, reps, alpha)
    hi = stats.binom.ppf((1 + level) / 2, reps, alpha)
    return lo / reps, hi / reps


@pytest.mark.slow
def test_rank_transform_over_rejects_aligned_ranks_do_not():
    J, K, n = 3, 3, 10
    a = np.repeat(np.arange(J), K * n)
    b = np.tile(np.repeat(np.arange(K), n), J)
    template = load(pd.DataFrame({"y": np.zeros(a.size) + np.arange(a.size), "a": a.astype(str),
                                  "b": b.astype(str)}), response="y", factors=("a", "b"))
    # the template's codes follow first appearance, which is the order built above
    assert (template.a == a).all() and (template.b == b).all()
    rng = np.random.default_rng(20240611)
    # no interaction; main effects of 2 error SDs per level step on both factors
    Y = 2.0 * a + 2.0 * b + rng.normal(size=(REPS, a.size))
    rej = np.zeros(2)
    for y in Y:
        fit = fit_observations(dataclasses.replace(template, y=y))
        rej += [rank_transform(fit).p < ALPHA, aligned_rank_transform(fit).p < ALPHA]
    rate_rt, rate_art = rej / REPS
    lo, hi = _band(REPS, ALPHA)
    assert rate_rt > hi, f"rank transform rejected {rate_rt:.3f}, expected above {hi:.3f}"
    assert lo <= rate_art <= hi, f"ART rejected {rate_art:.3f}, band [{lo:.3f}, {hi:.3f}]"
