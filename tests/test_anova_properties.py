"""Property tests (hypothesis) of the two-way ANOVA core on invented data.

Invariances: F and p do not change with the row order, with relabelled (and
reordered) levels, or with an affine change of the response y -> a*y + b (a != 0).
Facts of the trade: in a balanced design the interaction terms sum to zero along
every row and column, in a 2 x 2 they are +d, -d, -d, +d, and with every cell
filled the interaction has (J-1)(K-1) degrees of freedom.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from audit.fit import fit_observations
from audit.intake import load

SETTINGS = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
TYPES = ("I", "II", "III")
EFFECTS = ("A", "B", "AB")


@st.composite
def designs(draw, balanced=False, max_levels=4, max_n=6):
    """A J x K layout (every cell filled) of an invented bakery trial: loaf volume by flour
    blend x proofing time, with random cell counts and seed."""
    J = draw(st.integers(2, max_levels))
    K = draw(st.integers(2, max_levels))
    if balanced:
        n = draw(st.integers(2, max_n))
        counts = np.full((J, K), n)
    else:
        counts = np.array(draw(st.lists(st.integers(1, max_n), min_size=J * K, max_size=J * K))).reshape(J, K)
        if counts.sum() - J * K < 2:  # at least two residual df
            counts[0, 0] += 2
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(J):
        for k in range(K):
            mu = rng.normal(0, 1.5)
            for _ in range(counts[j, k]):
                rows.append((f"blend{j}", f"proof{k}", 500.0 + 10.0 * (mu + rng.normal())))
    frame = pd.DataFrame(rows, columns=["blend", "proof", "volume"])
    return frame, counts


def tables(frame, levels=None):
    obs = load(frame, response="volume", factors=("blend", "proof"), levels=levels)
    return fit_observations(obs).anova


def assert_same_tests(an1, an2, rtol=1e-9):
    for t in TYPES:
        for e in EFFECTS:
            r1, r2 = an1.tables[t].row(e), an2.tables[t].row(e)
            assert r1.df == r2.df
            assert_allclose(r1.F, r2.F, rtol=rtol, err_msg=f"{t} {e} F")
            assert_allclose(r1.p, r2.p, rtol=rtol * 100, atol=1e-300, err_msg=f"{t} {e} p")


@SETTINGS
@given(designs(), st.integers(0, 2**32 - 1))
def test_row_order_does_not_matter(design, seed):
    # common practice: least squares does not depend on the order of the observations
    frame, _ = design
    perm = np.random.default_rng(seed).permutation(len(frame))
    shuffled = frame.iloc[perm].reset_index(drop=True)
    assert_same_tests(tables(frame), tables(shuffled))


@SETTINGS
@given(designs(), st.data())
def test_relabelling_levels_does_not_matter(design, data):
    # common practice: the hypotheses (equal marginal / cell means) do not depend on level names
    # or their order; Type I keeps factor A first.
    frame, counts = design
    J, K = counts.shape
    perm_a = data.draw(st.permutations(range(J)))
    perm_b = data.draw(st.permutations(range(K)))
    new_a = {f"blend{j}": f"flour-{perm_a[j]}" for j in range(J)}
    new_b = {f"proof{k}": f"{30 * (perm_b[k] + 1)}min" for k in range(K)}
    renamed = frame.assign(blend=frame["blend"].map(new_a), proof=frame["proof"].map(new_b))
    order = {"blend": [f"flour-{i}" for i in range(J)], "proof": [f"{30 * (i + 1)}min" for i in range(K)]}
    assert_same_tests(tables(frame), tables(renamed))
    assert_same_tests(tables(frame), tables(renamed, levels=order))


@SETTINGS
@given(
    designs(),
    st.one_of(st.floats(-1e3, -1e-2), st.floats(1e-2, 1e3)),
    st.floats(-1e5, 1e5),
)
def test_affine_response_change_does_not_matter(design, scale, shift):
    # common practice: F is a ratio of quadratic forms in y that are invariant to shifts and
    # scale as a^2, so F and p do not change under y -> a*y + b (a != 0)
    frame, _ = design
    moved = frame.assign(volume=scale * frame["volume"] + shift)
    assert_same_tests(tables(frame), tables(moved), rtol=1e-7)


@SETTINGS
@given(designs(balanced=True))
def test_balanced_interaction_terms_sum_to_zero(design):
    frame, counts = design
    an = tables(frame)
    terms = an.interaction_terms
    J, K = counts.shape
    assert terms.shape == (J, K)
    scale = float(np.abs(terms).max()) + 1.0
    # common practice (METHODS.md section 1): in a balanced design the interaction terms sum to
    # zero along every row and every column
    assert_allclose(terms.sum(axis=0), 0.0, atol=1e-10 * scale)
    assert_allclose(terms.sum(axis=1), 0.0, atol=1e-10 * scale)
    # and equal ybar_jk - ybar_j. - ybar_.k + ybar_.. (common practice)
    m = frame.groupby(["blend", "proof"])["volume"].mean().unstack().loc[
        [f"blend{j}" for j in range(J)], [f"proof{k}" for k in range(K)]].to_numpy()
    want = m - m.mean(axis=1, keepdims=True) - m.mean(axis=0, keepdims=True) + m.mean()
    assert_allclose(terms, want, atol=1e-9 * (np.abs(want).max() + 1.0))
    # sum n_jk term_jk^2 = SS_AB
    assert_allclose(float((counts * terms**2).sum()), an.tables["I"].row("AB").ss, rtol=1e-9)


@SETTINGS
@given(designs(balanced=True, max_levels=2))
def test_two_by_two_interaction_terms_are_plus_minus_d(design):
    frame, _ = design
    terms = tables(frame).interaction_terms
    d = terms[0, 0]
    # common practice: in a 2 x 2 the interaction terms are +d, -d, -d, +d
    assert_allclose(terms, np.array([[d, -d], [-d, d]]), atol=1e-10 * (abs(d) + 1.0))


@SETTINGS
@given(designs())
def test_interaction_df_with_every_cell_filled(design):
    frame, counts = design
    J, K = counts.shape
    an = tables(frame)
    # common practice: (J-1)(K-1) interaction df with every cell filled; residual df N - JK
    assert an.df_interaction == (J - 1) * (K - 1)
    for t in TYPES:
        assert an.tables[t].row("AB").df == (J - 1) * (K - 1)
        assert an.tables[t].row("A").df == J - 1
        assert an.tables[t].row("B").df == K - 1
        assert an.tables[t].row("residual").df == counts.sum() - J * K
    # and the interaction SS is the same under every type
    ss = [an.tables[t].row("AB").ss for t in TYPES]
    assert_allclose(ss, ss[0], rtol=1e-9, atol=1e-12)
