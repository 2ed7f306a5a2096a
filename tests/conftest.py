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
