"""The verdict study's conditions have the truth they state (benchmarks/study_verdict.py).

No simulation and no audit here: population cell means and noise-free datasets only (the
study itself is run by hand; figures in benchmarks/README.md).
"""

import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "benchmarks"))

import study_verdict as sv  # noqa: E402


def tetrads(mu: np.ndarray) -> np.ndarray:
    """Every 2 x 2 interaction contrast mu_jk - mu_jl - mu_ik + mu_il whose four cells are filled.

    # common practice: a table of cell means is additive (no interaction) exactly when every
    # such contrast is zero (on a connected layout)
    """
    J, K = mu.shape
    out = []
    for i in range(J):
        for j in range(i + 1, J):
            for k in range(K):
                for m in range(k + 1, K):
                    t = mu[j, m] - mu[j, k] - mu[i, m] + mu[i, k]
                    if np.isfinite(t):
                        out.append(t)
    return np.asarray(out)


def test_grid_and_matches():
    names = [c.name for c in sv.CONDITIONS]
    assert len(names) == len(set(names)) >= 30
    truths = {c.truth for c in sv.CONDITIONS}
    assert truths == {"none", "interaction"}
    for c in sv.CONDITIONS:
        m = sv.condition(c.match)
        assert m.truth == "none"
        # the matching null keeps the design, the errors and the contamination; only the interaction differs
        assert (m.J, m.K, m.n, m.sd, m.errors, m.outlier, m.scale) == (c.J, c.K, c.n, c.sd, c.errors, c.outlier,
                                                                       c.scale)
        assert (c.size is None) == (c.truth == "none")


@pytest.mark.parametrize("cond", sv.CONDITIONS, ids=lambda c: c.name)
def test_population_means_have_the_stated_truth(cond):
    t = tetrads(sv.population_means(cond))
    if cond.truth == "none":
        assert np.abs(t).max() < 1e-12            # additive (on the log scale for the multiplicative model)
    else:
        assert np.abs(t).max() > 0.1              # a planted interaction


@pytest.mark.parametrize("name", ["int-normal-3x3-bal-small", "int-skew-3x3-bal-large", "int-tiny-n3-2x2-large"])
def test_balanced_noncentrality(name):
    # common practice: in a balanced full grid the interaction SS is n * sum of the
    # double-centred cell means squared
    c = sv.condition(name)
    mu = sv.population_means(c)
    g = mu - mu.mean(0, keepdims=True) - mu.mean(1, keepdims=True) + mu.mean()
    n = c.counts[0, 0]
    assert (c.counts == n).all()
    assert n * (g ** 2).sum() / c.sds[0, 0] ** 2 == pytest.approx(sv.SIZES[c.size], rel=1e-10)


@pytest.mark.parametrize("name", ["int-hetero-neg-3x3-medium", "int-empty-3x3-large", "int-outlier-3x3-medium"])
def test_unbalanced_noncentrality(name):
    c = sv.condition(name)
    n, mu = c.counts, sv.population_means(c)
    r = np.nan_to_num(sv.additive_residual(mu, n))
    # common practice: a weighted least-squares residual is orthogonal to the columns of the
    # design (here the row and column indicators, weights n)
    assert np.abs((n * r).sum(1)).max() < 1e-10 and np.abs((n * r).sum(0)).max() < 1e-10
    np.testing.assert_allclose(tetrads(np.where(n > 0, r, np.nan)), tetrads(mu), atol=1e-10)
    assert (n * r ** 2).sum() / sv.pooled_variance(n, c.sds) == pytest.approx(sv.SIZES[c.size], rel=1e-10)


@pytest.mark.parametrize("name", ["null-empty-3x3", "int-hetero-pos-3x3-large", "null-multiplicative-3x3",
                                  "null-outlier-3x3"])
def test_noise_free_data_carry_the_model_means(name):
    c = sv.condition(name)
    df = sv.generate(c, np.random.default_rng(1), noise=0.0)
    y = np.log(df["y"]) if c.scale == "log" else df["y"]
    grid = y.groupby([df["a"], df["b"]])
    counts = np.zeros((c.J, c.K), int)
    for (a, b), v in grid:
        j, k = int(a[1:]) - 1, int(b[1:]) - 1
        counts[j, k] = len(v)
        mu = sv.population_means(c)[j, k]
        if c.outlier and (j, k) == sv.outlier_cell(c):
            off = v.to_numpy() - mu
            assert np.sum(np.abs(off) > 1e-9) == 1
            assert off.max() == pytest.approx(sv.OUTLIER_SD * c.sds[j, k])
        else:
            np.testing.assert_allclose(v.to_numpy(), mu, rtol=1e-12)
    np.testing.assert_array_equal(counts, c.counts)


def test_multiplicative_interaction_only_on_the_raw_scale():
    c = sv.condition("null-multiplicative-3x3")
    assert np.abs(tetrads(sv.population_means(c))).max() < 1e-12
    assert np.abs(tetrads(sv.raw_means(c))).max() > 0.1
    assert sv.raw_noncentrality(c) > 5


def test_datasets_are_seeded():
    c = sv.condition("int-t3-3x3-bal-medium")
    d1, s1 = sv.make_dataset(c, 3)
    d2, s2 = sv.make_dataset(c, 3)
    d3, s3 = sv.make_dataset(c, 4)
    assert s1 == s2 != s3
    assert d1.equals(d2) and not d1["y"].equals(d3["y"])
