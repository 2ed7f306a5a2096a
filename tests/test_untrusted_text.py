"""Untrusted text kept short and numbers from text bounded (claims), and intake
errors that name the actual cause: a header line repeated inside the data, a
response column holding text.  Robustness tests: every input is generated here."""

import csv
import io
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest

import audit
from audit.errors import SHOWN_TEXT, ClaimError, DataFileError, OptionError, ResponseError, shorten
from audit.intake import load
from audit.verdict.claim import MAX_CLAIM_CHARS, MAX_SIGNIFICANT_DIGITS, parse_claim

#: an error line stays short whatever the input: the fixed wording plus a shortened echo
MAX_ERROR = 700


def _raises_fast(text, exc=ClaimError):
    t0 = time.perf_counter()
    with pytest.raises(exc) as info:
        parse_claim(text)
    assert time.perf_counter() - t0 < 1.0
    msg = str(info.value)
    assert len(msg) <= MAX_ERROR and "\n" not in msg, len(msg)
    return msg


def test_shorten_names_the_total_length():
    s = "x" * 100_000
    out = shorten(s)
    assert len(out) <= SHOWN_TEXT + 30 and out.endswith("(100,000 characters)") and "..." in out
    assert shorten("short") == "short"


def test_p_with_a_hundred_million_digit_exponent_is_refused_fast():
    msg = _raises_fast("p = 2e-" + "9" * 8)
    assert "smallest normal float" in msg
    assert isinstance(ClaimError("x"), OptionError)       # the CLI's one line, exit 2


@pytest.mark.parametrize("text,name", [("F(1, 20) = 1e999, p = .5", "F"), ("F(1e999, 20) = 3.2, p = .08", "df1"),
                                       ("F(2, 1e999) = 3.2, p = .08", "df2"), ("p = 1e999", "p")])
def test_values_beyond_the_float_range_are_refused(text, name):
    msg = _raises_fast(text)
    assert f"{name} = 1e999" in msg and "float range" in msg


def test_significant_digits_are_bounded():
    digits = "1" * MAX_SIGNIFICANT_DIGITS
    assert parse_claim(f"p = 0.{digits}").p == pytest.approx(float("0." + digits))
    msg = _raises_fast(f"p = 0.{digits}1")
    assert f"{MAX_SIGNIFICANT_DIGITS + 1} significant digits" in msg


@pytest.mark.parametrize("size", [100_000, 320_000])
def test_long_claims_refused_before_parsing_with_a_short_echo(size):
    body = "F(2, 54) = 4.11, p = ." + "0" * size
    msg = _raises_fast(body[:size])
    assert f"{size:,} characters" in msg and f"at most {MAX_CLAIM_CHARS} characters" in msg
    # a pathological text for a backtracking pattern is refused just as fast
    _raises_fast("AB: F(2, 54) = 4.11, p = .022" + ", eta =" * (size // 7))


def test_long_claim_through_the_api_and_the_cli(tmp_path):
    rng = np.random.default_rng(0)
    df = pd.DataFrame({"y": rng.normal(size=24), "a": np.repeat(["u", "v"], 12),
                       "b": np.tile(np.repeat(["p", "q", "r"], 4), 2)})
    claim = "F(2, 18) = " + "7" * 100_000          # an argument of at most 128 KB (Linux MAX_ARG_STRLEN)
    with pytest.raises(ClaimError) as info:
        audit.check(df, response="y", factors=("a", "b"), claim=claim)
    assert len(str(info.value)) <= MAX_ERROR
    path = tmp_path / "d.csv"
    df.to_csv(path, index=False)
    r = subprocess.run([sys.executable, "-m", "audit", "check", str(path), "--response", "y", "--factors", "a", "b",
                        "--claim", claim], capture_output=True, text=True, timeout=120)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and len(lines[0]) <= MAX_ERROR + 30


def test_ordinary_claims_still_parse():
    c = parse_claim("AB: F(2, 54) = 4.11, p = .022")
    assert (c.df1, c.df2, c.F, c.p, c.p_decimals) == (2.0, 54.0, 4.11, 0.022, 3)
    assert parse_claim("p = 2e-300").p == 2e-300
    assert parse_claim("p = .000").p == 0.0


# ------------------------------------------------------------------------ intake errors

def _rows(seed=1):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"kiln": np.repeat(["k1", "k2", "k3"], 8), "glaze": np.tile(["matte", "gloss"], 12),
                         "hardness": np.round(rng.normal(60, 4, 24), 2)})


def _csv_lines(text):
    # reference: Python's csv module; a record starts on the line after the previous record ended
    reader = csv.reader(io.StringIO(text, newline=""))
    starts, prev = [], 0
    for _ in reader:
        starts.append(prev + 1)
        prev = reader.line_num
    return starts


