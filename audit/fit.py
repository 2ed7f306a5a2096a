"""The fitted design: cell statistics, the classical ANOVA and, in data mode,
per-observation fitted values and residuals of the full and additive models.

Later stages (diagnostics, alternative methods, the verdict) take a :class:`Fit`
and never refit anything over the observations themselves.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .core import AnovaResult, anova_two_way
from .design import CellStats, cells_from_observations
from .intake import Observations
from .options import check_alpha  # re-exported: the check lives in audit/options.py

__all__ = ["Fit", "fit_observations", "fit_cells", "check_alpha"]


@dataclass(frozen=True, kw_only=True)
class Fit:
    """A fitted two-way design.

    Attributes
    ----------
    cells : CellStats
    anova : AnovaResult
    alpha : float
    obs : Observations or None
        None in summary mode (only cell statistics known).
    fitted_full, resid_full : ndarray or None
        Cell mean of each observation and y minus it (relative to the offset).
    fitted_additive, resid_additive : ndarray or None
        The additive (A + B) model's fitted values and residuals.
    """

    cells: CellStats
    anova: AnovaResult
    alpha: float
    obs: Observations | None = None
    fitted_full: np.ndarray | None = None
    resid_full: np.ndarray | None = None
    fitted_additive: np.ndarray | None = None
    resid_additive: np.ndarray | None = None

    @property
    def has_data(self) -> bool:
        return self.obs is not None


def fit_cells(cells: CellStats, *, alpha: float = 0.05) -> Fit:
    """Fit from cell statistics alone (summary mode)."""
    return Fit(cells=cells, anova=anova_two_way(cells), alpha=check_alpha(alpha))


def fit_observations(obs: Observations, *, alpha: float = 0.05) -> Fit:
    """Fit from raw observations (data mode)."""
    cells = cells_from_observations(
        obs.y, obs.a, obs.b, levels_a=obs.levels_a, levels_b=obs.levels_b,
        factors=obs.factors, offset=obs.offset, response=obs.response,
    )
    an = anova_two_way(cells)
    cell = obs.cell
    ff = cells.means.ravel()[cell]
    fa = an.additive_fit.ravel()[cell]
    return Fit(
        cells=cells, anova=an, alpha=check_alpha(alpha), obs=obs,
        fitted_full=ff, resid_full=obs.y - ff, fitted_additive=fa, resid_additive=obs.y - fa,
    )
