"""Odd inputs at intake: each gives a correct load, or one line on stderr and exit 2
naming the column/option, what was expected, what was found and the fix; the input
file's bytes and mtime never change.

Invented scenario: a mushroom-growing trial, fruiting-body mass (g) by substrate x
spawn strain.  Expected behaviours are common practice for command-line tools and
for reading delimited text (RFC 4180 quoting; Python's csv and codecs modules and
pandas.read_csv serve as references where named).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from audit.errors import ColumnError, OptionError, ResponseError
from audit.intake import load

from conftest import findings_json

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

SUBSTRATES = ["straw", "sawdust", "coffee"]
STRAINS = ["P1", "P2"]
MASS = [12.5, 14.25, 13.0, 15.5, 11.75, 16.0, 13.5, 12.0, 14.75, 17.25, 10.5, 15.0,
        13.25, 14.0, 12.75, 16.5, 11.0, 15.25]


def rows_of(a=SUBSTRATES, b=STRAINS):
    out, i = [], 0
    for rep in range(3):
        for s in a:
            for t in b:
                out.append([s, t, f"{MASS[i % len(MASS)] + rep * 0.125:.3f}"])
                i += 1
    return out


def text_of(rows, header=("substrate", "strain", "mass_g"), sep=","):
    return "".join(sep.join(r) + "\n" for r in [list(header), *rows])


def run(*args, cwd=None):
    env = dict(os.environ, PYTHONPATH=ROOT)
    return subprocess.run([sys.executable, "-m", "audit", *args], capture_output=True, text=True,
                          cwd=cwd or ROOT, env=env, timeout=120)


def stamp(path):
    with open(path, "rb") as fh:
        data = fh.read()
    return hashlib.sha256(data).hexdigest(), os.stat(path).st_mtime_ns


def cli(path, *extra, factors=("substrate", "strain"), response="mass_g"):
    """Run `check` on path; assert the input's bytes and mtime did not change."""
    before = stamp(path)
    r = run("check", str(path), "--response", response, "--factors", *factors,
            "--no-methods", "--no-diagnostics", *extra)
    assert stamp(path) == before, "input file modified"
    assert "Traceback" not in r.stderr, r.stderr
    return r


