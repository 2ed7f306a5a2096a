"""Library-level intake behaviour (audit.intake.load): file formats, delimiter
detection, categorical factors, level order, missing values counted per cell,
the input file left untouched, exact decimal centring, and typed errors.

Invented scenario: a beekeeping trial, honey yield (kg per hive) by hive type x
forage site.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from audit.errors import AuditInputError, ColumnError, DataFileError, FactorError, ResponseError
from audit.fit import fit_observations
from audit.intake import load

HEADER = ["hive", "site", "honey_kg"]
ROWS = [
    ("langstroth", "meadow", "21.5"),
    ("top-bar", "meadow", "17.25"),
    ("warre", "orchard", "19.0"),
    ("langstroth", "orchard", "23.75"),
    ("top-bar", "orchard", "16.5"),
    ("warre", "meadow", "18.0"),
    ("langstroth", "meadow", "22.0"),
    ("top-bar", "meadow", "15.5"),
    ("warre", "orchard", "20.25"),
    ("langstroth", "orchard", "24.5"),
    ("top-bar", "orchard", "18.0"),
    ("warre", "meadow", "17.5"),
]


def frame():
    return pd.DataFrame(ROWS, columns=HEADER)


def write_text(path, delimiter, rows=ROWS, header=HEADER):
    path.write_text("\n".join(delimiter.join(r) for r in [header, *rows]) + "\n", encoding="utf-8")
    return str(path)


def sha256(path) -> str:
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def same_as_reference(obs):
    ref = load(frame(), response="honey_kg", factors=("hive", "site"))
    assert obs.levels_a == ref.levels_a == ("langstroth", "top-bar", "warre")
    assert obs.levels_b == ref.levels_b == ("meadow", "orchard")
    assert_array_equal(obs.a, ref.a)
    assert_array_equal(obs.b, ref.b)
    assert_allclose(obs.y_original, [float(r[2]) for r in ROWS], rtol=0, atol=0)


# --- formats and delimiters --------------------------------------------------------------

@pytest.mark.parametrize("suffix,delimiter", [
    (".csv", ","), (".csv", ";"), (".tsv", "\t"), (".txt", "\t"), (".csv", "|"),
])
def test_delimiter_detected(tmp_path, suffix, delimiter):
    path = write_text(tmp_path / f"hives{suffix}", delimiter)
    obs = load(path, response="honey_kg", factors=("hive", "site"))
    assert obs.source.delimiter == delimiter
    assert obs.source.format == "text"
    same_as_reference(obs)
    # rows of a file are reported by line number (header = line 1)
    assert_array_equal(obs.rows, np.arange(len(ROWS)) + 2)


def test_source_hash_is_the_file_sha256(tmp_path):
    path = write_text(tmp_path / "hives.csv", ",")
    obs = load(path, response="honey_kg", factors=("hive", "site"))
    # reference: hashlib.sha256 of the file bytes
    assert obs.source.sha256 == sha256(path)


def test_xlsx_is_read(tmp_path):
    pytest.importorskip("openpyxl")
    path = tmp_path / "hives.xlsx"
    f = frame().assign(honey_kg=lambda d: d["honey_kg"].astype(float))
    f.to_excel(path, index=False)
    obs = load(str(path), response="honey_kg", factors=("hive", "site"))
    assert obs.source.format == "xlsx"
    same_as_reference(obs)


def test_parquet_is_read(tmp_path):
    pytest.importorskip("pyarrow")
    path = tmp_path / "hives.parquet"
    frame().assign(honey_kg=lambda d: d["honey_kg"].astype(float)).to_parquet(path, index=False)
    obs = load(str(path), response="honey_kg", factors=("hive", "site"))
    assert obs.source.format == "parquet"
    same_as_reference(obs)


# --- factors are categorical ------------------------------------------------------------

DOSE_ROWS = [(s, d, str(10 + i % 5 + 0.5 * (d == "2")))
             for i, (s, d) in enumerate([(s, d) for _ in range(3) for s in ("VC", "OJ") for d in ("1", "0.5", "2")])]


def test_numeric_looking_levels_stay_categorical_in_numeric_order(tmp_path):
    path = write_text(tmp_path / "doses.csv", ",", rows=DOSE_ROWS, header=["supp", "dose", "len"])
    obs = load(path, response="len", factors=("supp", "dose"))
    # doses 0.5 / 1 / 2 are three levels, sorted by their number; text levels keep first appearance
    assert obs.levels_b == ("0.5", "1", "2")
    assert obs.levels_a == ("VC", "OJ")
    assert obs.level_order == ("first appearance", "numeric")
    an = fit_observations(obs).anova
    assert an.tables["II"].row("B").df == 2  # a factor, not a 1-df linear trend


@pytest.mark.parametrize("fmt", ["dataframe", "parquet", "xlsx"])
def test_numeric_factor_column_from_binary_formats(tmp_path, fmt):
    f = pd.DataFrame({
        "supp": [r[0] for r in DOSE_ROWS],
        "dose": [float(r[1]) for r in DOSE_ROWS],
        "len": [float(r[2]) for r in DOSE_ROWS],
    })
    if fmt == "dataframe":
        data = f
    elif fmt == "parquet":
        pytest.importorskip("pyarrow")
        data = str(tmp_path / "d.parquet")
        f.to_parquet(data, index=False)
    else:
        pytest.importorskip("openpyxl")
        data = str(tmp_path / "d.xlsx")
        f.to_excel(data, index=False)
    obs = load(data, response="len", factors=("supp", "dose"))
    # whole numbers print without '.0'; numbers sort numerically
    assert obs.levels_b == ("0.5", "1", "2")


def test_user_given_level_order():
    obs = load(frame(), response="honey_kg", factors=("hive", "site"),
               levels={"hive": ["warre", "top-bar", "langstroth"], "site": ["orchard", "meadow"]})
    assert obs.levels_a == ("warre", "top-bar", "langstroth")
    assert obs.levels_b == ("orchard", "meadow")
    assert obs.level_order == ("given", "given")
    names_a = [obs.levels_a[c] for c in obs.a]
    assert names_a == [r[0] for r in ROWS]
    names_b = [obs.levels_b[c] for c in obs.b]
    assert names_b == [r[1] for r in ROWS]


def test_level_order_missing_a_level_is_an_error():
    with pytest.raises(FactorError, match="warre"):
        load(frame(), response="honey_kg", factors=("hive", "site"),
             levels={"hive": ["top-bar", "langstroth"]})


# --- missing values: dropped and counted, never silently ---------------------------------

def test_missing_values_dropped_and_counted_per_cell(tmp_path):
    rows = list(ROWS)
    rows[1] = ("top-bar", "meadow", "")        # line 3: missing response, cell top-bar x meadow
    rows[7] = ("top-bar", "meadow", "NA")      # line 9: missing response, same cell
    rows[5] = ("warre", "meadow", " ")         # line 7: blank response, warre x meadow
    rows[9] = ("", "orchard", "24.5")          # line 11: missing factor
    path = write_text(tmp_path / "gaps.csv", ",", rows=rows)
    obs = load(path, response="honey_kg", factors=("hive", "site"))
    d = obs.dropped
    assert d.total == 4
    assert d.missing_factor == 1
    assert sorted(d.rows) == [3, 7, 9, 11]
    ia, ib = obs.levels_a.index("top-bar"), obs.levels_b.index("meadow")
    assert d.missing_response[ia, ib] == 2
    assert d.missing_response[obs.levels_a.index("warre"), ib] == 1
    assert int(d.missing_response.sum()) == 3
    assert len(obs) == len(ROWS) - 4
    assert 3 not in set(obs.rows.tolist())
    # the per-cell report names the cells
    by_cell = d.to_dict(obs.levels_a, obs.levels_b)["missing_response_by_cell"]
    assert {"a": "top-bar", "b": "meadow", "n": 2} in by_cell


def test_missing_values_in_a_dataframe_are_counted():
    f = frame()
    f.loc[2, "honey_kg"] = None
    f.loc[5, "site"] = np.nan
    obs = load(f, response="honey_kg", factors=("hive", "site"))
    assert obs.dropped.total == 2
    assert obs.dropped.missing_factor == 1
    assert sorted(obs.dropped.rows) == [2, 5]  # index labels (a default index: positions)
    assert obs.row_kind == "index"


# --- the input file is never modified ---------------------------------------------------

@pytest.mark.parametrize("name,delimiter", [("hives.csv", ","), ("hives.tsv", "\t")])
def test_input_file_unchanged(tmp_path, name, delimiter):
    rows = list(ROWS)
    rows[3] = ("langstroth", "orchard", "")
    path = write_text(tmp_path / name, delimiter, rows=rows)
    before = sha256(path)
    obs = load(path, response="honey_kg", factors=("hive", "site"))
    fit_observations(obs)
    assert sha256(path) == before
    assert obs.source.sha256 == before


def test_dataframe_not_modified():
    f = frame()
    copy = f.copy(deep=True)
    load(f, response="honey_kg", factors=("hive", "site"))
    pd.testing.assert_frame_equal(f, copy)


# --- exact decimal centring ------------------------------------------------------------------

def test_decimal_centring_reported(tmp_path):
    big = [(h, s, f"7000000000{y}") for h, s, y in ROWS]  # 10 shared leading digits, text values
    path = write_text(tmp_path / "big.csv", ",", rows=big)
    obs = load(path, response="honey_kg", factors=("hive", "site"))
    assert obs.centring is not None and "exactly" in obs.centring
    assert obs.offset != 0.0
    # y = text value - offset exactly (Python's decimal module as the reference)
    from decimal import Decimal
    want = [float(Decimal(r[2]) - Decimal(repr(obs.offset))) for r in big]
    assert_allclose(obs.y, want, rtol=0, atol=0)
    # and the sums of squares equal those of the unshifted data
    small = fit_observations(load(frame(), response="honey_kg", factors=("hive", "site"))).anova
    large = fit_observations(obs).anova
    for e in ("A", "B", "AB", "residual"):
        assert_allclose(large.tables["II"].row(e).ss, small.tables["II"].row(e).ss, rtol=1e-12)


def test_no_centring_for_ordinary_values():
    obs = load(frame(), response="honey_kg", factors=("hive", "site"))
    assert obs.centring is None and obs.offset == 0.0


# --- bad input: typed errors with one clear sentence ------------------------------------------

def test_missing_file(tmp_path):
    with pytest.raises(DataFileError, match="not found"):
        load(str(tmp_path / "nope.csv"), response="honey_kg", factors=("hive", "site"))


def test_unsupported_format(tmp_path):
    p = tmp_path / "hives.json"
    p.write_text("{}")
    with pytest.raises(DataFileError, match="unsupported"):
        load(str(p), response="honey_kg", factors=("hive", "site"))


def test_unknown_column_lists_the_columns():
    with pytest.raises(ColumnError) as exc:
        load(frame(), response="honey", factors=("hive", "site"))
    msg = str(exc.value)
    assert "honey" in msg and "honey_kg" in msg and "hive" in msg and "\n" not in msg


def test_non_numeric_response_shows_value_and_row(tmp_path):
    rows = list(ROWS)
    rows[4] = ("top-bar", "orchard", "n/a?")
    path = write_text(tmp_path / "bad.csv", ",", rows=rows)
    with pytest.raises(ResponseError) as exc:
        load(path, response="honey_kg", factors=("hive", "site"))
    assert "'n/a?'" in str(exc.value) and "line 6" in str(exc.value)


def test_infinite_response():
    f = frame().assign(honey_kg=lambda d: d["honey_kg"].astype(float))
    f.loc[3, "honey_kg"] = np.inf
    with pytest.raises(ResponseError, match="infinite"):
        load(f, response="honey_kg", factors=("hive", "site"))


def test_constant_response():
    f = frame().assign(honey_kg="20")
    with pytest.raises(ResponseError, match="constant"):
        load(f, response="honey_kg", factors=("hive", "site"))


def test_factor_with_one_level():
    f = frame().assign(site="meadow")
    with pytest.raises(FactorError, match="at least 2"):
        load(f, response="honey_kg", factors=("hive", "site"))


def test_same_factor_twice():
    with pytest.raises(ColumnError, match="same column"):
        load(frame(), response="honey_kg", factors=("hive", "hive"))


def test_level_with_fewer_than_two_observations():
    f = pd.concat([frame(), pd.DataFrame([("skep", "meadow", "12.0")], columns=HEADER)], ignore_index=True)
    with pytest.raises(FactorError, match="skep"):
        load(f, response="honey_kg", factors=("hive", "site"))


def test_errors_share_a_base_class():
    # library users can catch every bad-input case with one class
    for cls in (DataFileError, ColumnError, ResponseError, FactorError):
        assert issubclass(cls, AuditInputError)
