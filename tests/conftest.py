"""Shared fixtures for the reference tests (kept small on purpose)."""

from __future__ import annotations

import os
import sys

import numpy as np
import pandas as pd
import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
if ROOT not in sys.path:  # run from a checkout without installing
    sys.path.insert(0, ROOT)

FIXTURES = os.path.join(ROOT, "fixtures")


def orchard_frame(counts, *, seed: int = 20240611, empty=()) -> pd.DataFrame:
    """Invented scenario: fruit yield (kg per tree) of an orchard trial,
    rootstock (factor A) x pruning regime (factor B), with the given cell counts.

    ``empty`` lists (j, k) cells to leave without observations.  The cell means
    carry main effects and an interaction so every SS is well away from zero.
    """
    rng = np.random.default_rng(seed)
    counts = np.asarray(counts)
    J, K = counts.shape
    rows = []
    for j in range(J):
        for k in range(K):
            if (j, k) in empty:
                continue
            mu = 40.0 + 3.0 * j - 2.0 * k + 1.5 * ((j + 2 * k) % 3)
            for _ in range(int(counts[j, k])):
                rows.append((f"stock-{chr(65 + j)}", f"prune-{k + 1}", mu + rng.normal(0.0, 2.5)))
    order = rng.permutation(len(rows))
    frame = pd.DataFrame([rows[i] for i in order], columns=["rootstock", "pruning", "yield_kg"])
    return frame


@pytest.fixture(scope="session")
def unbalanced_3x4() -> pd.DataFrame:
    """3 x 4 orchard trial, every cell filled, counts 2..9 (unbalanced, not proportional)."""
    counts = np.array([[2, 5, 9, 3], [7, 4, 6, 8], [3, 9, 2, 5]])
    return orchard_frame(counts)


# ---------------------------------------------------------------------------
# strict JSON: a number or null wherever the findings promise a number
# ---------------------------------------------------------------------------

#: keys whose values are numbers (or null, or lists of numbers / nulls) wherever
#: they occur in a findings JSON (anova rows, methods, diagnostic values)
NUMERIC_KEYS = frozenset({
    "ss", "df", "ms", "F", "p", "partial_eta_sq", "partial_eta_sq_ci", "partial_omega_sq",
    "statistic", "df1", "df2", "alpha", "mean", "sd", "additive_fit", "term",
    "skewness", "skewness_se", "excess_kurtosis", "excess_kurtosis_se", "W", "t", "p_bonferroni",
    "cutoff", "max_abs_t", "max_cooks", "cooks_threshold", "sd_ratio", "sd_ratio_null_95",
    "raw_p", "log_p", "boxcox_p", "lambda_hat", "lambda_ci", "loglik_max", "profile_loglik",
    "p_full", "F_full", "loo_p", "p_min", "p_max", "p_path",
    "critical_5pct", "p_interpolated", "f_bias_ratio",
})
_NAN_WORDS = frozenset({"inf", "-inf", "+inf", "infinity", "-infinity", "nan", "-nan"})


def strict_json_check(obj, path: str = "$", names: frozenset | None = None) -> None:
    """Assert that a findings JSON (as parsed, or a Findings.to_dict()) never
    holds a string where a number is expected: no 'inf' / 'nan'-like string
    anywhere, no non-finite float, and every value under a :data:`NUMERIC_KEYS`
    key is a finite number, null, or a (nested) list of those.

    A string equal to a level, factor or response name of the findings (a level
    may be literally called 'nan' or 'inf') is data, not a number, and passes.

    source: RFC 8259 (JSON has no NaN or Infinity; numbers are finite) and the
    findings contract in DEVELOPERS.md (a missing number is null with a note)."""
    import math

    if names is None:
        names = set()
        if isinstance(obj, dict):
            for lv in ((obj.get("design") or {}).get("levels") or {}).values():
                names.update(str(x) for x in lv)
            names.update(str(x) for x in obj.get("factors") or ())
            if isinstance(obj.get("response"), str):
                names.add(obj["response"])
        names = frozenset(names)

    def numeric_ok(v) -> bool:
        if v is None or isinstance(v, bool):
            return v is None
        if isinstance(v, (int, float)):
            return math.isfinite(v)
        if isinstance(v, list):
            return all(numeric_ok(x) for x in v)
        return False

    if isinstance(obj, dict):
        for k, v in obj.items():
            where = f"{path}.{k}"
            if k in NUMERIC_KEYS and k not in names and not isinstance(v, dict):
                assert numeric_ok(v), f"{where}: expected a number or null, found {v!r}"
            strict_json_check(v, where, names)
    elif isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            strict_json_check(v, f"{path}[{i}]", names)
    elif isinstance(obj, str) and obj not in names:
        assert obj.strip().lower() not in _NAN_WORDS, f"{path}: a number written as the string {obj!r}"
    elif isinstance(obj, float):
        assert math.isfinite(obj), f"{path}: non-finite float {obj!r}"


def strict_json_loads(text: str):
    """json.loads that refuses NaN / Infinity literals (RFC 8259)."""
    import json

    def refuse(const):
        raise ValueError(f"non-standard JSON constant {const}")

    return json.loads(text, parse_constant=refuse)


def findings_json(text):
    """Parse a findings JSON written by a CLI subprocess (its Findings.to_dict ran in another
    process, out of reach of the session wrapper below): strict_json_loads + strict_json_check."""
    d = strict_json_loads(text)
    strict_json_check(d)
    return d


# ---------------------------------------------------------------------------
# meta-check: every findings dict produced in the session is strict JSON
# ---------------------------------------------------------------------------

#: how many Findings.to_dict() results the session checked, and the first violations found
FINDINGS_CHECKED = {"count": 0, "violations": []}


@pytest.fixture(scope="session", autouse=True)
def _strict_findings_json():
    """Wrap ``audit.findings.Findings.to_dict`` for the whole session so that every
    findings dict any test produces (directly, through ``to_json`` or through the
    in-process CLI) passes :func:`strict_json_check`.  A violation fails the call
    that produced it (so the test that made it fails) and is recorded.

    source: the findings contract in DEVELOPERS.md (a number or null, never a
    string or NaN where a number is promised); RFC 8259."""
    from audit.findings import Findings

    original = Findings.to_dict

    import jsonschema

    from audit.findings import findings_schema

    validator = jsonschema.Draft202012Validator(findings_schema())

    def checked_to_dict(self):
        d = original(self)
        FINDINGS_CHECKED["count"] += 1
        try:
            strict_json_check(d)
            # every findings JSON of the session also follows the published schema
            errors = sorted(validator.iter_errors(d), key=lambda e: list(e.path))
            assert not errors, f"schema: {list(errors[0].path)}: {errors[0].message[:300]}"
        except AssertionError as exc:
            FINDINGS_CHECKED["violations"].append(str(exc))
            raise
        return d

    checked_to_dict.__wrapped__ = original
    checked_to_dict._strict_json_meta_check = True
    Findings.to_dict = checked_to_dict
    try:
        yield FINDINGS_CHECKED
    finally:
        Findings.to_dict = original