def one_line_error(r, *fragments):
    assert r.returncode == 2, (r.returncode, r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith("twoway-audit: error:")
    for f in fragments:
        assert f in lines[0], lines[0]
    return lines[0]


# --- missing values: only empty fields ------------------------------------------------------

@pytest.mark.parametrize("name", ["None", "NA", "nan", "null", "N/A"])
def test_levels_named_like_missing_values_are_levels(tmp_path, name):
    # common practice: a text level is data; only an empty field is missing
    rows = rows_of(a=[name, "Low", "High"])
    p = tmp_path / "m.csv"
    p.write_text(text_of(rows))
    obs = load(str(p), response="mass_g", factors=("substrate", "strain"))
    assert obs.levels_a == (name, "Low", "High")
    assert obs.dropped.total == 0 and len(obs) == len(rows)
    r = cli(p, "--levels", f"substrate=High,{name},Low", "--json", "-")
    assert r.returncode == 0, r.stderr
    assert findings_json(r.stdout)["design"]["levels"]["substrate"] == ["High", name, "Low"]


def test_empty_factor_field_is_missing_and_response_tokens_are_missing(tmp_path):
    rows = rows_of()
    rows[0][0] = "  "      # line 2: blank factor -> missing
    rows[1][2] = "NA"      # line 3: response token -> missing
    rows[2][2] = "."       # line 4: response token -> missing
    rows[3][2] = "nan"     # line 5
    p = tmp_path / "m.csv"
    p.write_text(text_of(rows))
    obs = load(str(p), response="mass_g", factors=("substrate", "strain"))
    assert sorted(obs.dropped.rows) == [2, 3, 4, 5]
    assert obs.dropped.missing_factor == 1 and int(obs.dropped.missing_response.sum()) == 3


# --- row numbers are the file's lines -------------------------------------------------------

def test_row_numbers_after_quoted_newlines(tmp_path):
    # reference: Python's csv module (record start = previous reader.line_num + 1)
    rows = rows_of()
    rows[2][0] = "straw"
    body = [",".join(r) for r in rows]
    body[1] = 'straw,"P2\nsecond line\nthird",14.0'          # a record spanning three lines
    body[3] = '"sawdust",P2,15.5'
    rows[1][1] = "P2\nsecond line\nthird"
    body[-1] = body[-1].replace("15", "99")                  # an outlier on the last record
    text = "substrate,strain,mass_g\n" + "\n".join(body) + "\n"
    p = tmp_path / "q.csv"
    p.write_text(text)
    reader = csv.reader(io.StringIO(text, newline=""))
    starts, prev = [], 0
    for _ in reader:
        starts.append(prev + 1)
        prev = reader.line_num
    # the multi-line strain value is one level with a single row: drop it by leaving its response blank
    text2 = text.replace('third",14.0', 'third",')
    p.write_text(text2)
    obs = load(str(p), response="mass_g", factors=("substrate", "strain"))
    assert obs.dropped.rows == (starts[2],)
    kept = [s for i, s in enumerate(starts[1:], start=1) if i != 2]
    assert_array_equal(obs.rows, kept)
    assert obs.rows[-1] == text2.count("\n")  # the last record starts on the file's last line
    # the outlier list of the CLI names the file line too
    r = run("check", str(p), "--response", "mass_g", "--factors", "substrate", "strain",
            "--no-methods", "--json", "-")
    assert r.returncode == 0, r.stderr
    found = json.dumps(findings_json(r.stdout)["diagnostics"])
    assert f'"row": {starts[-1]}' in found


def test_dataframe_rows_are_index_labels():
    # common practice: a DataFrame's own index identifies its rows
    rows = rows_of()
    f = pd.DataFrame(rows, columns=["substrate", "strain", "mass_g"], index=np.arange(len(rows)) * 10 + 100)
    f.loc[120, "mass_g"] = None
    obs = load(f, response="mass_g", factors=("substrate", "strain"))
    assert obs.row_kind == "index"
    assert obs.dropped.rows == (120,)
    assert obs.rows[0] == 100 and obs.rows[-1] == 100 + 10 * (len(rows) - 1)
    g = f.set_axis([f"r{i}" for i in range(len(rows))])  # non-integer labels: positions
    assert load(g, response="mass_g", factors=("substrate", "strain")).row_kind == "position"


# --- --levels mistakes ------------------------------------------------------------------------

@pytest.mark.parametrize("levels,fragments", [
    (["typo=a1,a2"], ["'typo'", "'substrate'", "'strain'", "--levels"]),
    (["strain=P1,P2", "strain=P2,P1"], ["'strain' is given twice"]),
    (["strain=P1,P2,P1"], ["'P1' is listed twice"]),
    (["strain=P1,P2,P3"], ["'P3' does not occur"]),
    (["substrate=straw,sawdust"], ["'coffee'", "not in --levels"]),
])
def test_levels_mistakes(tmp_path, levels, fragments):
    p = tmp_path / "d.csv"
    p.write_text(text_of(rows_of()))
    extra = [x for lv in levels for x in ("--levels", lv)]
    msg = one_line_error(cli(p, *extra), *fragments)
    assert "fewer than two" not in msg


def test_levels_mistakes_api():
    f = pd.DataFrame(rows_of(), columns=["substrate", "strain", "mass_g"])
    with pytest.raises(OptionError, match="typo"):
        load(f, response="mass_g", factors=("substrate", "strain"), levels={"typo": ["a", "b"]})
    with pytest.raises(OptionError, match="given twice"):
        load(f, response="mass_g", factors=("substrate", "strain"),
             levels=[("strain", ["P1", "P2"]), ("strain", ["P2", "P1"])])


# --- empty auxiliary columns, merged workbook cells -------------------------------------------

@pytest.mark.parametrize("opt", ["--order", "--unit"])
def test_all_blank_order_or_unit_column(tmp_path, opt):
    rows = [r + [""] for r in rows_of()]
    p = tmp_path / "d.csv"
    p.write_text(text_of(rows, header=("substrate", "strain", "mass_g", "extra")))
    msg = one_line_error(cli(p, opt, "extra"), "'extra' is empty", opt)
    assert "0 level" not in msg


def test_merged_workbook_cells_hint(tmp_path):
    openpyxl = pytest.importorskip("openpyxl")
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(["substrate", "strain", "mass_g"])
    data = sorted(rows_of(), key=lambda r: (r[0], r[1]))
    r0 = 2
    for i, (s, t, m) in enumerate(data):
        ws.append([s if i % 6 == 0 else None, t, float(m)])  # substrate written once per block
    for start in range(r0, r0 + len(data), 6):
        ws.merge_cells(start_row=start, start_column=1, end_row=start + 5, end_column=1)
    p = tmp_path / "merged.xlsx"
    wb.save(p)
    one_line_error(cli(p), "merged cells read as blanks", "'substrate'")


# --- workbooks: sheets and headers -----------------------------------------------------------

def _workbook(path, sheets):
    openpyxl = pytest.importorskip("openpyxl")
    wb = openpyxl.Workbook()
    wb.remove(wb.active)
    for name, rows in sheets.items():
        ws = wb.create_sheet(name)
        for r in rows:
            ws.append(r)
    wb.save(path)
    return path


def test_multi_sheet_workbook_needs_sheet(tmp_path):
    good = [["substrate", "strain", "mass_g"]] + [[s, t, float(m)] for s, t, m in rows_of()]
    other = [["note"], ["pilot run, not analysed"]]
    p = _workbook(tmp_path / "wb.xlsx", {"readme": other, "trial": good})
    one_line_error(cli(p), "2 sheets", "'readme'", "'trial'", "--sheet")
    for sheet in ("trial", "2"):
        r = cli(p, "--sheet", sheet, "--json", "-")
        assert r.returncode == 0, r.stderr
    one_line_error(cli(p, "--sheet", "3"), "no sheet '3'")
    obs = load(str(p), response="mass_g", factors=("substrate", "strain"), sheet="trial")
    assert obs.source.sheet == "trial" and len(obs) == len(good) - 1


def test_repeated_column_name(tmp_path):
    p = tmp_path / "d.csv"
    p.write_text(text_of([r + ["1"] for r in rows_of()], header=("substrate", "strain", "mass_g", "mass_g")))
    one_line_error(cli(p), "'mass_g' appears twice")
    q = _workbook(tmp_path / "d.xlsx", {"s": [["substrate", "mass_g", "strain", "mass_g"]]
                                        + [[s, float(m), t, 1.0] for s, t, m in rows_of()]})
    one_line_error(cli(q), "'mass_g' appears twice")


# --- encodings ------------------------------------------------------------------------------

@pytest.mark.parametrize("codec", ["utf-8", "utf-8-sig", "utf-16"])
def test_unicode_encodings_detected(tmp_path, codec):
    # reference: Python's codecs (utf-8-sig and utf-16 write a byte-order mark)
    rows = rows_of(a=["paille", "sciure", "café"])
    p = tmp_path / "u.csv"
    p.write_bytes(text_of(rows).encode(codec))
    obs = load(str(p), response="mass_g", factors=("substrate", "strain"))
    assert obs.levels_a == ("paille", "sciure", "café")


def test_latin1_needs_encoding_option(tmp_path):
    rows = rows_of(a=["paille", "sciure", "café"])
    p = tmp_path / "l.csv"
    p.write_bytes(text_of(rows).encode("latin-1"))
    one_line_error(cli(p), "not UTF-8", "--encoding latin-1")
    r = cli(p, "--encoding", "latin-1", "--json", "-")
    assert r.returncode == 0, r.stderr
    assert findings_json(r.stdout)["design"]["levels"]["substrate"] == ["paille", "sciure", "café"]
    one_line_error(cli(p, "--encoding", "no-such-codec"), "unknown text encoding")


# --- numerically equal spellings ---------------------------------------------------------------

def test_numeric_spellings_merged_with_note(tmp_path):
    rows = rows_of(a=["15", "30", "45"])
    for r in rows[6::6]:  # the first appearance keeps its spelling '15'
        r[0] = "15.0"
    p = tmp_path / "d.csv"
    p.write_text(text_of(rows, header=("temp_c", "strain", "mass_g")))
    obs = load(str(p), response="mass_g", factors=("temp_c", "strain"))
    assert obs.levels_a == ("15", "30", "45")
    assert any("'15'" in n and "'15.0'" in n and "merged" in n for n in obs.notes)
    r = cli(p, "--json", "-", factors=("temp_c", "strain"))
    assert r.returncode == 0, r.stderr
    assert any("merged" in n for n in findings_json(r.stdout)["design"]["notes"])


def test_numeric_spellings_with_text_stop(tmp_path):
    rows = rows_of(a=["15", "15.0", "ambient"])
    p = tmp_path / "d.csv"
    p.write_text(text_of(rows, header=("temp_c", "strain", "mass_g")))
    one_line_error(cli(p, factors=("temp_c", "strain")), "'15'", "'15.0'", "temp_c")


# --- decimal commas ------------------------------------------------------------------------------

def test_decimal_comma_file_loads_like_its_dot_twin(tmp_path):
    # reference: pandas.read_csv(decimal=",") of the comma file gives the same numbers
    rows = rows_of(a=["0.5", "1.5", "2"])
    dot = tmp_path / "dot.csv"
    dot.write_text(text_of(rows, header=("dose", "strain", "mass_g"), sep=";"))
    comma = tmp_path / "comma.csv"
    comma.write_text(text_of([[c.replace(".", ",") for c in r] for r in rows],
                             header=("dose", "strain", "mass_g"), sep=";"))
    ref = pd.read_csv(comma, sep=";", decimal=",")
    a = load(str(dot), response="mass_g", factors=("dose", "strain"))
    for kw in ({}, {"decimal": ","}):
        b = load(str(comma), response="mass_g", factors=("dose", "strain"), **kw)
        assert b.levels_a == a.levels_a == ("0.5", "1.5", "2")
        assert_array_equal(b.a, a.a)
        assert_array_equal(b.b, a.b)
        assert_allclose(b.y_original, a.y_original, rtol=0, atol=0)
        assert_allclose(b.y_original, ref["mass_g"].to_numpy(), rtol=0, atol=0)
    assert any("decimal" in n for n in load(str(comma), response="mass_g", factors=("dose", "strain")).notes)
    r1 = cli(dot, "--json", "-", factors=("dose", "strain"))
    r2 = cli(comma, "--decimal", ",", "--json", "-", factors=("dose", "strain"))
    assert r1.returncode == r2.returncode == 0
    assert findings_json(r1.stdout)["anova"] == findings_json(r2.stdout)["anova"]


def test_decimal_comma_in_tab_file_gives_hint(tmp_path):
    rows = [[a, b, m.replace(".", ",")] for a, b, m in rows_of()]
    p = tmp_path / "t.tsv"
    p.write_text(text_of(rows, sep="\t"))
    one_line_error(cli(p), "decimal commas", "--decimal ,")
    r = cli(p, "--decimal", ",")
    assert r.returncode == 0, r.stderr


# --- factors given wrongly, swapped columns --------------------------------------------------

def test_factors_with_a_comma_cli(tmp_path):
    p = tmp_path / "d.csv"
    p.write_text(text_of(rows_of()))
    before = stamp(p)
    r = run("check", str(p), "--response", "mass_g", "--factors", "substrate,strain")
    assert stamp(p) == before
    one_line_error(r, "--factors", "separated by a space")


@pytest.mark.parametrize("bad", ["substrate,strain", "substrate", ("substrate", "strain", "mass_g"), None, 3])
def test_factors_not_a_pair_api(bad):
    f = pd.DataFrame(rows_of(), columns=["substrate", "strain", "mass_g"])
    with pytest.raises(OptionError, match="factors"):
        load(f, response="mass_g", factors=bad)


def test_swapped_response_and_factor_hint(tmp_path):
    rows = rows_of()
    p = tmp_path / "d.csv"
    p.write_text(text_of(rows))
    msg = one_line_error(cli(p, response="strain", factors=("substrate", "mass_g")), "swapped",
                         "--response mass_g", "'mass_g' looks like a measurement")
    assert "fewer than two" not in msg


def test_text_response_hint_names_the_numeric_column():
    f = pd.DataFrame([r + [r[1]] for r in rows_of()], columns=["substrate", "strain", "mass_g", "batch"])
    with pytest.raises(ResponseError, match="try --response mass_g --factors substrate batch"):
        load(f, response="strain", factors=("substrate", "batch"))


def test_blank_lines_above_the_header_keep_true_line_numbers(tmp_path):
    # reference: the file's own line count (str.splitlines)
    text = "\n  \r\n" + text_of(rows_of())
    p = tmp_path / "d.csv"
    p.write_bytes(text.encode())
    obs = load(str(p), response="mass_g", factors=("substrate", "strain"))
    header_line = text.splitlines().index("substrate,strain,mass_g") + 1
    assert header_line == 3
    assert_array_equal(obs.rows, np.arange(len(rows_of())) + header_line + 1)


def test_dataframe_repeated_column_and_file_only_options():
    f = pd.DataFrame(rows_of(), columns=["substrate", "strain", "mass_g"])
    g = pd.concat([f, f[["mass_g"]]], axis=1)
    with pytest.raises(ColumnError, match="'mass_g' appears twice"):
        load(g, response="mass_g", factors=("substrate", "strain"))
    with pytest.raises(OptionError, match="encoding"):
        load(f, response="mass_g", factors=("substrate", "strain"), encoding="latin-1")
    with pytest.raises(OptionError, match="sheet"):
        load(f, response="mass_g", factors=("substrate", "strain"), sheet="data")