def test_repeated_header_names_the_cause_the_lines_and_the_fix(tmp_path):
    part = _rows().to_csv(index=False)
    text = part + part + part                    # three files concatenated, each with its header
    path = tmp_path / "joined.csv"
    path.write_text(text)
    lines = [i + 1 for i, line in enumerate(text.splitlines()) if line == "kiln,glaze,hardness"][1:]
    assert lines == [26, 51]
    with pytest.raises(DataFileError) as info:
        load(path, response="hardness", factors=("kiln", "glaze"))
    msg = str(info.value)
    assert "repeat the header line" in msg and "lines 26, 51" in msg and "concatenated" in msg
    assert "fix: delete the repeated header lines" in msg and "level" not in msg


def test_repeated_column_names_in_a_dataframe():
    df = pd.concat([_rows(), pd.DataFrame([{"kiln": "kiln", "glaze": "glaze", "hardness": "hardness"}]), _rows(2)],
                   ignore_index=True)
    with pytest.raises(DataFileError) as info:
        load(df, response="hardness", factors=("kiln", "glaze"))
    assert "index label 24" in str(info.value) and "column names" in str(info.value)


def test_text_response_column_is_named_as_a_label_column(tmp_path):
    df = _rows()
    df["hardness"] = np.where(np.arange(24) % 3, "soft", "hard")
    df["score"] = np.arange(24) * 1.5
    path = tmp_path / "t.csv"
    df.to_csv(path, index=False)
    with pytest.raises(ResponseError) as info:
        load(path, response="hardness", factors=("kiln", "glaze"))
    msg = str(info.value)
    assert "holds text" in msg and "none of its 24 values is a number" in msg and "'hard'" in msg
    assert "on line 2" in msg and "--response" in msg


@pytest.mark.parametrize("bad,cause", [("61.5 HV", "a unit"), ("1,061.5", "thousands separators"),
                                       ("scratched", "text that is not a number")])
def test_text_cells_in_the_response_name_cause_and_file_lines(tmp_path, bad, cause):
    df = _rows()
    df["note"] = "ok"
    df.loc[3, "note"] = "glaze ran\nover the foot"        # a quoted field over two lines
    df["hardness"] = df["hardness"].astype(str)
    df.loc[[6, 15], "hardness"] = bad
    path = tmp_path / "c.csv"
    df.to_csv(path, index=False)
    starts = _csv_lines(path.read_text())
    l1, l2 = starts[7], starts[16]                         # data rows 6 and 15 (after the header)
    assert (l1, l2) == (9, 18)
    with pytest.raises(ResponseError) as info:
        load(path, response="hardness", factors=("kiln", "glaze"))
    msg = str(info.value)
    assert repr(bad) in msg and f"on line {l1}" in msg and f"lines {l1}, {l2}" in msg and cause in msg
    assert "2 of 24" in msg and "fix:" in msg


def test_huge_value_and_name_are_echoed_short(tmp_path):
    df = _rows()
    df["hardness"] = df["hardness"].astype(str)
    df.loc[2, "hardness"] = "z" * 200_000
    with pytest.raises(ResponseError) as info:
        load(df, response="hardness", factors=("kiln", "glaze"))
    assert len(str(info.value)) <= MAX_ERROR and "200,000 characters" in str(info.value)
    with pytest.raises(Exception) as info:
        load(df, response="q" * 150_000, factors=("kiln", "glaze"))
    assert len(str(info.value)) <= MAX_ERROR


def test_long_user_names_keep_the_summary_short(tmp_path):
    # a 3,000-character factor name and a 5,000-character level: the terminal summary keeps its
    # 40-line limit and no report line carries a name whole (the JSON keeps the names exactly)
    rng = np.random.default_rng(2)
    fac, lev = "F" * 3000, "x" * 5000
    rows = [("t0", "l0"), ("t0", "l1"), (lev, "l0"), (lev, "l1"), ("t2", "l0"), ("t2", "l1")]
    df = pd.DataFrame([(a, b, 10 + i + rng.normal()) for i, (a, b) in enumerate(rows) for _ in range(4)],
                      columns=["tray", fac, "height"])
    f = audit.check(df, response="height", factors=("tray", fac), resamples=199, seed=1)
    text = f.to_terminal() if hasattr(f, "to_terminal") else None
    if text is None:
        from audit.render.terminal import render_terminal
        from audit.report.build import build_report
        text = render_terminal(build_report(f))
    lines = text.splitlines()
    assert len(lines) <= 40 and max(map(len, lines)) <= 80
    md = f.to_markdown()
    assert max(map(len, md.splitlines())) < 1500
    assert fac not in md and lev not in md
    assert f.factors == ("tray", fac) and lev in f.design.levels["tray"]
