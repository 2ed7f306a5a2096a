"""Wild bootstrap of the two-way effects (METHODS.md section 6).

Restricted fit (for AB the additive model A + B; for a main effect the full
model under C_A mu = 0, the Type III hypothesis) with residuals e_i and
leverages h_i; y*_i = yhat_r,i + e_i / sqrt(1 - h_i) v_i with Rademacher v_i
(+1 or -1 with probability 1/2, independent); statistic: the HC3 Wald F of the
effect on y* in the saturated (cell-means) model, where the covariance of the
cell means is diagonal:

    V_jk = sum_i (y*_i - ybar*_jk)^2 / (1 - 1/n_jk)^2 / n_jk^2 = css*_jk / (n_jk - 1)^2,
    F* = (C ybar*)' (C V C')^-1 (C ybar*) / r.

As yhat_r is constant within cells and satisfies the hypothesis, F(y*) equals
the statistic of u* = e / sqrt(1 - h) v alone, so only u* is formed.
p = (1 + #{F* >= F_obs}) / (B + 1).  Valid under heteroscedasticity of
unknown form (Wu 1986; Liu 1988; Davidson & Flachaire 2008).

References
----------
.. [1] Wu, C. F. J. (1986). Jackknife, bootstrap and other resampling methods
       in regression analysis. Annals of Statistics 14, 1261-1295.
.. [2] Liu, R. Y. (1988). Bootstrap procedures under some non-i.i.d. models.
       Annals of Statistics 16, 1696-1708.
.. [3] Davidson, R. & Flachaire, E. (2008). The wild bootstrap, tamed at last.
       Journal of Econometrics 146, 162-169.
.. [4] MacKinnon, J. G. & White, H. (1985). Some heteroskedasticity-consistent
       covariance matrix estimators with improved finite sample properties.
       Journal of Econometrics 29, 305-325.
"""

from __future__ import annotations

import numpy as np

from ..fit import Fit
from ..results import MethodResult
from .permutation import Plan, _cell_sums, _merge, _prepare, _results, run_plans
from .resampling import (
    Job,
    restricted_cell_fit,
    restricted_leverage,
    wald_statistic_maker,
)
from .welch import EFFECTS, WILD_SMALL_CELL_NOTE, small_cell_note

__all__ = ["wild_bootstrap", "wild_bootstrap_all"]


def plan_wild(fit, effects, resamples) -> Plan:
    mid, name = "wild-bootstrap", "F"
    early, st = _prepare(fit, effects, resamples, mid, name,
                         need_two="the HC3 statistic (a cell with n = 1 has leverage 1/n = 1, weight 0/0)")
    if early is not None:
        return Plan(early=early, jobs=[], finish=None, layout=None, scheme="sign")
    B, Cs, ok, skipped, layout, y_sorted, means = st
    cs = layout.cell_sorted
    n = layout.counts
    # observed HC3 statistic of the data (all effects at once)
    y_c = y_sorted - float(np.mean(y_sorted))
    scale = float(y_c @ y_c) / layout.N
    obs_all = wald_statistic_maker(layout, Cs, kind="hc3", scale=scale)(*_cell_sums(y_c, layout, squares=True))[0]
    jobs, lev = [], []
    for i, C in enumerate(Cs):
        mu_r = restricted_cell_fit(means, n, C)
        h = restricted_leverage(n, C)
        u = (y_sorted - mu_r[cs]) / np.sqrt(1.0 - h)[cs]
        fn = wald_statistic_maker(layout, [C], kind="hc3", scale=scale)
        jobs.append(Job(u=u, statistic=fn, observed=obs_all[i:i + 1], squares=True))
        lev.append(float(h.max()))

    def finish(tallies, seed_rec):
        done = []
        for i, (e, C, tally) in enumerate(zip(ok, Cs, tallies)):
            extra = {"scheme": "Rademacher signs on restricted residuals e / sqrt(1 - h)", "hc": "HC3",
                     "df_error": int(layout.N - layout.m), "max_leverage": lev[i],
                     "robust_to_unequal_variances": True}
            notes = [f"wild bootstrap: restricted fit ({'the additive model A + B' if e == 'AB' else 'the full model without ' + e}), "
                     "residuals scaled by 1 / sqrt(1 - h) (its leverage) and multiplied by Rademacher signs; "
                     "statistic: the HC3 Wald F in the cell-means model (V_jk = css_jk / (n_jk - 1)^2)",
                     "valid under unequal variances of unknown form (Davidson & Flachaire 2008)"]
            if small_cell_note(fit.cells, template=WILD_SMALL_CELL_NOTE):
                notes.append(small_cell_note(fit.cells, template=WILD_SMALL_CELL_NOTE))
            done += _results(mid, name, [e], [C], obs_all[i:i + 1], tally, B, seed_rec, fit.alpha, extra, notes,
                             [C.shape[0]])
        return _merge(effects, done, skipped)

    return Plan(early=None, jobs=jobs, finish=finish, layout=layout, scheme="sign")


def _wild(fit, effects, resamples, seed, progress, budget=None, exact=False):
    """Every effect from ONE stream of sign rows (the same signs for each effect, as when
    each effect re-seeded the generator: the numbers are the same)."""
    return run_plans([plan_wild(fit, effects, resamples)], fit, resamples, seed, progress, label="wild-bootstrap",
                     exact=exact, budget=budget)[0]


def wild_bootstrap(fit: Fit, *, effect: str = "AB", resamples: int = 9999, seed: int | None = None,
                   progress=None, exact_resamples: bool = False) -> MethodResult:
    """Wild bootstrap (Rademacher, restricted residuals, HC3 Wald F) of one effect.

    Needs the raw observations, n >= 2 and nonzero variance in every filled
    cell.  statistic: the HC3 Wald F of the data (equals statsmodels
    anova_lm(robust="hc3") with sum-to-zero coding); df1: r; p resampled.
    ``extra``: seed, count, chunk_size, settled, p_interval_level, tie_rtol,
    scheme, hc, df_error, max_leverage, robust_to_unequal_variances, max_resamples,
    stopped_early, stopping_rule.  ``exact_resamples``: as
    :func:`audit.methods.permutation.freedman_lane` (False: sequential stopping).
    """
    return _wild(fit, (effect,), resamples, seed, progress, exact=exact_resamples)[0]


def wild_bootstrap_all(fit: Fit, *, resamples: int = 9999, seed: int | None = None, progress=None,
                       effects=EFFECTS, exact_resamples: bool = False) -> tuple[MethodResult, ...]:
    """Wild bootstrap results for ``effects`` (default A, B, AB), one sign draw shared by all."""
    return _wild(fit, tuple(effects), resamples, seed, progress, exact=exact_resamples)

