"""The one number formatter of every report.

reference: APA Publication Manual, 7th ed., section 6.36 (from memory): p to three decimals
without a leading zero, p < .001 below that; statistics to two decimals; values that cannot
exceed 1 without a leading zero.
source: Phipson & Smyth 2010 (Permutation p-values should never be zero): with B resamples the
estimate (1 + #{T* >= T}) / (B + 1) is at least 1/(B + 1), so the floor is reported as a bound.
"""

from __future__ import annotations

import pytest

from audit.report import format as fmt


@pytest.mark.parametrize("p, expected", [
    (0.03, "p = .030"), (0.0304, "p = .030"), (0.0004, "p < .001"), (0.001, "p = .001"),
    (0.5, "p = .500"), (0.9996, "p > .999"), (None, "p not computed"), (float("nan"), "p not computed"),
])
def test_apa_p(p, expected):
    assert fmt.p_text(p) == expected


@pytest.mark.parametrize("p, B, expected", [
    (1 / 10000, 9999, "p < .0001 (B = 9,999)"), (1 / 1000, 999, "p < .001 (B = 999)"),
    (1 / 200, 199, "p < .005 (B = 199)"), (1e-6, 999999, "p < .000001 (B = 999,999)"),
    (0.0003, 9999, "p < .001"), (0.0102, 9999, "p = .010"),
])
def test_resampled_floor_is_a_bound_with_B(p, B, expected):
    assert fmt.p_text(p, B) == expected


def test_statistics_df_and_effect_sizes():
    assert fmt.test_line("F", 4, 70, 6.6463, 0.000136) == "F(4, 70) = 6.65, p < .001"
    assert fmt.test_line("T/c", 4, 27.135, 4.7132, 0.00511) == "T/c(4, 27.1) = 4.71, p = .005"
    assert fmt.test_line("F", 4, None, 6.65, 1 / 10000, 9999) == "F = 6.65, p < .0001 (B = 9,999)"
    assert fmt.prop(0.2752) == ".28" and fmt.prop(-0.012) == "-.01" and fmt.ci(0.081, 0.398) == "[.08, .40]"
    assert fmt.num(1456.33) == "1,456" and fmt.num(55.312) == "55.31" and fmt.stat(None) == "-"


def test_p_values_inside_sentences_take_the_one_style():
    text = ("Brown-Forsythe p = 0.603, Bartlett p = 1.1e-05; (p 0.0632) and p < 0.05; "
            "leave-one-out p-values range 1.5e-05 to 0.0007.")
    out = fmt.normalise_p(text)
    assert out == ("Brown-Forsythe p = .603, Bartlett p < .001; (p = .063) and p < .05; "
                   "leave-one-out p-values all < .001.")
