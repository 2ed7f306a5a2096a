"""Parsing of reported claims (audit.verdict.claim).

The accepted forms are the usual ways a test is reported in a manuscript (APA style,
common practice); every form is checked for each parsed field, including the reported
precision that reconciliation relies on.
"""

from __future__ import annotations

import pytest

from audit.errors import OptionError
from audit.verdict import Claim, parse_claim

# (text, expected fields) -- common practice (APA-style result lines and their variants)
FORMS = [
    ("F(2, 54) = 4.11, p = .022", dict(effect="AB", kind="test", df1=2, df2=54, F=4.11, F_decimals=2,
                                       p=0.022, p_relation="=", p_decimals=3)),
    ("F(2,54)=4.11, p<.001", dict(df1=2, df2=54, F=4.11, p=0.001, p_relation="<", p_decimals=3)),
    ("F (2, 54) = 4.11, p = 0.022", dict(df1=2, df2=54, F=4.11, p=0.022, p_decimals=3)),
    ("F[2, 54] = 4.107; p = .022", dict(df1=2, df2=54, F=4.107, F_decimals=3)),
    ("F(2, 54) = 4.11 \u2013 p = .022", dict(F=4.11, p=0.022)),  # en dash as separator
    ("F(2, 54) = 4.11, p = 2.3e\u22124", dict(p=0.00023, p_decimals=5)),  # unicode minus
    ("F(2, 54) = 4.11, p \u2264 .05", dict(p=0.05, p_relation="<=")),
    ("F(2, 54) = 4.11, p > .10", dict(p=0.10, p_relation=">", p_decimals=2)),
    ("*F*(2, 54) = 4.107, *p* = .022.", dict(F=4.107, p=0.022)),  # emphasis marks, full stop
    ("F(2,\u00a054) = 4.11, p = .022, \u03b7p\u00b2 = .13", dict(df2=54, p=0.022)),  # nbsp, trailing effect size
    ("F(2, 54) = 4.11, p = .022, MSE = 13.19", dict(F=4.11)),
    ("F(2, 27.3) = 4.11, p = .03", dict(df2=27.3)),  # Welch-type df
    ("F = 4.11, p = .022", dict(df1=None, df2=None, F=4.11)),
    ("p < .05", dict(kind="test", df1=None, F=None, p=0.05, p_relation="<", p_decimals=2)),
    ("p = .000", dict(p=0.0, p_relation="=", p_decimals=3)),
    ("P = .022", dict(p=0.022)),
    ("ns", dict(kind="absent", ns=True, p=None)),
    ("n.s.", dict(kind="absent", ns=True)),
    ("n. s.", dict(kind="absent", ns=True)),
    ("not significant", dict(kind="absent", ns=True)),
    ("F(2, 54) = 1.20, ns", dict(kind="test", F=1.2, F_decimals=2, ns=True, p=None)),
    ("F(2, 54) < 1, n.s.", dict(kind="test", F=1.0, F_relation="<", ns=True)),
    ("present", dict(kind="present")),
    ("Absent", dict(kind="absent", ns=False)),
    ("AB: F(2, 54) = 4.11, p = .022", dict(effect="AB", F=4.11)),
    ("A: F(1, 54) = 15.6, p < .001", dict(effect="A", df1=1, F=15.6, F_decimals=1)),
    ("B: p \u2264 .05", dict(effect="B", p_relation="<=")),
    ("A\u00d7B: p = .03", dict(effect="AB")),
    ("A x B: absent", dict(effect="AB", kind="absent")),
    ("A*B: present", dict(effect="AB", kind="present")),
    ("interaction: ns", dict(effect="AB", kind="absent")),
]


@pytest.mark.parametrize("text,want", FORMS, ids=[f[0] for f in FORMS])
def test_every_reported_form_parses(text, want):
    claim = parse_claim(text)
    assert isinstance(claim, Claim)
    assert claim.text == text
    for key, value in want.items():
        got = getattr(claim, key)
        if isinstance(value, float) and got is not None:
            assert got == pytest.approx(value, rel=1e-12), (key, got)
        else:
            assert got == value, (key, got)


def test_unlabelled_claim_is_about_the_interaction():
    # common practice: the claim under audit is the interaction unless labelled
    assert parse_claim("p = .02").effect == "AB"


def test_effect_override_and_factor_names():
    assert parse_claim("A: p = .02", effect="B").effect == "B"
    names = {"supp": "A", "dose": "B", "supp:dose": "AB", "supp x dose": "AB"}
    assert parse_claim("supp: F(1, 54) = 15.57, p < .001", names=names).effect == "A"
    assert parse_claim("dose: p < .001", names=names).effect == "B"
    assert parse_claim("supp:dose: F(2, 54) = 4.11, p = .022", names=names).effect == "AB"
    assert parse_claim("Supp x Dose: ns", names=names).effect == "AB"


def test_claim_is_frozen_and_keyword_only():
    claim = parse_claim("p = .02")
    with pytest.raises(Exception):
        claim.p = 0.5  # type: ignore[misc]
    with pytest.raises(TypeError):
        Claim("AB", "test")  # type: ignore[misc]


@pytest.mark.parametrize(
    "text,fragment",
    [
        ("F = banana", "found 'F = banana'"),
        ("the interaction was large", "not a reported F test"),
        ("C: p < .05", "effect label 'C'"),
        ("F(2, 54) = 4.1, p = 1.2", "p = 1.2"),
        ("F(2, 54) = \u22124.1, p = .02", "never negative"),
        ("F(0, 54) = 4.1, p = .02", "df1 = 0"),
        ("p < .05, q = 3", "not a reported F test"),
        ("", "empty claim"),
    ],
)
def test_unparseable_claims_raise_a_typed_error_naming_text_examples_and_fix(text, fragment):
    with pytest.raises(OptionError) as err:
        parse_claim(text)
    msg = str(err.value)
    assert fragment in msg
    assert repr(text) in msg  # names the claim
    assert "F(2, 54) = 4.11, p = .022" in msg and "p < .001" in msg  # two examples
    assert "fix:" in msg
    assert "\n" not in msg  # one line for the command line


def test_bad_effect_override_is_a_typed_error():
    with pytest.raises(OptionError, match="'A', 'B' or 'AB'"):
        parse_claim("p = .02", effect="C")
    with pytest.raises(OptionError, match="as a string"):
        parse_claim(0.02)  # type: ignore[arg-type]
