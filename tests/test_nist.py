"""NIST StRD analysis-of-variance datasets SmLs01-09 (public domain, copied verbatim
into fixtures/ with their headers).

Each file has 9 treatments; read as a 3 x 3 design (treatment t -> A = (t-1)//3,
B = (t-1)%3), so SS_A + SS_B + SS_AB (Type I) must equal the certified
between-treatment SS and the residual SS the certified within-treatment SS.
Accuracy is the log relative error LRE = -log10(|x - c| / |c|) (McCullough 1998,
"Assessing the reliability of statistical software", The American Statistician 52);
9 correct digits on every set is the mark.

The data are fed as text (a DataFrame of strings, and a temporary CSV file) so the
exact decimal centring at intake is exercised: SmLs07-09 carry 13 constant leading
digits and lose all but about 4 digits of their spread once parsed into float64.

AtmWtAg (2 treatments) and SiRstv (5 treatments) are one-way sets whose treatment
counts are not a product of two factors with at least 2 levels each, so they do not
fit a two-way layout and are not used here.
"""

from __future__ import annotations

import math
import os

import numpy as np
import pandas as pd
import pytest

from audit.fit import fit_observations
from audit.intake import load

from conftest import FIXTURES

SETS = [f"SmLs0{i}" for i in range(1, 10)]
MIN_LRE = 9.0  # source: McCullough (1998); METHODS.md section 1


def read_strd(name: str):
    """Parse a verbatim NIST StRD ANOVA file: certified values from lines 41-47, data from
    line 61 on (the line numbers the file header states)."""
    with open(os.path.join(FIXTURES, f"{name}.dat"), encoding="ascii") as fh:
        lines = fh.read().splitlines()
    cert = {}
    for line in lines[40:47]:
        words = line.split()
        if line.lstrip().startswith("Between Treatment"):
            cert["df_between"] = int(words[2])
            cert["ss_between"] = float(words[3])
            cert["ms_between"] = float(words[4])
            cert["F"] = float(words[5])
        elif line.lstrip().startswith("Within Treatment"):
            cert["df_within"] = int(words[2])
            cert["ss_within"] = float(words[3])
            cert["ms_within"] = float(words[4])
        elif "Certified R-Squared" in line:
            cert["r2"] = float(words[-1])
    # "Certified Residual" / "Standard Deviation  x" spans two lines
    for line in lines[40:47]:
        if line.lstrip().startswith("Standard Deviation"):
            cert["sd"] = float(line.split()[-1])
    assert set(cert) == {"df_between", "ss_between", "ms_between", "F", "df_within", "ss_within",
                         "ms_within", "r2", "sd"}, f"{name}: header not as documented"
    treat, resp = [], []
    for line in lines[60:]:
        if line.strip():
            t, y = line.split()
            treat.append(int(t))
            resp.append(y)  # keep the decimal text
    t = np.array(treat)
    frame = pd.DataFrame({
        "A": [f"a{v}" for v in (t - 1) // 3],
        "B": [f"b{v}" for v in (t - 1) % 3],
        "y": resp,
    })
    return frame, cert


def lre(x: float, c: float) -> float:
    """Log relative error (McCullough 1998); capped at 15.9 (exact agreement)."""
    if x == c:
        return 15.9
    return min(15.9, -math.log10(abs(x - c) / abs(c)))


def strd_lres(obs):
    fit = fit_observations(obs)
    an = fit.anova
    t1 = an.tables["I"]
    between = sum(t1.row(e).ss for e in ("A", "B", "AB"))
    df_between = sum(t1.row(e).df for e in ("A", "B", "AB"))
    within = t1.row("residual").ss
    ms_w = an.ms_error
    F = (between / df_between) / ms_w
    return between, df_between, within, ms_w, F


@pytest.mark.parametrize("name", SETS)
def test_strd_certified_values_from_text_frame(name):
    frame, cert = read_strd(name)
    obs = load(frame, response="y", factors=("A", "B"))
    between, df_b, within, ms_w, F = strd_lres(obs)
    assert df_b == cert["df_between"]
    assert obs.y.size - 9 == cert["df_within"]
    # source: NIST StRD certified values (lines 41-47 of the file); LRE >= 9 (McCullough 1998)
    got = {
        "ss_between": lre(between, cert["ss_between"]),
        "ss_within": lre(within, cert["ss_within"]),
        "ms_within": lre(ms_w, cert["ms_within"]),
        "F": lre(F, cert["F"]),
        "r2": lre(between / (between + within), cert["r2"]),
        "sd": lre(math.sqrt(ms_w), cert["sd"]),
    }
    assert min(got.values()) >= MIN_LRE, (name, got)


@pytest.mark.parametrize("name", ["SmLs04", "SmLs07", "SmLs08", "SmLs09"])
def test_strd_from_csv_file_centred_exactly(name, tmp_path):
    frame, cert = read_strd(name)
    path = tmp_path / f"{name}.csv"
    path.write_text("A,B,y\n" + "".join(f"{a},{b},{y}\n" for a, b, y in frame.itertuples(index=False)))
    obs = load(str(path), response="y", factors=("A", "B"))
    # the intake says it centred the decimal text exactly (issue 2, design summary)
    assert obs.centring is not None and "exactly" in obs.centring
    assert obs.offset != 0.0
    between, _, within, _, _ = strd_lres(obs)
    # source: NIST StRD certified values; LRE >= 9 (McCullough 1998)
    assert lre(between, cert["ss_between"]) >= MIN_LRE
    assert lre(within, cert["ss_within"]) >= MIN_LRE


def test_strd_lower_difficulty_needs_no_centring():
    frame, _ = read_strd("SmLs01")
    obs = load(frame, response="y", factors=("A", "B"))
    assert obs.centring is None and obs.offset == 0.0


def test_float_parsing_alone_would_fail_smls07():
    # Why intake centres the text: parsing SmLs07 into float64 first loses the spread's digits
    # (METHODS.md section 1: about 4 correct digits survive). Checked with the same core on the
    # float-parsed values: the LRE falls far below 9.
    frame, cert = read_strd("SmLs07")
    floats = frame.assign(y=frame["y"].astype(float))
    obs = load(floats, response="y", factors=("A", "B"))
    assert obs.centring is not None and "floating point" in obs.centring
    between, _, within, _, _ = strd_lres(obs)
    assert lre(within, cert["ss_within"]) < 6
