"""Whole-pipeline robustness: every design that intake accepts runs through all
diagnostics, methods, text and figures without an exception, and the findings JSON
is strict (no NaN).  Numbers that cannot be formed are None with a reason.

common practice (robustness of a reviewing tool); invented data, as property-style checks.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import audit
from audit.render.figures import write_figures
from audit.render.text import render_text


def frame(counts, seed=0, gen=None):
    rng = np.random.default_rng(seed)
    gen = gen or (lambda a, b, n: rng.normal(10, 1, n))
    rows = [(f"a{j}", f"b{k}", v) for j, row in enumerate(counts) for k, n in enumerate(row) for v in gen(j, k, n)]
    return pd.DataFrame(rows, columns=["A", "B", "y"])


CASES = {
    "empty cell": lambda: frame([[5, 6, 0], [4, 7, 5], [6, 5, 6]]),
    "n=1 everywhere": lambda: frame([[1, 1, 1], [1, 1, 1], [1, 1, 1]]),
    "some n=1 cells": lambda: frame([[1, 6, 4], [4, 1, 5], [6, 5, 6]]),
    "zero-variance cell": lambda: frame([[4, 4], [4, 4]],
                                        gen=lambda a, b, n: np.full(n, 3.0) if (a, b) == (0, 0) else
                                        np.random.default_rng(a * 2 + b).normal(3, 1, n)),
    "every cell constant": lambda: frame([[3, 3], [3, 3]], gen=lambda a, b, n: np.full(n, float(a + 2 * b))),
    "disconnected": lambda: frame([[5, 5, 0, 0], [5, 5, 0, 0], [0, 0, 5, 5], [0, 0, 5, 5]]),
    "2x2 with n=2": lambda: frame([[2, 2], [2, 2]]),
    "integer responses with ties": lambda: frame([[8, 9], [7, 10]],
                                                 gen=lambda a, b, n: np.random.default_rng(a + 3 * b)
                                                 .integers(1, 4, n).astype(float)),
    "negative responses": lambda: frame([[8, 9], [7, 10]], gen=lambda a, b, n: -5 + np.random.default_rng(a).normal(0, 1, n)),
    "large common offset": lambda: frame([[8, 9], [7, 10]],
                                         gen=lambda a, b, n: 1e12 + np.random.default_rng(a + b).normal(0, 0.1, n)),
    "2x2 with an empty cell": lambda: frame([[4, 4], [4, 0]]),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_every_accepted_design_runs_end_to_end(case, tmp_path):
    f = audit.check(CASES[case](), response="y", factors=("A", "B"), resamples=99, seed=1, figures=True)
    d = json.loads(f.to_json())  # strict: allow_nan=False inside to_json
    assert len(d["diagnostics"]) == 10
    assert all(m["p"] is not None or m["notes"] for m in d["methods"])  # a missing p always has a reason
    for t in ("I", "II", "III"):
        for row in d["anova"][t]:
            if row["effect"] != "residual" and row["p"] is None:
                assert row["note"]
    text = render_text(f)
    assert "Cautions" in text
    assert write_figures(f.figure_data, tmp_path)


def test_one_observation_per_cell_gets_tukey():
    # METHODS.md section 7: Tukey's one-df test applies when every cell has one observation
    f = audit.check(CASES["n=1 everywhere"](), response="y", factors=("A", "B"), resamples=0)
    m = f.method("tukey-one-df")
    assert m.p is not None and m.df1 == 1 and m.df2 == 3
