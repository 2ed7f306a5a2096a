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


def strict_json_check(obj, path: str = "$") -> None:
    """Assert that a findings JSON (as parsed, or a Findings.to_dict()) never
    holds a string where a number is expected: no 'inf' / 'nan'-like string
    anywhere, no non-finite float, and every value under a :data:`NUMERIC_KEYS`
    key is a finite number, null, or a (nested) list of those.

    source: RFC 8259 (JSON has no NaN or Infinity; numbers are finite) and the
    findings contract in DEVELOPERS.md (a missing number is null with a note)."""
    import math

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
            if k in NUMERIC_KEYS and not isinstance(v, dict):
                assert numeric_ok(v), f"{where}: expected a number or null, found {v!r}"
            strict_json_check(v, where)
    elif isinstance(obj, (list, tuple)):
        for i, v in enumerate(obj):
            strict_json_check(v, f"{path}[{i}]")
    elif isinstance(obj, str):
        assert obj.strip().lower() not in _NAN_WORDS, f"{path}: a number written as the string {obj!r}"
    elif isinstance(obj, float):
        assert math.isfinite(obj), f"{path}: non-finite float {obj!r}"


def strict_json_loads(text: str):
    """json.loads that refuses NaN / Infinity literals (RFC 8259)."""
    import json

    def refuse(const):
        raise ValueError(f"non-standard JSON constant {const}")

    return json.loads(text, parse_constant=refuse)
