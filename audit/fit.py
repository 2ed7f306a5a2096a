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

    def standardised(self) -> "Fit":
        """This fit in units of an exact power of two (``cells.standardised().unit``).

        Cells, observations (``obs.y``), fitted values and residuals are all
        divided by the same power of two, exactly, so scale-free quantities
        (test statistics, p-values, ratios) computed from the copy equal those
        of the original wherever the original's squares do not overflow or
        underflow, and stay finite where they would.  The ANOVA is shared (its
        F and p are already scale-free).
        """
        import dataclasses

        cs = self.cells.standardised()
        u = cs.unit
        if u == 1.0:
            return self

        def div(a):
            return None if a is None else np.asarray(a, dtype=float) / u

        obs = dataclasses.replace(self.obs, y=self.obs.y / u) if self.obs is not None else None
        return Fit(cells=cs, anova=self.anova, alpha=self.alpha, obs=obs, fitted_full=div(self.fitted_full),
                   resid_full=div(self.resid_full), fitted_additive=div(self.fitted_additive),
                   resid_additive=div(self.resid_additive))


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
