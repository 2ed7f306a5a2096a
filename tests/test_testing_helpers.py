"""audit.testing: assertions that guard an analysis in a project's own tests.

Invented data (the worked example repository's sourdough study, fixtures/example-repo);
the interaction decisions are checked against statsmodels' anova_lm on the same data.
"""

from __future__ import annotations

import os

import pandas as pd
import pytest

from conftest import FIXTURES

DATA = os.path.join(FIXTURES, "example-repo", "data")
RISE = dict(data=os.path.join(DATA, "rise_height.csv"), response="rise_mm", factors=("starter", "proof_temp"))
CRUMB = dict(data=os.path.join(DATA, "crumb_acidity.csv"), response="crumb_ph", factors=("flour", "ferment"))
FAST = dict(resamples=199, calibration=100)


def _interaction_p(path, response, factors):
    # reference: statsmodels ols + anova_lm (Type II) interaction p-value
    import statsmodels.api as sm
    from statsmodels.formula.api import ols

    df = pd.read_csv(path, dtype={factors[0]: str, factors[1]: str})
    fit = ols(f"{response} ~ C({factors[0]}) * C({factors[1]})", data=df).fit()
    table = sm.stats.anova_lm(fit, typ=2)
    return float(table.loc[f"C({factors[0]}):C({factors[1]})", "PR(>F)"])


def test_the_example_data_are_what_the_assertions_expect():
    assert _interaction_p(RISE["data"], RISE["response"], RISE["factors"]) < 0.001
    assert _interaction_p(CRUMB["data"], CRUMB["response"], CRUMB["factors"]) > 0.5


def test_assert_interaction_holds_returns_findings_and_fails_with_reasons():
    from audit.testing import assert_interaction_holds

    f = assert_interaction_holds(RISE["data"], response=RISE["response"], factors=RISE["factors"],
                                 claim="F(2, 42) = 31.80, p < .001", **FAST)
    assert f.verdict == "holds" and f.provenance["seed"] == 0 and "timestamp" not in f.provenance
    with pytest.raises(AssertionError) as e:
        assert_interaction_holds(CRUMB["data"], response=CRUMB["response"], factors=CRUMB["factors"], **FAST)
    msg = str(e.value)
    assert msg.startswith("the interaction claim 'present' does not hold: verdict does-not-hold")
    # the verdict follows the primary test since issue 19 (its decisive reason names it)
    assert "[decisive] the primary test contradicts the claim" in msg and "seed 0" in msg


def test_assert_no_interaction_and_caveats():
    from audit.testing import assert_no_interaction

    f = assert_no_interaction(CRUMB["data"], response=CRUMB["response"], factors=CRUMB["factors"], **FAST)
    assert f.verdict in ("holds", "holds-with-caveats")
    if f.verdict == "holds-with-caveats":
        with pytest.raises(AssertionError, match="verdict holds-with-caveats"):
            assert_no_interaction(CRUMB["data"], response=CRUMB["response"], factors=CRUMB["factors"],
                                  allow_caveats=False, **FAST)
    with pytest.raises(AssertionError, match="'absent' does not hold: verdict does-not-hold"):
        assert_no_interaction(RISE["data"], response=RISE["response"], factors=RISE["factors"], **FAST)
    with pytest.raises(TypeError):
        assert_no_interaction(CRUMB["data"], response=CRUMB["response"], factors=CRUMB["factors"], claim="present")


def test_bad_input_is_not_an_assertion_error():
    from audit.errors import ColumnError
    from audit.testing import assert_interaction_holds

    with pytest.raises(ColumnError):
        assert_interaction_holds(RISE["data"], response="rise", factors=RISE["factors"], **FAST)
