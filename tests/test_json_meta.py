"""The session-wide strict-JSON check of every findings dict (tests/conftest.py) is active.

source: issue acceptance "no JSON number field holds a string anywhere in the test
suite's outputs"; RFC 8259 (no NaN / Infinity in JSON).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import audit
from audit.findings import Findings

from conftest import FINDINGS_CHECKED, orchard_frame


def test_wrapper_is_installed():
    assert getattr(Findings.to_dict, "_strict_json_meta_check", False)


def test_wrapper_checks_and_counts():
    # invented orchard trial (property-style check of the wrapper, not of the statistics)
    f = audit.check(orchard_frame(np.full((2, 3), 4)), response="yield_kg", factors=("rootstock", "pruning"),
                    resamples=0, diagnostics=False)
    before = FINDINGS_CHECKED["count"]
    f.to_json()
    f.to_dict()
    assert FINDINGS_CHECKED["count"] == before + 2


def test_wrapper_catches_a_string_number():
    f = audit.check(orchard_frame(np.full((2, 3), 4)), response="yield_kg", factors=("rootstock", "pruning"),
                    resamples=0, diagnostics=False)
    m = f.methods[0]
    bad = dataclasses.replace(f, methods=(dataclasses.replace(m, extra={"F": "inf"}),))
    n_before = len(FINDINGS_CHECKED["violations"])
    with pytest.raises(AssertionError, match="expected a number or null"):
        bad.to_dict()
    del FINDINGS_CHECKED["violations"][n_before:]   # a planted violation, not a finding of the suite
