"""Tukey's (1949) one-degree-of-freedom test for non-additivity.

With one observation per cell there is no within-cell error term, so the
interaction cannot be tested on its (J-1)(K-1) df.  Tukey's test spends one of
them on the specific multiplicative form (ab)_jk = theta a_j b_k:

    SS_N = [sum_jk y_jk (ybar_j. - ybar)(ybar_.k - ybar)]^2
           / [sum_j (ybar_j. - ybar)^2  sum_k (ybar_.k - ybar)^2]
    F = SS_N / ((SS_res - SS_N) / ((J-1)(K-1) - 1))  on (1, (J-1)(K-1) - 1) df,

SS_res the additive model's residual SS (METHODS.md section 7).  It detects
only non-additivity of that form (often removable by a power transformation);
a non-significant result does not show the effects are additive.

The function always returns a result: when some cell has more than one
observation it has p None and a note that the test applies only to one
observation per cell (the other methods then test the interaction).  Works from
cell statistics (summary mode too).

References
----------
.. [1] Tukey, J. W. (1949). One degree of freedom for non-additivity.
       Biometrics 5, 232-242.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from ..fit import Fit
from ..results import MethodResult
from .welch import check_effect

__all__ = ["tukey_one_df"]

MID = "tukey-one-df"


def _none(effect: str, reason: str, extra=None) -> MethodResult:
    return MethodResult(id=MID, effect=effect, statistic=None, statistic_name="F", p=None,
                        notes=(reason,), extra=extra or {})


def tukey_one_df(fit: Fit, *, effect: str = "AB") -> MethodResult:
    """Tukey's one-df test for non-additivity (interaction only).

    ``extra``: ss_nonadditivity, ss_residual_additive, ss_remainder, df_remainder,
    theta (the multiplicative coefficient sum y a_j b_k / (sum a_j^2 sum b_k^2)).
    """
    check_effect(effect)
    if effect != "AB":
        return _none(effect, "Tukey's one-df test concerns the interaction only; main effects are not tested by it")
    cells = fit.cells
    counts = cells.counts
    if not (counts == 1).all():
        return _none(effect, "not applicable: Tukey's one-df test applies only when every cell has exactly one "
                             "observation; with replication the interaction is tested on its full df")
    J, K = cells.J, cells.K
    df_rem = (J - 1) * (K - 1) - 1
    if df_rem < 1:
        return _none(effect, f"not computed: a {J} x {K} layout with one observation per cell leaves "
                             f"(J-1)(K-1) - 1 = {df_rem} df for the remainder")
    y = cells.means - cells.means.mean()                 # centred; the test is location invariant
    ra = y.mean(axis=1) - y.mean()
    cb = y.mean(axis=0) - y.mean()
    den = float(np.sum(ra ** 2) * np.sum(cb ** 2))
    resid = y - ra[:, None] - cb[None, :] - y.mean()
    ss_res = float(np.sum(resid ** 2))
    if den == 0.0:
        return _none(effect, "not computed: one factor has identical level means, so the product of main "
                             "effects that the test looks for is zero everywhere")
    num = float(ra @ y @ cb)
    ss_n = num * num / den
    ss_rem = ss_res - ss_n
    extra = {"ss_nonadditivity": ss_n, "ss_residual_additive": ss_res, "ss_remainder": max(ss_rem, 0.0),
             "df_remainder": df_rem, "theta": num / den}
    if ss_rem <= 1e-14 * max(ss_res, 1e-300):
        return _none(effect, "not computed: the one-df term absorbs the whole additive-model residual "
                             "(remainder SS 0), so F is infinite", extra)
    F = ss_n / (ss_rem / df_rem)
    p = float(stats.f.sf(F, 1, df_rem))
    notes = ("one observation per cell: tests only the multiplicative form of interaction "
             "(ab)_jk = theta a_j b_k (Tukey 1949); a non-significant result does not show additivity, "
             "and a significant one may be removable by a power transformation",)
    return MethodResult(id=MID, effect="AB", statistic=float(F), statistic_name="F", df1=1.0, df2=float(df_rem),
                        p=p, notes=notes, extra=extra)
