"""A size check on data shaped like this one: how often does each analytic
method reject a true "no interaction" null on datasets that keep this
dataset's cell sizes, cell variances and residual shape?

No rule table can say whether the classical F is liberal *on this dataset*:
that depends on how the variances pair with the cell sizes, how unequal they
are, the shape of the errors and the design.  So we simulate it.

Simulation (``size_check``)
---------------------------
* Cell sizes: those of the data.  Cell variances: the data's, moderated toward
  the pooled within-cell variance (below).
* Errors (data mode): resampled with replacement from the pooled standardised
  residuals z_i = e_i / s_cell * sqrt(n_cell / (n_cell - 1)) (mean 0 and
  variance 1 within every cell) and rescaled to each cell's moderated SD.
  Summary mode (only cell means, SDs and sizes): normal errors, drawn exactly
  as cell sufficient statistics (mean ~ N(0, sigma^2 / n), centred SS ~
  sigma^2 chi2(n - 1)); the result says so.
* Cell means: the additive (A + B) fit of the data, i.e. no interaction, main
  effects kept.  Every statistic checked here is invariant to cell means that
  satisfy its null (the interaction statistics to any additive pattern, the
  Type III / Welch-James / HC main-effect statistics to any pattern with that
  effect's unweighted marginal means equal), so the simulated statistics are
  computed from the simulated errors' cell statistics alone; the rows for A and
  B are sizes under "no A effect" and "no B effect" with the other effects as
  in the data.
* Statistics, vectorised over the R replications: cell counts, means and
  centred SS of each replication (one ``np.add.reduceat`` per pass over a
  cell-sorted (R, N) block, two passes), then each method's p from the
  (R, m) cell statistics in one batched pass: the classical F (the interaction
  SS by the n-weighted projection of the cell means off the additive model,
  the same for SS Types I, II and III with every cell filled; Type III main
  effects, Type II with empty cells, as the method reports), Welch-James
  (Johansen 1980, METHODS.md section 2) and the HC3 / HC4 Wald F (METHODS.md
  section 3) with the r x r contrast covariances inverted in one batched call.
  A replication rejects when p < alpha.
* No loop over replications and no model refit; the random stream depends only
  on ``seed``, so the same seed gives the same result.

Large cells (``LARGE_CELL``, ``LARGE_CELL_CV``)
-----------------------------------------------
Resampling every error costs R x N draws (2,000 x 1,000,000 at a million rows).
A cell of n resampled errors enters the statistics only through its mean and
centred SS, and for large n the mean and sample variance of n i.i.d. draws from
the pool are close to jointly normal with moments known from the pool (mean mu,
variance s2, third and fourth central moments mu3, mu4): Var mean = s2 / n,
E s^2 = s2, Var s^2 = (mu4 - s2^2 (n - 3) / (n - 1)) / n, Cov(mean, s^2) =
mu3 / n (Cramer 1946, sec. 27.4).  A cell with n >= LARGE_CELL = 1,000 whose
sample variance has a coefficient of variation sqrt((mu4 / s2^2 - (n - 3) /
(n - 1)) / n) <= LARGE_CELL_CV = 0.1 under this residual shape draws its mean
and variance from that approximation (two normals per cell and replication,
the pilot as well); the other cells are resampled exactly as above.  Below
LARGE_CELL nothing changes (the same seed gives the same numbers as before).
The CV condition is what matters: heavy tails make the sample variance skewed
and tied to the mean in a way a normal pair does not keep, and there the
approximation made Welch-James and HC liberal.  Measured with
``benchmarks/study_large_cell.py`` (4 x 5 design, cell sizes a base times 1-5,
variances ~ 1/n; exact against approximate in every cell, R = 4,000-10,000,
seed 20261202): normal errors with CV up to 0.14, t(4) (pool kurtosis 15) with
CV 0.04-0.10 and centred lognormal(0, 1) (kurtosis 122) with CV 0.06-0.13
agreed within Monte Carlo error for every method and effect (|z| <= 1.6);
t(4) with CV 0.11-0.24 gave Welch-James sizes about 0.010 too high (z = 3.3),
lognormal with CV 0.19-0.41 about 0.08 too high, and with CV 0.20-0.45 a
different prior df (classical F size 0.05 instead of 0.13).  The floor of
1,000 is a second guard and a boundary: the mean's skewness is then at most
3% of the residuals' (gamma / sqrt(n)), every small or moderate dataset keeps
exact resampling (and its numbers), and the exact part never costs more than
R x 1,000 draws per cell.

Power on data shaped like this one (the interaction)
---------------------------------------------------
The same simulated errors with an interaction added to the cell means: for each
replication a direction drawn uniformly in the contrast space C mu, scaled to the
Wald noncentrality lambda (with the simulated variances) at which the F(r, N - m)
test has power ``POWER_TARGET`` = 0.5.  ``power`` is the share with p < alpha;
``adjusted_power`` rejects at the method's ``critical_p`` (the smaller of alpha and
the alpha-quantile of its simulated null p-values), so warm methods gain nothing.
The verdict's primary test is chosen on these (``audit.verdict.trust``).  The
variance-noise bias of each interaction size (``_noise_sets``: the
simulated variances re-estimated as the data would, a bootstrap bias) is
subtracted before the status is judged.  Cells of 2 do not enter the resampled
residual pool (their standardised residuals are exactly -1 and +1).

Moderated cell variances (after Smyth 2004)
--------------------------------------------
Cell SDs from 4-5 observations are noisy: on truly homoscedastic data the
plug-in SDs alone make the simulated nulls heteroscedastic and the classical F
can look liberal (METHODS.md 10b).  Each cell variance is therefore replaced by
the empirical-Bayes posterior

    s2~_jk = (d0 s2_pooled + d_jk s2_jk) / (d0 + d_jk),   d_jk = n_jk - 1,

with the prior centred on the pooled within-cell variance s2_pooled = MS_E and
the prior df d0 estimated by Smyth's (2004) moment method: with e_jk = log
s2_jk - E[log(s2 / sigma2)], solve psi'(d0 / 2) = var(e) - mean Var[log(s2 /
sigma2)] (psi' the trigamma function).  In summary mode the two sampling
moments are the normal-theory psi(d/2) - log(d/2) and psi'(d/2) (Smyth's own
form).  In data mode they come from a pilot simulation (500 draws per cell) of
residuals standardised by the pooled SD, i.e. for equal variances and this
dataset's residual shape: heavy tails spread the log variances more than
normal theory says, and that spread is not evidence of unequal variances.
When the log variances spread no more than that, d0 is infinite (complete
shrinkage: equal variances are simulated).  d0 is estimated rather than fixed
because the same data say how much real heteroscedasticity there is: a large
spread gives a small d0 and keeps the cells' own variances (so the liberal
classical F under variances paired with cell sizes is still found), while
homoscedastic data give a large or infinite d0.  ``prior_df`` fixes it
instead (0: no moderation; ``inf``: equal variances).  Cells with n = 1 or a
zero SD do not enter the estimate of d0; a cell with n = 1 takes the pooled
variance.

Trust rule (:data:`LIBERAL_MULTIPLE`, :data:`CONSERVATIVE_FRACTION`)
--------------------------------------------------------------------
With R replications the estimated size k / R has a 99% Clopper-Pearson
interval [lo, hi] (Clopper & Pearson 1934).

* ``liberal``       when lo > 1.5 alpha (clearly above alpha, allowing for the
                    Monte Carlo error and for the cell variances being
                    estimates);
* ``conservative``  when hi < 0.6 alpha;
* ``ok``            otherwise;  ``not-run`` (with the reason) when the method
                    cannot be computed on this design (n = 1 cells or empty
                    cells for the cell-means methods, no error df, R = 0, or a
                    method without a cell-statistic form).

Measured false-alarm rate (``benchmarks/calibration_false_alarm.py``, seed
20261202, 2026-12-02; R = 2,000, alpha = 0.05, 400 datasets per condition,
interaction row): share of datasets whose *classical F* is flagged although
the truth is known.

=====================================================  =========  ==============
condition (truth)                                      liberal    conservative
=====================================================  =========  ==============
equal variances, balanced 3 x 3, n = 5 (exact)         0.0%       0.0%
equal variances, unbalanced 3 x 3, n = 4-16 (exact)    0.5%       0.0%
equal variances, 2 x 2, n = 4 (exact)                  0.0%       0.0%
same unbalanced 3 x 3, t(5) errors (near exact)        5.0%       0.0%
same unbalanced 3 x 3, normal, *no* moderation         15.8%      3.0%
variance ~ 1/n, SD ratio 2 (liberal, about .15)        34.7%      -
SD ~ 1/n, ratio 4 (liberal, about .29)                 94.5%      -
SD ~ n, ratio 4 (conservative, about .01)              -          54.7%
=====================================================  =========  ==============

Alternatives measured in the same run: a multiple of 1.25 raises the false
alarms to 1.3% (unbalanced, normal) and 9.0% (t(5)); 2.0 lowers the t(5) rate
to 2.8% but finds only 18.8% of the variance ~ 1/n datasets.  A conservative
fraction of 0.5 finds 34.0% of the SD ~ n datasets, 0.75 finds 79.5% but
raises a false alarm on 0.5% of the t(5) datasets.  1.5 and 0.6 keep the
false alarms at or below 0.5% on normal errors and 5% with heavy tails, where
a false 'liberal' costs little (Welch-James and HC3 still test the
interaction).  Welch-James was flagged liberal on 0.0-0.3% of these datasets
except under SD ~ 1/n with ratio 4 (5.5%; its true size there is about 0.07,
METHODS.md 10a).  HC4 is flagged on 95% of the balanced n = 5 datasets: with
equal cells it reduces to the HC2 form referred to F(q, N - p), whose size is
about 0.10 in cells of 5 (a true finding, not a false alarm).

Limits: the cell variances and the residual shape are estimates from this
dataset, so the check shows how the methods behave on data *like* these, not
on the unknown truth; with few observations per cell it is itself noisy.
Independence of the observations is assumed, not checked.  The resampling
methods are not simulated here (they would need a resampling loop inside each
replication); their trust comes from the rule table.

References
----------
.. [1] Smyth, G. K. (2004). Linear models and empirical Bayes methods for
       assessing differential expression in microarray experiments.
       Statistical Applications in Genetics and Molecular Biology 3(1), art. 3.
.. [2] Box, G. E. P. (1954). Some theorems on quadratic forms applied in the
       study of analysis of variance problems, I. Annals of Mathematical
       Statistics 25, 290-302.
.. [3] Glass, G. V., Peckham, P. D. & Sanders, J. R. (1972). Consequences of
       failure to meet assumptions underlying the fixed effects analyses of
       variance and covariance. Review of Educational Research 42, 237-288.
.. [4] Johansen, S. (1980). Biometrika 67, 85-92.
.. [5] Clopper, C. J. & Pearson, E. S. (1934). Biometrika 26, 404-413.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from ..core import (
    Type3Contrast,
    additive_design,
    additive_residual,
    check_dense_budget,
    contrast_matrix,
    structured_ss,
    structured_ss_rdiag,
    type3_main_wald,
)
from ..errors import OptionError

__all__ = [
    "Calibration",
    "CalibrationRow",
    "Shrinkage",
    "size_check",
    "moderated_variances",
    "classical_f_batch",
    "welch_james_batch",
    "hc_wald_batch",
    "DEFAULT_REPLICATIONS",
    "CALIBRATED_METHODS",
    "LIBERAL_MULTIPLE",
    "CONSERVATIVE_FRACTION",
    "INTERVAL_LEVEL",
]

#: default number of simulated null datasets (99% interval half-width about
#: about +-0.012 at a size of 0.05; the whole check at N = 2,004 in a 4 x 3 design
#: takes about 0.08 s, benchmarks/bench_calibration.py)
DEFAULT_REPLICATIONS = 2000
#: methods with a cell-statistic form that the size check simulates
CALIBRATED_METHODS = ("classical-f", "welch-james", "hc3-wald", "hc4-wald")
#: 'liberal' when the lower end of the interval exceeds this multiple of alpha
LIBERAL_MULTIPLE = 1.5
#: 'conservative' when the upper end of the interval is below this fraction of alpha
CONSERVATIVE_FRACTION = 0.6
#: level of the Clopper-Pearson interval of each estimated size
INTERVAL_LEVEL = 0.99
#: pilot draws used to find the sampling spread of log cell variances under the
#: residual shape (data mode)
PILOT_REPLICATIONS = 500
#: memory budget for one chunk of resampled errors (float64 elements)
_CHUNK_ELEMENTS = 500_000
#: cells with at least this many observations draw their mean and centred SS from the
#: moment-matched normal approximation instead of resampling every error (see
#: ``_simulate_cells`` and "Large cells" in the module docstring)
LARGE_CELL = 1000
#: ... and only where the coefficient of variation of a cell's sample variance under the
#: residual shape, sqrt((kurtosis - (n - 3) / (n - 1)) / n), is at most this
LARGE_CELL_CV = 0.1
EFFECTS = ("A", "B", "AB")
STATUSES = ("liberal", "conservative", "ok", "not-run")
#: the Welch-James and HC rows are simulated only for hypotheses with at most this many contrasts
#: (the batch holds R r x r matrices: 2,000 x 120 x 120 doubles is 230 MB)
MAX_WALD_ROWS = 120
#: bytes of simulated cell statistics (means, SS, variances of a block of replications)
#: held at once; above it the replications are simulated and tested block by block, so
#: memory stays O(cells) instead of O(R x cells)
_SIM_BYTES = 96 * 2**20


# ----------------------------------------------------------------------------- results


@dataclass(frozen=True, kw_only=True)
class CalibrationRow:
    """The estimated size of one method for one effect.

    Attributes
    ----------
    method : str
        Method id ('classical-f', 'welch-james', 'hc3-wald', 'hc4-wald', ...).
    effect : str
        'A', 'B' or 'AB'.
    size : float or None
        Share of simulated null datasets with p < alpha (None when not run).
    interval : tuple of float or None
        99% Clopper-Pearson interval of ``size``.
    rejections : int or None
        Number of simulated datasets with p < alpha.
    replications : int
        Number of simulated datasets on which the method gave a p-value (the
        others, if any, are counted in ``undefined``).
    undefined : int
        Simulated datasets on which the method could not be computed.
    status : str
        'liberal', 'conservative', 'ok' or 'not-run'.
    reason : str
        One plain sentence saying why.
    power : float or None
        Interaction rows only: share of simulated *alternatives* (the same
        errors with an interaction pattern of noncentrality
        ``Calibration.power_noncentrality`` in a random direction added to
        the cell means) with p < alpha; None when not simulated.
    adjusted_power : float or None
        The same, rejecting at the method's own simulated critical p (the
        alpha-quantile of its null p-values when its size exceeds alpha):
        power at a simulated size of at most alpha, comparable across methods.
    bias : float or None
        Interaction rows: the bootstrap bias of ``size`` from the noise of the
        simulated cell variances (``_noise_sets``); the status is
        judged on size - bias.  None when not estimated (equal variances
        simulated, or R < 400).
    critical_p : float or None
        Interaction rows: the smaller of alpha and the alpha-quantile of the
        method's simulated null p-values (the level at which its simulated
        size is alpha; a parametric-bootstrap calibration of the test).
    """

    method: str
    effect: str
    size: float | None
    interval: tuple[float, float] | None
    rejections: int | None
    replications: int
    undefined: int
    status: str
    reason: str
    power: float | None = None
    adjusted_power: float | None = None
    bias: float | None = None
    critical_p: float | None = None

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "effect": self.effect,
            "size": self.size,
            "interval": list(self.interval) if self.interval else None,
            "rejections": self.rejections,
            "replications": self.replications,
            "undefined": self.undefined,
            "status": self.status,
            "reason": self.reason,
            "power": self.power,
            "adjusted_power": self.adjusted_power,
            "bias": self.bias,
            "critical_p": self.critical_p,
        }


@dataclass(frozen=True, kw_only=True)
class Shrinkage:
    """How the simulated cell variances were obtained.

    Attributes
    ----------
    method : str
        'moderated' (prior df estimated, Smyth 2004), 'fixed-prior' (prior df
        given), 'none' (the cells' own variances) or 'equal' (the pooled
        variance in every cell).
    prior_df : float or None
        d0; None when infinite (complete shrinkage: equal variances) or when
        not applicable.
    complete : bool
        True when every cell was given the pooled variance.
    target_variance : float or None
        The pooled within-cell variance MS_E that variances are shrunk toward.
    cell_sd : list of list of float or None
        The SDs used in the simulation, (J, K), relative to the data's units
        (None in empty cells).
    note : str
    """

    method: str
    prior_df: float | None
    complete: bool
    target_variance: float | None
    cell_sd: list | None
    note: str

    def to_dict(self) -> dict:
        return {"method": self.method, "prior_df": self.prior_df, "complete": self.complete,
                "target_variance": self.target_variance, "cell_sd": self.cell_sd, "note": self.note}


@dataclass(frozen=True, kw_only=True)
class Calibration:
    """The size check of the analytic methods on data shaped like this one.

    Attributes
    ----------
    alpha : float
    replications : int
        R, the number of simulated null datasets (0: the check was turned off).
    seed : int or None
    error_source : str
        'resampled-residuals' (data mode), 'normal' (summary mode, or no usable
        residuals) or 'none' (not run).
    error_note : str
        One sentence on how the errors were simulated.
    shrinkage : Shrinkage
    liberal_multiple, conservative_fraction, interval_level : float
        The trust rule (see the module docstring).
    rows : tuple of CalibrationRow
        One per method and effect, in the order of ``methods`` then A, B, AB.
    notes : tuple of str
        Limits of the check.
    """

    alpha: float
    replications: int
    seed: int | None
    error_source: str
    error_note: str
    shrinkage: Shrinkage
    liberal_multiple: float
    conservative_fraction: float
    interval_level: float
    rows: tuple[CalibrationRow, ...]
    notes: tuple[str, ...]
    power_noncentrality: float | None = None

    def row(self, method: str, effect: str = "AB") -> CalibrationRow:
        for r in self.rows:
            if r.method == method and r.effect == effect:
                return r
        raise KeyError((method, effect))

    def to_dict(self) -> dict:
        return {
            "alpha": self.alpha,
            "replications": self.replications,
            "seed": self.seed,
            "error_source": self.error_source,
            "error_note": self.error_note,
            "shrinkage": self.shrinkage.to_dict(),
            "rule": {"liberal_multiple": self.liberal_multiple,
                     "conservative_fraction": self.conservative_fraction,
                     "interval_level": self.interval_level},
            "rows": [r.to_dict() for r in self.rows],
            "notes": list(self.notes),
            "power_noncentrality": self.power_noncentrality,
        }


# ----------------------------------------------------------------------------- batched statistics


def _type3(J: int, K: int) -> dict[str, np.ndarray]:
    CJ, CK = contrast_matrix(J), contrast_matrix(K)
    return {"A": np.kron(CJ, np.ones((1, K)) / K), "B": np.kron(np.ones((1, J)) / J, CK), "AB": np.kron(CJ, CK)}


def _big(r: int, m: int) -> bool:
    """Large enough for the structured forms (the threshold of :mod:`audit.methods.wald`,
    so small designs keep their dense numbers bit for bit)."""
    from ..methods.wald import _DENSE_WORK

    return r * r * m >= _DENSE_WORK


def _residual_maker(X: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, int]:
    """P with r = P @ y the n-weighted LS residual of y on X (rows with w > 0)."""
    check_dense_budget(8.0 * len(w) * (len(w) + X.shape[1]), what="the size check's classical F with empty cells",
                       J=len(w), K=None, skip="turn the size check off (check(calibration=0), --calibration 0)")
    sw = np.sqrt(w)
    Xw = X * sw[:, None]
    Q, s, _ = np.linalg.svd(Xw, full_matrices=False)
    rank = int(np.sum(s > s.max() * max(Xw.shape) * np.finfo(float).eps))
    Q = Q[:, :rank]
    # r = y - X b with Xw b = Q Q' (sw y):  sw r = (I - Q Q') sw y
    P = (np.eye(len(w)) - Q @ Q.T) * sw[None, :] / sw[:, None]
    return P, rank


def classical_f_batch(means, css, counts, J: int, K: int, *, filled=None):
    """Classical F of A, B and AB for a batch of datasets sharing cell sizes.

    Parameters
    ----------
    means, css : ndarray, shape (R, m)
        Cell means and centred sums of squares of the m filled cells (j-major).
    counts : ndarray, shape (m,)
        Cell sizes (>= 1).
    J, K : int
        Levels of A and B.
    filled : ndarray of bool (J*K,), optional
        Which of the J*K cells are filled (default: all).

    Returns
    -------
    dict effect -> (F (R,), df1, df2)
        Interaction SS by the n-weighted projection off the additive model (the
        same for SS Types I, II and III); main effects Type III when every cell
        is filled, Type II otherwise (as ``audit.methods.classical`` reports).
        F is NaN where the error MS is 0; df1 = 0 when an effect has no df.
    """
    means = np.atleast_2d(np.asarray(means, dtype=float))
    css = np.atleast_2d(np.asarray(css, dtype=float))
    n = np.asarray(counts, dtype=float)
    filled = np.ones(J * K, dtype=bool) if filled is None else np.asarray(filled, dtype=bool).ravel()
    m = int(filled.sum())
    df2 = float(n.sum() - m)
    with np.errstate(divide="ignore", invalid="ignore"):
        mse = css.sum(axis=1) / df2 if df2 > 0 else np.full(means.shape[0], np.nan)
    out = {}
    if m == J * K and _big((J - 1) * (K - 1), m):
        # structured (full grid): the additive fit by the core's solver, Type III main
        # effects by the weighted mean of the unweighted marginal means; O(cells) per dataset
        r, rank_add = additive_residual(n.reshape(J, K), means.reshape(-1, J, K))
        r = r.reshape(means.shape)
        ss = {e: type3_main_wald(means, 1.0 / n, J, K, e) for e in ("A", "B")}
        ss["AB"] = np.sum(n * r * r, axis=1)
        dfs = {"A": J - 1, "B": K - 1, "AB": m - rank_add}
        for e in EFFECTS:
            d1 = dfs[e]
            with np.errstate(divide="ignore", invalid="ignore"):
                F = (np.maximum(ss[e], 0.0) / d1) / mse if d1 > 0 else np.full(means.shape[0], np.nan)
            out[e] = (np.where(mse > 0, F, np.nan), float(d1), df2)
        return out
    X = additive_design(J, K)[filled]
    P_add, rank_add = _residual_maker(X, n)
    r = means @ P_add.T
    ss_ab = np.sum(n * r * r, axis=1)
    df_ab = m - rank_add
    if m == J * K:
        C = _type3(J, K)
        Dinv = {e: np.linalg.inv((C[e] / n) @ C[e].T) for e in ("A", "B")}
        ss = {e: np.einsum("ri,ij,rj->r", means @ C[e].T, Dinv[e], means @ C[e].T) for e in ("A", "B")}
        dfs = {"A": J - 1, "B": K - 1}
    else:
        ss, dfs = {}, {}
        for e, other in (("A", ("B",)), ("B", ("A",))):
            P_o, rank_o = _residual_maker(additive_design(J, K, other)[filled], n)
            r_o = means @ P_o.T
            ss[e] = np.sum(n * r_o * r_o, axis=1) - ss_ab
            dfs[e] = rank_add - rank_o
    ss["AB"] = ss_ab
    dfs["AB"] = df_ab
    for e in EFFECTS:
        d1 = dfs[e]
        with np.errstate(divide="ignore", invalid="ignore"):
            F = (np.maximum(ss[e], 0.0) / d1) / mse if d1 > 0 else np.full(means.shape[0], np.nan)
        F = np.where(mse > 0, F, np.nan)
        out[e] = (F, float(d1), df2)
    return out


def _batched_wald(means, v, C, *, need_r=True):
    """T = (C y)' (C V C')^-1 (C y), V = diag(v), and the diagonal of
    R = V C' (C V C')^-1 C (for Johansen's A), batched over rows.

    Returns T (R,), Rdiag (R, m) or None, and a boolean (R,) marking rows whose
    r x r matrix is positive definite (the others hold NaN).

    A large :class:`audit.core.Type3Contrast` takes the structured forms
    (:func:`audit.core.structured_ss`, :func:`audit.core.structured_rdiag`): O(cells)
    per row for a main effect; rows whose form needs a zero variance (a main effect's
    marginal variance, any cell for the interaction) are marked not good.
    """
    if isinstance(C, Type3Contrast) and _big(*C.shape):
        if C.effect == "AB":
            good = np.all(np.isfinite(v) & (v > 0), axis=1)
        else:
            w = v.reshape(-1, C.J, C.K).sum(axis=2 if C.effect == "A" else 1)
            good = np.all(np.isfinite(v), axis=1) & np.all(w > 0, axis=1)
        vs = np.where(good[:, None], v, 1.0)
        with np.errstate(all="ignore"):
            if need_r:
                T, Rdiag = structured_ss_rdiag(C, means, vs)
            else:
                T, Rdiag = structured_ss(C, means, vs), None
            T = np.where(good, T, np.nan)
        return T, Rdiag, good
    if isinstance(C, Type3Contrast):
        C = C.dense()
    r, m = C.shape
    rows = max(1, _SIM_BYTES // (16 * r * m))               # (rows, r, m) products held twice
    if means.shape[0] > rows:                               # rows are independent: same numbers by blocks
        parts = [_batched_wald(means[i:i + rows], v[i:i + rows], C, need_r=need_r)
                 for i in range(0, means.shape[0], rows)]
        return (np.concatenate([p[0] for p in parts]),
                np.concatenate([p[1] for p in parts]) if need_r else None,
                np.concatenate([p[2] for p in parts]))
    Cy = means @ C.T                                        # (R, r)
    M = (C[None, :, :] * v[:, None, :]) @ C.T               # (R, r, r)
    good = np.all(np.isfinite(v), axis=1)
    # with C of full row rank and every v > 0, M is positive definite; rows with a
    # zero (or negative) variance are checked one by one by a Cholesky factorisation
    for i in np.nonzero(good & ~np.all(v > 0, axis=1))[0]:
        try:
            np.linalg.cholesky(M[i])
        except np.linalg.LinAlgError:
            good[i] = False
    M[~good] = np.eye(r)
    try:
        Mi = np.linalg.inv(M)
    except np.linalg.LinAlgError:  # a singular matrix that passed the checks above: invert row by row
        Mi = np.empty_like(M)
        for i in range(M.shape[0]):
            try:
                Mi[i] = np.linalg.inv(M[i])
            except np.linalg.LinAlgError:
                good[i] = False
                Mi[i] = np.eye(r)
    T = np.sum(Cy * (Mi @ Cy[:, :, None])[:, :, 0], axis=1)
    T = np.where(good, T, np.nan)
    Rdiag = v * np.sum(C[None, :, :] * (Mi @ C), axis=1) if need_r else None
    return T, Rdiag, good


def welch_james_batch(means, variances, counts, C):
    """Johansen's Welch-James test of C mu = 0 for a batch of datasets.

    Parameters
    ----------
    means, variances : ndarray, shape (R, m)
        Cell means and variances (ddof 1).
    counts : ndarray, shape (m,)
        Cell sizes (every one >= 2).
    C : ndarray, shape (r, m)

    Returns
    -------
    stat, df2, p : ndarray (R,)
        T / c, r (r + 2) / (3 A) and the p-value of F(r, df2); NaN where the
        contrast covariance is singular.
    """
    means = np.atleast_2d(np.asarray(means, dtype=float))
    n = np.asarray(counts, dtype=float)
    v = np.atleast_2d(np.asarray(variances, dtype=float)) / n
    C = C if isinstance(C, Type3Contrast) else np.asarray(C, dtype=float)
    r = C.shape[0]
    T, Rdiag, good = _batched_wald(means, v, C)
    A = np.sum(Rdiag * Rdiag / (n - 1.0), axis=1)
    c = r + 2.0 * A - 6.0 * A / (r + 2.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        df2 = r * (r + 2.0) / (3.0 * A)
        stat = T / c
    good = good & np.isfinite(stat) & np.isfinite(df2) & (c > 0) & (df2 > 0)
    stat = np.where(good, stat, np.nan)
    df2 = np.where(good, df2, np.nan)
    p = np.full(stat.shape, np.nan)
    p[good] = stats.f.sf(stat[good], r, df2[good])
    return stat, df2, p


def hc_wald_batch(means, css, counts, C, *, kind: str = "hc3"):
    """HC3 / HC4 Wald F of C mu = 0 for a batch of datasets (saturated model,
    h_ii = 1 / n_jk; METHODS.md section 3).

    Returns
    -------
    F, p : ndarray (R,)
        F = W / r on (r, N - m) df; NaN where the robust covariance is singular.
    """
    means = np.atleast_2d(np.asarray(means, dtype=float))
    css = np.atleast_2d(np.asarray(css, dtype=float))
    n = np.asarray(counts, dtype=float)
    h = 1.0 / n
    if kind == "hc3":
        delta = np.full_like(n, 2.0)
    elif kind == "hc4":
        delta = np.minimum(4.0, h / (n.size / n.sum()))
    else:
        raise OptionError(f"kind: expected 'hc3' or 'hc4', found {kind!r}")
    v = css / (n * n * (1.0 - h) ** delta)
    C = C if isinstance(C, Type3Contrast) else np.asarray(C, dtype=float)
    r = C.shape[0]
    W, _, good = _batched_wald(means, v, C, need_r=False)
    F = np.where(good, W / r, np.nan)
    df2 = float(n.sum() - n.size)
    p = np.full(F.shape, np.nan)
    if df2 > 0:
        p[good] = stats.f.sf(F[good], r, df2)
    return F, p


# ----------------------------------------------------------------------------- variances


def _prior_df(s2: np.ndarray, d: np.ndarray, sampling=None) -> float:
    """Moment estimate of the prior df d0 (Smyth 2004; inf when the log variances
    vary no more than sampling error alone explains).

    ``sampling`` None: normal errors, so log s2 has mean log sigma2 + psi(d/2) -
    log(d/2) and variance psi'(d/2).  Otherwise a pair (centre, var) of arrays
    giving that mean offset and variance per cell for the error shape simulated
    (from a pilot simulation of unit-variance errors).
    """
    if s2.size < 2:
        return math.inf
    if sampling is None:
        centre = special.digamma(d / 2.0) - np.log(d / 2.0)
        svar = special.polygamma(1, d / 2.0)
    else:
        centre, svar = sampling
    e = np.log(s2) - centre
    excess = np.var(e, ddof=1) - np.mean(svar)
    if not np.isfinite(excess) or excess <= 0:
        return math.inf
    # trigamma is decreasing: solve psi'(x) = excess for x = d0 / 2 by bracketing
    lo, hi = 1e-8, 1.0
    while special.polygamma(1, hi) > excess:
        hi *= 2.0
        if hi > 1e12:
            return math.inf
    from scipy.optimize import brentq

    x = brentq(lambda t: float(special.polygamma(1, t)) - excess, lo, hi, xtol=1e-12, rtol=1e-12)
    return 2.0 * x


def moderated_variances(variances, counts, *, prior_df="auto", sampling=None):
    """Cell variances moderated toward the pooled variance (after Smyth 2004).

    Parameters
    ----------
    variances : ndarray (J, K)
        Cell variances (ddof 1); NaN where n <= 1 or the cell is empty.
    counts : ndarray (J, K)
        Cell sizes.
    prior_df : 'auto' or float
        'auto' estimates d0 by Smyth's moment method; a number fixes it
        (0: no moderation; ``math.inf``: every cell gets the pooled variance).
    sampling : tuple of ndarray (J, K), optional
        Mean and variance of log(s2 / sigma2) in each cell under the error
        shape simulated (default: normal errors, psi(d/2) - log(d/2) and
        psi'(d/2)).

    Returns
    -------
    post : ndarray (J, K)
        Moderated variances (NaN in empty cells; the pooled variance in n = 1
        cells, which have no variance of their own).
    d0 : float
        The prior df used (may be inf).
    pooled : float
        The pooled within-cell variance (NaN without within-cell df).
    """
    v = np.asarray(variances, dtype=float)
    n = np.asarray(counts, dtype=float)
    d = np.maximum(n - 1.0, 0.0)
    dfe = d[n > 0].sum()
    css = np.where(n > 1, np.nan_to_num(v) * d, 0.0)
    pooled = float(css.sum() / dfe) if dfe > 0 else math.nan
    use = (n > 1) & np.isfinite(v) & (v > 0)
    if isinstance(prior_df, str):
        if prior_df != "auto":
            raise OptionError(f"prior_df: expected 'auto' or a number >= 0, found {prior_df!r}; try 'auto'")
        samp = None if sampling is None else (np.asarray(sampling[0])[use], np.asarray(sampling[1])[use])
        d0 = _prior_df(v[use], d[use], samp)
    else:
        try:
            d0 = float(prior_df)
        except (TypeError, ValueError):
            raise OptionError(f"prior_df: expected 'auto' or a number >= 0, found {prior_df!r}; try 'auto'") from None
        if not (d0 >= 0):
            raise OptionError(f"prior_df: expected 'auto' or a number >= 0, found {prior_df!r}; try 'auto'")
    vv = np.where(n > 1, np.nan_to_num(v), 0.0)
    if math.isinf(d0):
        post = np.where(n > 0, pooled, np.nan)
    elif d0 == 0:
        post = np.where(n > 1, vv, np.where(n == 1, pooled, np.nan))
    else:
        post = np.where(n > 0, (d0 * pooled + d * vv) / (d0 + d), np.nan)
    return post, d0, pooled


# ----------------------------------------------------------------------------- simulation


def clopper_pearson(k: int, n: int, level: float = INTERVAL_LEVEL) -> tuple[float, float]:
    """Exact binomial interval for k successes in n trials (Clopper & Pearson 1934)."""
    a = 1.0 - level
    lo = 0.0 if k == 0 else float(stats.beta.ppf(a / 2, k, n - k + 1))
    hi = 1.0 if k == n else float(stats.beta.ppf(1 - a / 2, k + 1, n - k))
    return lo, hi


def _standardised_pool(fit, sd=None) -> np.ndarray:
    """Pooled standardised residuals e_i / s_cell * sqrt(n / (n - 1)) from the
    cells with a positive SD (``sd``: the cells' own SDs by default, from cells with
    n >= 3: the two residuals of a cell of 2 standardise to exactly -1 and +1 by its own
    SD, so they carry no shape, and resampling them would simulate two-point errors;
    with a given ``sd``, cells with n >= 2)."""
    cells = fit.cells
    n = cells.counts.ravel()
    own = sd is None
    sd = np.sqrt(cells.variances.ravel()) if sd is None else np.asarray(sd, dtype=float).ravel()
    cell = np.asarray(fit.obs.cell)
    ok = (n >= (3 if own else 2)) & np.isfinite(sd) & (sd > 0)
    keep = ok[cell]
    e = np.asarray(fit.resid_full, dtype=float)[keep]
    c = cell[keep]
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.sqrt(n / np.maximum(n - 1.0, 1.0)) / sd
    return e * scale[c]


def _pool_moments(pool: np.ndarray) -> tuple[float, float, float, float]:
    """Mean, variance, third and fourth central moments of the pool (population
    moments: one draw with replacement has exactly these)."""
    m1 = float(pool.mean())
    c = pool - m1
    c2 = c * c
    return m1, float(c2.mean()), float((c2 * c).mean()), float((c2 * c2).mean())


def _moment_matched_cells(rng, counts, moments, R: int):
    """Cell means and centred SS of R datasets whose cells of sizes ``counts`` hold n
    i.i.d. draws from a distribution with the given moments (mean mu, variance s2, third
    and fourth central moments mu3, mu4), drawn from the large-n joint normal
    approximation of (mean, s^2) with their exact first and second moments:

        E mean = mu, Var mean = s2 / n;  E s^2 = s2,
        Var s^2 = (mu4 - s2^2 (n - 3) / (n - 1)) / n,  Cov(mean, s^2) = mu3 / n

    (the standard moments of the sample mean and variance; Cramer 1946, sec. 27.4).
    Two standard normals per cell and replication, independent of n; the centred SS
    (n - 1) s^2 is kept at or above 0.
    """
    mu, s2, mu3, mu4 = moments
    n = np.asarray(counts, dtype=float)
    sd_mean = np.sqrt(s2 / n)
    var_s2 = np.maximum((mu4 - s2 * s2 * (n - 3.0) / (n - 1.0)) / n, 0.0)
    sd_s2 = np.sqrt(var_s2)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = np.where(sd_mean * sd_s2 > 0, (mu3 / n) / (sd_mean * sd_s2), 0.0)
    rho = np.clip(rho, -1.0, 1.0)
    z = rng.standard_normal((R, 2, n.size))
    means = mu + sd_mean * z[:, 0]
    s2_draw = s2 + sd_s2 * (rho * z[:, 0] + np.sqrt(1.0 - rho * rho) * z[:, 1])
    css = (n - 1.0) * np.maximum(s2_draw, 0.0)
    return means, css


def _resample_cells(rng, counts, pool, R: int):
    """Exact resampling: cell means and centred SS of R datasets whose cells (sizes
    ``counts``, all >= 1) hold draws with replacement from ``pool``; cell-sorted layout,
    two passes of ``np.add.reduceat`` per chunk of replications."""
    m = counts.size
    N = int(counts.sum())
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    cidx = np.repeat(np.arange(m), counts)
    rows = max(1, min(R, _CHUNK_ELEMENTS // max(N, 1)))
    means = np.empty((R, m))
    css = np.empty((R, m))
    P = pool.size
    for lo in range(0, R, rows):
        hi = min(R, lo + rows)
        Z = pool.take(rng.integers(0, P, size=(hi - lo, N)))
        mu = np.add.reduceat(Z, starts, axis=1) / counts
        # second pass around the cell means (the draws are standardised errors with
        # pooled mean exactly 0, so no further correction of the mean is needed)
        Z -= mu[:, cidx]
        np.multiply(Z, Z, out=Z)
        means[lo:hi] = mu
        css[lo:hi] = np.add.reduceat(Z, starts, axis=1)
    return means, css


def _simulate_cells(rng, counts, pool, R: int, *, large_cell=None):
    """Cell means and centred SS of R datasets of standardised errors (unit
    variance), cells of the given sizes (all >= 1).

    ``pool`` None: normal errors, the sufficient statistics drawn exactly.
    Otherwise errors resampled from ``pool`` in cells with fewer than
    ``large_cell`` observations (default :data:`LARGE_CELL`), exactly
    (:func:`_resample_cells`); cells at or above it take the moment-matched
    normal approximation of their mean and variance (:func:`_moment_matched_cells`),
    so the cost no longer grows with N.  With no large cell the draws are
    exactly those of exact resampling (same seed, same numbers).
    """
    counts = np.asarray(counts, dtype=np.int64)
    m = counts.size
    if pool is None:
        z = rng.standard_normal((R, m))
        means = z / np.sqrt(counts)
        shape = np.maximum(counts - 1, 0) / 2.0
        g = rng.standard_gamma(np.where(shape > 0, shape, 1.0), size=(R, m))
        css = np.where(shape > 0, 2.0 * g, 0.0)
        return means, css
    big = _large_cells(counts, pool, large_cell)
    if not big.any():
        return _resample_cells(rng, counts, pool, R)
    moments = _pool_moments(pool)
    means = np.empty((R, m))
    css = np.empty((R, m))
    small = ~big
    if small.any():
        means[:, small], css[:, small] = _resample_cells(rng, counts[small], pool, R)
    means[:, big], css[:, big] = _moment_matched_cells(rng, counts[big], moments, R)
    return means, css


def _large_cells(counts, pool, large_cell=None) -> np.ndarray:
    """Cells drawn from the moment-matched approximation: n >= LARGE_CELL (or
    ``large_cell``) and a sample-variance CV of at most LARGE_CELL_CV under ``pool``."""
    counts = np.asarray(counts, dtype=np.int64)
    big = counts >= (LARGE_CELL if large_cell is None else large_cell)
    if big.any():
        big &= _s2_cv(counts, _pool_moments(pool)) <= LARGE_CELL_CV
    return big


def _s2_cv(counts, moments) -> np.ndarray:
    """Coefficient of variation of the sample variance of n draws with these moments,
    sqrt((mu4 / s2^2 - (n - 3) / (n - 1)) / n) (inf where undefined)."""
    _, s2, _, mu4 = moments
    n = np.asarray(counts, dtype=float)
    if not s2 > 0:
        return np.full(n.shape, np.inf)
    with np.errstate(divide="ignore", invalid="ignore"):
        v = (mu4 / (s2 * s2) - (n - 3.0) / (n - 1.0)) / n
    return np.where(n > 1, np.sqrt(np.maximum(v, 0.0)), np.inf)


def _pilot_log_variance(rng, counts, pool, reps: int = PILOT_REPLICATIONS):
    """Mean and variance of log s2 per cell for unit-variance errors drawn from
    ``pool`` (a pilot simulation), as (J, K) arrays; the normal-theory values
    psi(d/2) - log(d/2) and psi'(d/2) where the pilot has too few positive s2."""
    shape = counts.shape
    nn = counts.ravel()
    live = nn > 1
    d = np.maximum(nn - 1.0, 1.0)
    centre = special.digamma(d / 2.0) - np.log(d / 2.0)
    svar = special.polygamma(1, d / 2.0)
    block = _block_size(rng, nn[live], pool, reps, arrays=2)
    ls = np.empty((reps, int(live.sum())))
    for lo in range(0, reps, block):
        _, css = _simulate_cells(rng, nn[live], pool, min(block, reps - lo))
        with np.errstate(divide="ignore", invalid="ignore"):
            ls[lo:lo + css.shape[0]] = np.log(css / (nn[live] - 1.0))
    fin = np.isfinite(ls)
    cnt = fin.sum(axis=0)
    ok = cnt >= reps // 2
    ls = np.where(fin, ls, 0.0)
    mu = ls.sum(axis=0) / np.maximum(cnt, 1)
    var = ((np.where(fin, ls - mu, 0.0)) ** 2).sum(axis=0) / np.maximum(cnt - 1, 1)
    idx = np.nonzero(live)[0]
    centre[idx[ok]] = mu[ok]
    svar[idx[ok]] = var[ok]
    return centre.reshape(shape), svar.reshape(shape)


def _block_size(rng, counts, pool, R: int, *, arrays: int = 4) -> int:
    """Replications simulated at once: all R when ``arrays`` (R, m) float arrays fit
    :data:`_SIM_BYTES` (the numbers of one draw), else blocks of a multiple of the
    resampler's own chunk (so resampled errors are the same draws as in one call)."""
    m = max(int(np.asarray(counts).size), 1)
    if R * m * 8 * arrays <= _SIM_BYTES:
        return max(R, 1)
    N = int(np.asarray(counts).sum())
    inner = max(1, min(R, _CHUNK_ELEMENTS // max(N, 1))) if pool is not None else 1
    return max(inner, (_SIM_BYTES // (m * 8 * arrays)) // inner * inner)


def _check_replications(R) -> int:
    if isinstance(R, bool) or not isinstance(R, (int, np.integer)) or R < 0:
        raise OptionError(f"replications: expected a whole number >= 0, found {R!r}; "
                          f"try {DEFAULT_REPLICATIONS} (0 turns the size check off)")
    return int(R)


def _check_seed(seed):
    if seed is None:
        return None
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise OptionError(f"seed: expected a whole number >= 0, found {seed!r}")
    return int(seed)


def _pct(x: float) -> str:
    return f"{100 * x:.1f}%"


def _status(k: int, R: int, alpha: float, bias: float = 0.0) -> tuple[str, tuple[float, float], str]:
    lo, hi = clopper_pearson(k, R)
    size = k / R
    said = (f"rejects a true null in {_pct(size)} of {R} simulated datasets shaped like these "
            f"(99% interval {_pct(lo)}-{_pct(hi)}) at alpha = {alpha:g}")
    if bias:
        said += (f"; the noise of the simulated cell variances moves that estimate by {100 * bias:+.1f} points, "
                 f"so the status is judged on {_pct(max(size - bias, 0.0))}")
        lo, hi = max(lo - bias, 0.0), min(max(hi - bias, 0.0), 1.0)
    if lo > LIBERAL_MULTIPLE * alpha:
        return "liberal", (lo, hi), f"liberal here: {said}; the interval lies above {LIBERAL_MULTIPLE:g} x alpha"
    if hi < CONSERVATIVE_FRACTION * alpha:
        return "conservative", (lo, hi), (f"conservative here: {said}; the interval lies below "
                                          f"{CONSERVATIVE_FRACTION:g} x alpha (loss of power)")
    return "ok", (lo, hi), f"size near alpha: {said}"


#: sets of re-estimated cell variances in the bias pass (each uses R // NOISE_SETS of the null errors)
NOISE_SETS = 8


def _noise_sets(rng, n, post, d0: float) -> list:
    """The cell SDs of the bias pass (the noise of the simulation's own variance estimates): the
    simulated variances are themselves estimates, more dispersed than the true ones, and a
    method's size at dispersed variances is further from alpha than at the truth.  Re-estimate
    them as the data would, NOISE_SETS times: s2* = post chi2(d) / d per cell (normal theory,
    d = n - 1), moderated again with the same prior df toward their own pooled value.  Each set's
    size uses R / NOISE_SETS of the same null errors; bias = mean size over the sets minus the
    size at ``post`` (a bootstrap bias, Efron & Tibshirani 1993 ch. 10), and the interaction
    status is judged on size - bias."""
    d = np.maximum(np.asarray(n, dtype=float) - 1.0, 0.0)
    live = d > 0
    out = []
    for _ in range(NOISE_SETS):
        s2 = np.array(post, dtype=float)
        s2[live] = post[live] * rng.chisquare(d[live]) / d[live]
        pooled = float(np.sum(d * s2) / np.sum(d))
        v = s2 if d0 == 0 else np.where(live, (d0 * pooled + d * s2) / (d0 + d), pooled)
        out.append(np.sqrt(v))
    return out


#: the alternatives of the power pass have the noncentrality at which the F(r, N - m) test of the
#: interaction has this power (a level where methods' powers differ most)
POWER_TARGET = 0.5


def alternative_noncentrality(df1: int, df2: float, alpha: float, target: float = POWER_TARGET) -> float:
    """The noncentrality lambda at which the F(df1, df2) test at alpha has power ``target``
    (noncentral F, scipy.stats.ncf)."""
    from scipy.optimize import brentq

    crit = stats.f.isf(alpha, df1, df2)
    fun = lambda lam: float(stats.ncf.sf(crit, df1, df2, lam)) - target  # noqa: E731
    hi = 4.0 * df1 + 16.0
    while fun(hi) < 0:
        hi *= 2.0
    return float(brentq(fun, 1e-9, hi, xtol=1e-6))


def _alternatives(rng, C, v, df_e: float, alpha: float, R: int):
    """Cell-mean shifts (R, m) of interaction alternatives: for each replication a direction
    drawn uniformly in the r-dimensional contrast space C mu, scaled so that the Wald
    noncentrality (C d)' (C V C')^-1 (C d) with V = diag(v) (the simulated cell variances over
    n) equals lambda, the noncentrality at which the F(r, N - m) test has power POWER_TARGET.
    The shift is the minimum-norm d with that C d; every interaction statistic is invariant to
    the additive part, so only C d matters.  Returns (lambda, shifts)."""
    C = np.asarray(C, dtype=float)      # a Type3Contrast's dense form (at most MAX_WALD_ROWS rows)
    r = C.shape[0]
    lam = alternative_noncentrality(r, df_e, alpha)
    L = np.linalg.cholesky((C * v[None, :]) @ C.T)
    z = rng.standard_normal((R, r))
    z /= np.linalg.norm(z, axis=1, keepdims=True)
    cd = (z @ L.T) * math.sqrt(lam)
    G = np.linalg.solve(C @ C.T, C)            # (r, m): d = cd @ G gives C d = cd
    return lam, cd @ G


def _not_run(method, effect, reason) -> CalibrationRow:
    return CalibrationRow(method=method, effect=effect, size=None, interval=None, rejections=None,
                          replications=0, undefined=0, status="not-run", reason=reason)


def size_check(fit, *, alpha: float | None = None, replications: int = DEFAULT_REPLICATIONS,
               seed: int | None = None, methods=CALIBRATED_METHODS, effects=EFFECTS,
               prior_df="auto") -> Calibration:
    """Estimate each analytic method's Type I error on data shaped like this one.

    Parameters
    ----------
    fit : Fit
        The fitted design (data mode or summary mode).
    alpha : float, optional
        Significance level (default ``fit.alpha``).
    replications : int, default 2000
        R, the number of simulated null datasets; 0 turns the check off (every
        row 'not-run').
    seed : int, optional
        Seed of the simulation (same seed, same result).
    methods : sequence of str
        Method ids; those without a cell-statistic form get a 'not-run' row.
    effects : sequence of str
        Effects to check ('A', 'B', 'AB').
    prior_df : 'auto' or float
        Prior df of the moderated cell variances ('auto': estimated, Smyth
        2004; 0: the cells' own variances; inf: equal variances).

    Returns
    -------
    Calibration
    """
    from ..fit import check_alpha

    alpha = check_alpha(fit.alpha if alpha is None else alpha)
    R = _check_replications(replications)
    seed = _check_seed(seed)
    methods = tuple(methods)
    for e in effects:
        if e not in EFFECTS:
            raise OptionError(f"effects: expected effects among {EFFECTS}, found {e!r}")
    effects = tuple(e for e in EFFECTS if e in effects)
    cells = fit.cells
    # the size check is scale-free: variances are simulated in units of an exact power of two
    # (CellStats.standardised), so that SDs near 1e-300 or 1e300 neither underflow nor overflow
    # when squared; the reported SDs and target variance are restored to the response scale
    st = cells.standardised()
    unit = st.unit
    var_std = st.variances
    J, K = cells.J, cells.K
    counts = cells.counts
    filled = counts.ravel() > 0
    n = counts.ravel()[filled]
    notes = [
        "the simulated datasets keep this dataset's cell sizes, its (moderated) cell variances and "
        "its residual shape; those are estimates, so the check describes data like these, not the "
        "unknown truth",
        "independence of the observations is assumed by the simulation and cannot be checked from the data",
        "resampling and rank methods are not simulated here: their trust comes from the rule table",
    ]
    rng = np.random.default_rng(seed)
    pool = None
    extra_notes = []
    if fit.obs is not None and R > 0:
        pool = _standardised_pool(fit)
        if pool.size < 2:
            pool = None
            extra_notes.append("no cell has three or more observations with distinct values: normal errors "
                               "simulated instead of resampled residuals")
    sampling = None
    if pool is not None and isinstance(prior_df, str) and (n > 1).any():
        # the sampling spread of log s2 under this residual shape, from a pilot on residuals
        # standardised by the normal-theory moderated SDs (standardising by each cell's own
        # SD would clip the tails of small cells and understate that spread)
        post1, _, _ = moderated_variances(var_std, counts, prior_df=math.inf)
        pilot_pool = _standardised_pool(fit, np.sqrt(post1) * unit)
        if pilot_pool.size >= 2:
            sampling = _pilot_log_variance(rng, counts, pilot_pool)
    post, d0, pooled = moderated_variances(var_std, counts, prior_df=prior_df, sampling=sampling)
    if isinstance(prior_df, str):
        smethod = "equal" if math.isinf(d0) else "moderated"
    else:
        smethod = "equal" if math.isinf(d0) else ("none" if d0 == 0 else "fixed-prior")
    sd_cells = np.sqrt(post)
    snote = {
        "moderated": f"cell variances moderated toward the pooled variance with prior df d0 = {d0:.3g} "
                     "estimated from the spread of the log cell variances (Smyth 2004)",
        "equal": "the log cell variances vary no more than sampling error explains (or equal variances were "
                 "asked for): every cell simulated with the pooled variance (complete moderation)",
        "none": "each cell simulated with its own variance (no moderation)",
        "fixed-prior": f"cell variances moderated toward the pooled variance with a given prior df d0 = {d0:.3g}",
    }[smethod]
    zero_sd = (counts > 1) & (np.nan_to_num(var_std) == 0)
    if zero_sd.any():
        snote += (f"; {int(zero_sd.sum())} cell(s) with zero SD (ties or rounding?) "
                  + ("keep zero variance" if smethod == "none" else "take the moderated variance"))
    with np.errstate(all="ignore"):
        sd_shown = sd_cells * unit
        pooled_shown = float(pooled) * unit * unit
    cell_sd_json = [[(float(x) if np.isfinite(x) else None) for x in row] for row in sd_shown]
    shrink = Shrinkage(method=smethod, prior_df=None if math.isinf(d0) else float(d0),
                       complete=bool(math.isinf(d0)),
                       target_variance=pooled_shown if math.isfinite(pooled_shown) and
                       (pooled_shown != 0 or pooled == 0) else None,
                       cell_sd=cell_sd_json, note=snote)

    def result(rows, source, enote, extra_notes=(), lam=None):
        return Calibration(alpha=alpha, replications=R, seed=seed, error_source=source, error_note=enote,
                           shrinkage=shrink, liberal_multiple=LIBERAL_MULTIPLE,
                           conservative_fraction=CONSERVATIVE_FRACTION, interval_level=INTERVAL_LEVEL,
                           rows=tuple(rows), notes=tuple(notes) + tuple(extra_notes), power_noncentrality=lam)

    # ---- reasons a method cannot run at all
    all_filled = bool(filled.all())
    df_e = int(n.sum() - n.size)
    blocked: dict[str, str] = {}
    for mth in methods:
        if mth not in CALIBRATED_METHODS:
            blocked[mth] = ("not simulated: this method has no cell-statistic form (it needs resampling or "
                            "ranks inside every simulated dataset); its trust comes from the rule table")
        elif R == 0:
            blocked[mth] = "size check turned off (replications = 0)"
        elif df_e <= 0:
            blocked[mth] = "no within-cell degrees of freedom (one observation per cell): nothing to simulate"
        elif mth != "classical-f" and not all_filled:
            blocked[mth] = f"not run: {mth} needs every cell filled ({int((~filled).sum())} empty cell(s))"
        elif mth != "classical-f" and (n < 2).any():
            blocked[mth] = (f"not run: {mth} needs n >= 2 in every cell ({int((n < 2).sum())} cell(s) with "
                            "one observation)")
        elif mth != "classical-f" and not np.all(sd_cells.ravel()[filled] > 0):
            blocked[mth] = f"not run: {mth} cannot be formed with zero-variance cells"
    runnable = [mth for mth in methods if mth not in blocked]

    source, enote = "none", "not simulated"
    if runnable:
        if pool is not None:
            source = "resampled-residuals"
            enote = (f"errors resampled from the {pool.size} pooled standardised residuals "
                     "(e_i / s_cell * sqrt(n/(n-1))) and rescaled to each cell's SD")
            n_big = int(_large_cells(n, pool).sum())
            if n_big:
                enote += (f"; in the {n_big} cell(s) with {LARGE_CELL:,} or more observations (and a sample "
                          "variance that varies little under this residual shape) the mean and variance of "
                          "the resampled errors are drawn from their moment-matched normal approximation "
                          "instead of resampling each error (Cramer 1946; within Monte Carlo error of full "
                          "resampling in the project's comparison study)")
        else:
            source = "normal"
            enote = ("normal errors (only cell summaries are known, so the residual shape cannot be kept)"
                     if fit.obs is None else "normal errors (no usable residuals)")
    sims = {}
    ab_ok, lam = False, None
    if runnable:
        C3 = {e: Type3Contrast(J, K, e) for e in EFFECTS} if all_filled else None

        def ab_p(mth, mm, cc, vv):
            with np.errstate(all="ignore"):
                if mth == "classical-f":
                    F, d1, d2 = classical_f_batch(mm, cc, n, J, K, filled=filled)["AB"]
                    pp = np.full(F.shape, np.nan)
                    good = np.isfinite(F)
                    pp[good] = stats.f.sf(F[good], d1, d2)
                    return pp
                if mth == "welch-james":
                    return welch_james_batch(mm, vv, n, C3["AB"])[2]
                return hc_wald_batch(mm, cc, n, C3["AB"], kind=mth.split("-")[0])[1]
        for mth in runnable:
            if mth == "classical-f":
                continue
            for e in effects:
                r = C3[e].shape[0]
                # a main effect of a full grid has an O(cells) form; the interaction's batched
                # covariance (or any dense one) is kept to at most MAX_WALD_ROWS contrasts
                if r > MAX_WALD_ROWS and (e == "AB" or not _big(r, C3[e].shape[1])):
                    sims[(mth, e)] = (f"not run: the {e} hypothesis has {r} contrasts (more than "
                                      f"{MAX_WALD_ROWS}); its batched covariance would take too much time and "
                                      "memory, so this method's trust rests on the rule table")
        sd = sd_cells.ravel()[filled]
        # the power pass and the variance-noise bias draw from their own stream (seeded from the
        # same seed), so the null datasets are exactly those drawn without them
        ab_ok = (all_filled and "AB" in effects and C3["AB"].shape[0] <= MAX_WALD_ROWS
                 and bool(np.all(np.isfinite(sd) & (sd > 0))))   # no alternatives scaled to a zero variance
        if ab_ok:
            rng_alt = np.random.default_rng(None if seed is None else [seed, 0x5EED])
            lam, delta = _alternatives(rng_alt, C3["AB"], sd * sd / n, df_e, alpha, R)
            noise_sd = (_noise_sets(rng_alt, n, sd * sd, d0)
                        if smethod != "equal" and R // NOISE_SETS >= 50 else None)
        block = _block_size(rng, n, pool, R)
        parts: dict = {}
        alt_parts: dict = {}
        noise_parts: dict = {}
        for lo in range(0, R, block):
            zm, zc = _simulate_cells(rng, n, pool, min(block, R - lo))
            means = zm * sd
            css = zc * sd * sd
            with np.errstate(divide="ignore", invalid="ignore"):
                var = np.where(n > 1, css / np.maximum(n - 1, 1), np.nan)
            if ab_ok:
                hi_ = lo + zm.shape[0]
                alt = means + delta[lo:hi_]
                for mth in runnable:
                    alt_parts.setdefault(mth, []).append(ab_p(mth, alt, css, var))
                if noise_sd is not None:
                    Rb = R // NOISE_SETS
                    idx = np.arange(lo, hi_) // Rb
                    for kset in np.unique(idx):
                        if kset >= NOISE_SETS:
                            continue
                        sel = idx == kset
                        sdk = noise_sd[kset]
                        mm, cc = zm[sel] * sdk, zc[sel] * sdk * sdk
                        with np.errstate(divide="ignore", invalid="ignore"):
                            vv = np.where(n > 1, cc / np.maximum(n - 1, 1), np.nan)
                        for mth in runnable:
                            pp = ab_p(mth, mm, cc, vv)
                            noise_parts.setdefault((mth, int(kset)), []).append(pp)
            del zm, zc
            for mth in runnable:
                if mth == "classical-f":
                    fb = classical_f_batch(means, css, n, J, K, filled=filled)
                    for e in effects:
                        F, d1, d2 = fb[e]
                        if d1 <= 0:
                            sims[(mth, e)] = f"not run: the {e} effect has no degrees of freedom in the filled cells"
                            continue
                        p = np.full(F.shape, np.nan)
                        ok = np.isfinite(F)
                        p[ok] = stats.f.sf(F[ok], d1, d2)
                        parts.setdefault((mth, e), []).append(p)
                else:
                    for e in effects:
                        if (mth, e) in sims:
                            continue
                        with np.errstate(all="ignore"):
                            if mth == "welch-james":
                                p = welch_james_batch(means, var, n, C3[e])[2]
                            else:
                                p = hc_wald_batch(means, css, n, C3[e], kind=mth.split("-")[0])[1]
                        parts.setdefault((mth, e), []).append(p)
        for key, ps in parts.items():
            if key not in sims:
                sims[key] = np.concatenate(ps)

    # ---- the interaction alternatives (each method's power here) and the variance-noise bias
    power: dict[str, tuple] = {}
    bias: dict[str, float] = {}
    if runnable and ab_ok:
        for mth in runnable:
            pa = np.nan_to_num(np.concatenate(alt_parts[mth]), nan=1.0)
            # size-adjusted power: rejections at the method's own simulated critical p (the alpha-quantile
            # of its p over the null datasets), so a method that runs warm gains nothing by it
            p0 = sims.get((mth, "AB"))
            crit = alpha
            if isinstance(p0, np.ndarray) and np.isfinite(p0).any():
                crit = min(alpha, float(np.quantile(np.nan_to_num(p0, nan=1.0), alpha)))
            power[mth] = (float(np.sum(pa < alpha)) / R, float(np.sum(pa <= crit)) / R, crit)
            rates = []
            for kset in range(NOISE_SETS):
                ps = noise_parts.get((mth, kset))
                if ps:
                    pp = np.concatenate(ps)
                    ok = np.isfinite(pp)
                    if ok.any():
                        rates.append(float(np.mean(pp[ok] < alpha)))
            if rates and isinstance(p0, np.ndarray) and np.isfinite(p0).any():
                bias[mth] = float(np.mean(rates)) - float(np.mean(p0[np.isfinite(p0)] < alpha))

    rows = []
    for mth in methods:
        for e in effects:
            if mth in blocked:
                rows.append(_not_run(mth, e, blocked[mth]))
                continue
            p = sims[(mth, e)]
            if isinstance(p, str):
                rows.append(_not_run(mth, e, p))
                continue
            ok = np.isfinite(p)
            used = int(ok.sum())
            und = int(R - used)
            if used == 0:
                rows.append(CalibrationRow(method=mth, effect=e, size=None, interval=None, rejections=None,
                                           replications=0, undefined=und, status="not-run",
                                           reason="not run: the method could not be computed on any simulated dataset"))
                continue
            k = int(np.sum(p[ok] < alpha))
            b = bias.get(mth, 0.0) if e == "AB" else 0.0
            status, ci, reason = _status(k, used, alpha, b)
            if und:
                reason += f"; {und} simulated dataset(s) where it could not be computed are left out"
            rows.append(CalibrationRow(method=mth, effect=e, size=k / used, interval=ci, rejections=k,
                                       replications=used, undefined=und, status=status, reason=reason,
                                       bias=b if e == "AB" and mth in bias else None,
                                       power=power[mth][0] if e == "AB" and mth in power else None,
                                       adjusted_power=power[mth][1] if e == "AB" and mth in power else None,
                                       critical_p=power[mth][2] if e == "AB" and mth in power else None))
    return result(rows, source, enote, extra_notes, lam)
