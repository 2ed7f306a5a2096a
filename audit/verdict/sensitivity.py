"""How much an "absent" claim is worth: sensitivity and equivalence for an effect's F test.

A large p value alone does not show that an interaction is absent; it may only show that
the design could not have detected it.  Two numbers answer that:

- :func:`detectable_interaction`: the smallest effect the classical F test of the design
  detects with the given power (default 80%) at alpha, as a partial eta squared (and
  Cohen's f) and as the size of the interaction terms in response units;
- :func:`equivalence_test`: a test that the effect is smaller than a stated bound
  (H0: effect >= bound; a small p supports "smaller than the bound").

Convention (stated in every result): the noncentrality of the F(df1, df2) test is
lambda = f^2 (df1 + df2 + 1), f^2 = eta_p^2 / (1 - eta_p^2), so that
eta_p^2 = lambda / (lambda + df1 + df2 + 1) (Cohen 1988, Statistical Power Analysis for the
Behavioral Sciences, 2nd ed., ch. 8-9, with the total N written as df1 + df2 + 1; Smithson
2003, Confidence Intervals, section 5; the same convention as the partial eta^2 intervals in
``audit.core`` and as statsmodels' ``ftest_power`` with ncc = 1).  The size in response
units uses the exact noncentrality of the classical F under true cell means,
lambda = sum_jk n_jk (ab)_jk^2 / sigma^2, with sigma^2 estimated by MS_error: the
n-weighted root mean square interaction term that gives lambda is
rms = sqrt(lambda MS_error / N).  In a 2 x 2 design every term is +-d, so rms = d.

The equivalence test follows Campbell & Lakens (2021), "Can we disprove the presence of an
effect? Equivalence tests for ANOVA" (British Journal of Mathematical and Statistical
Psychology; from memory): with the bound expressed as a noncentrality lambda_b,
p = P(F'(df1, df2, lambda_b) <= F_observed), the noncentral F's CDF at the observed F.

Numerics: every noncentral F probability goes through :func:`audit.core.ncf_tail`, which
calls scipy's noncentral F only inside the box of arguments where it is safe (outside it
scipy returns NaN, values above 1, runs for seconds, or aborts the process from C++) and
uses large-argument normal approximations beyond it (``method`` says so); infinite df2 is
the noncentral chi-square limit.  Root searches are bounded (200 iterations).  The
functions never raise on numbers: a value that cannot be computed is None with a note.  Options (bound, alpha, power) are checked and
raise :class:`audit.errors.OptionError`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from ..errors import OptionError

__all__ = [
    "CONVENTION",
    "DetectableEffect",
    "EquivalenceResult",
    "detectable_interaction",
    "equivalence_test",
    "detectable_noncentrality",
    "noncentral_f_sf",
    "noncentral_f_cdf",
]

CONVENTION = (
    "lambda = f^2 (df1 + df2 + 1), f^2 = eta_p^2 / (1 - eta_p^2) (Cohen 1988; Smithson 2003); "
    "response units: lambda = sum n_jk term_jk^2 / MS_error, rms = sqrt(lambda MS_error / N)"
)
EQUIVALENCE_SOURCE = (
    "Campbell & Lakens (2021), equivalence tests for ANOVA: p = noncentral F CDF at the observed F "
    "with the bound's noncentrality (from memory)"
)
_NCF = "noncentral F"
_NCX2 = "noncentral chi-square limit (df2 -> infinity)"
_APPROX = "noncentral F (large-argument normal approximations)"


@dataclass(frozen=True, kw_only=True)
class DetectableEffect:
    """The smallest effect an F test detects with the given power at alpha.

    Attributes
    ----------
    effect : str
        'AB' (or 'A', 'B').
    alpha, power : float
        The level and the target power.
    df1, df2 : float or None
        The test's degrees of freedom.
    noncentrality : float or None
        lambda giving that power.
    partial_eta_sq : float or None
        lambda / (lambda + df1 + df2 + 1).
    cohens_f : float or None
        sqrt(lambda / (df1 + df2 + 1)).
    rms_term : float or None
        n-weighted root mean square interaction term (response units) with that
        lambda: sqrt(lambda MS_error / N); None without an error variance.
    observed_partial_eta_sq : float or None
        The effect's partial eta squared in these data, for comparison.
    observed_rms_term : float or None
        sqrt(SS_effect / N): the observed counterpart of ``rms_term`` (interaction only).
    method : str or None
        'noncentral F', 'noncentral F (large-argument normal approximations)' or
        'noncentral chi-square limit (df2 -> infinity)'.
    convention : str
        The noncentrality convention used.
    note : str or None
        Why a value is missing, or which fallback was used.
    """

    effect: str
    alpha: float
    power: float
    df1: float | None
    df2: float | None
    noncentrality: float | None
    partial_eta_sq: float | None
    cohens_f: float | None
    rms_term: float | None
    observed_partial_eta_sq: float | None
    observed_rms_term: float | None
    method: str | None
    convention: str = CONVENTION
    note: str | None = None

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


@dataclass(frozen=True, kw_only=True)
class EquivalenceResult:
    """A test that an effect is smaller than a bound (noncentral F).

    Attributes
    ----------
    F, df1, df2 : float or None
        The observed test.
    bound_partial_eta_sq : float or None
        The bound as partial eta squared (given, or converted from ``bound_rms``).
    bound_rms : float or None
        The bound as an n-weighted RMS interaction term in response units (given, or
        converted when N and MS_error are known).
    noncentrality : float or None
        lambda of the bound.
    p : float or None
        P(F'(df1, df2, lambda) <= F): small when the observed F is too small for an
        effect as large as the bound.
    alpha : float
    equivalent : bool or None
        p < alpha: the effect is smaller than the bound at level alpha.
    method : str or None
        'noncentral F', its large-argument approximation or the chi-square limit.
    source : str
    note : str or None
    """

    F: float | None
    df1: float | None
    df2: float | None
    bound_partial_eta_sq: float | None
    bound_rms: float | None
    noncentrality: float | None
    p: float | None
    alpha: float
    equivalent: bool | None
    method: str | None
    source: str = EQUIVALENCE_SOURCE
    note: str | None = None

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


# ---------------------------------------------------------------------------
# numerics
# ---------------------------------------------------------------------------


def _finite(x) -> bool:
    return x is not None and isinstance(x, (int, float, np.floating, np.integer)) and math.isfinite(float(x))


def _prob(v) -> float | None:
    v = float(v)
    if not math.isfinite(v):
        return None
    return min(max(v, 0.0), 1.0)


def _noncentral_f_tail(x: float, df1: float, df2: float, nc: float, *, upper: bool):
    """One tail of the noncentral F through the guarded evaluator :func:`audit.core.ncf_tail`
    (scipy's noncentral F only inside the box of arguments where it is safe, large-argument
    approximations outside it; df2 = infinity gives the noncentral chi-square limit);
    (None, None) when it cannot be computed."""
    from ..core import NCF_ROUTE_APPROX, ncf_tail

    v, route = ncf_tail(x, df1, df2, nc, upper=upper)
    v = _prob(v)
    if v is None:
        return None, None
    if not math.isfinite(float(df2)):
        return v, _NCX2
    return v, (_APPROX if route == NCF_ROUTE_APPROX else _NCF)


def noncentral_f_sf(x: float, df1: float, df2: float, nc: float) -> tuple[float | None, str | None]:
    """P(F'(df1, df2, nc) > x) and the method used (None, None when not computable).

    Parameters
    ----------
    x : float
        The point (an F value).
    df1, df2 : float
        Degrees of freedom (df2 may be infinite).
    nc : float
        Noncentrality (>= 0).

    Returns
    -------
    (float or None, str or None)
    """
    return _noncentral_f_tail(x, df1, df2, nc, upper=True)


def noncentral_f_cdf(x: float, df1: float, df2: float, nc: float) -> tuple[float | None, str | None]:
    """P(F'(df1, df2, nc) <= x) and the method used (None, None when not computable).

    Parameters
    ----------
    x : float
        The point (an F value).
    df1, df2 : float
        Degrees of freedom (df2 may be infinite).
    nc : float
        Noncentrality (>= 0).

    Returns
    -------
    (float or None, str or None)
    """
    return _noncentral_f_tail(x, df1, df2, nc, upper=False)


def _critical(alpha: float, df1: float, df2: float) -> float | None:
    """The central F's upper alpha point: scipy's within the box where its noncentral F is
    trusted (:data:`audit.core.NCF_SCIPY_MAX_DF`), else the root of the guarded tail, started
    from the chi-square limit (df2 infinite: that limit)."""
    from ..core import NCF_SCIPY_MAX_DF

    with np.errstate(all="ignore"):
        lim = float(stats.chi2.isf(alpha, df1)) / df1
        if not math.isfinite(df2):
            return lim if math.isfinite(lim) else None
        if df1 <= NCF_SCIPY_MAX_DF and df2 <= NCF_SCIPY_MAX_DF:
            c = float(stats.f.isf(alpha, df1, df2))
            if math.isfinite(c):
                return c
        if not (math.isfinite(lim) and lim > 0):
            return None

        def gap(x):
            v, _ = noncentral_f_sf(x, df1, df2, 0.0)
            return (v if v is not None else math.nan) - alpha

        try:
            lo, hi = lim / 2.0, lim * 2.0
            if not (gap(lo) > 0 > gap(hi)):
                return None
            return float(optimize.brentq(gap, lo, hi, xtol=1e-14, rtol=1e-12, maxiter=200))
        except (ValueError, RuntimeError, ArithmeticError):
            return None


def _solve_noncentrality(alpha: float, power: float, df1: float, df2: float) -> tuple[float | None, str | None]:
    crit = _critical(alpha, df1, df2)
    if crit is None:
        return None, None

    def gap(lam):
        v, _ = noncentral_f_sf(crit, df1, df2, lam)
        return (v if v is not None else math.nan) - power

    hi = max(1.0, 2.0 * df1)
    while True:
        g = gap(hi)
        if not math.isfinite(g):
            return None, None
        if g > 0:
            break
        hi *= 2.0
        if hi > 1e12:
            return None, None
    lo = 0.0
    if gap(lo) >= 0:  # power already reached at lambda 0 (only if power <= alpha)
        return 0.0, noncentral_f_sf(crit, df1, df2, 0.0)[1]
    try:
        lam = optimize.brentq(gap, lo, hi, xtol=1e-10, rtol=1e-12, maxiter=200)
    except (ValueError, RuntimeError):
        return None, None
    return float(lam), noncentral_f_sf(crit, df1, df2, lam)[1]


def detectable_noncentrality(df1: float, df2: float, *, alpha: float = 0.05, power: float = 0.8) -> tuple[float | None, str | None]:
    """The noncentrality lambda at which the F(df1, df2) test at ``alpha`` has ``power``.

    Parameters
    ----------
    df1, df2 : float
        Degrees of freedom (df2 may be ``math.inf``: the chi-square limit is used).
    alpha : float, default 0.05
        Significance level.
    power : float, default 0.8
        Target power.

    Returns
    -------
    (float or None, str or None)
        lambda and the method used; (None, None) when it cannot be computed.
    """
    alpha = _check_level("alpha", alpha)
    power = _check_level("power", power)
    if not (_finite(df1) and df1 > 0 and df2 is not None and not math.isnan(df2) and df2 > 0):
        return None, None
    return _solve_noncentrality(alpha, power, float(df1), float(df2))


def _check_level(name: str, value) -> float:
    if not (_finite(value) and 0.0 < float(value) < 1.0):
        raise OptionError(f"{name}: expected a number strictly between 0 and 1; found {value!r}; fix: use e.g. "
                          f"{'0.05' if name == 'alpha' else '0.8'}.")
    return float(value)


def _design_counts(anova) -> tuple[int | None, int | None]:
    """N and m from an AnovaResult: m = filled cells (finite interaction terms), N = df_error + m."""
    terms = getattr(anova, "interaction_terms", None)
    if terms is None:
        return None, None
    m = int(np.isfinite(np.asarray(terms, dtype=float)).sum())
    return int(anova.df_error) + m, m


# ---------------------------------------------------------------------------
# public functions
# ---------------------------------------------------------------------------


def detectable_interaction(anova, *, alpha: float = 0.05, power: float = 0.8, effect: str = "AB") -> DetectableEffect:
    """The smallest effect the design's classical F test detects with ``power`` at ``alpha``.

    Parameters
    ----------
    anova : audit.core.AnovaResult
        The classical ANOVA (its df, MS_error and, for N, the interaction terms).
    alpha : float, default 0.05
        Significance level.
    power : float, default 0.8
        Target power.
    effect : str, default 'AB'
        The effect whose test is considered ('AB', 'A' or 'B').

    Returns
    -------
    DetectableEffect
        None values with a note when the test has no error df or no effect df.
    """
    alpha = _check_level("alpha", alpha)
    power = _check_level("power", power)
    if power <= alpha:
        raise OptionError(f"power: expected a target power above alpha ({alpha:g}); found {power:g}; fix: use e.g. 0.8.")
    if effect not in ("A", "B", "AB"):
        raise OptionError(f"effect: expected 'A', 'B' or 'AB'; found {effect!r}; fix: name the effect.")
    row = anova.tables["II"].row(effect)
    df1, df2 = float(row.df), float(anova.df_error)
    n_obs, _ = _design_counts(anova)
    observed = row.partial_eta_sq
    obs_rms = None
    if effect == "AB" and row.ss is not None and n_obs:
        obs_rms = math.sqrt(max(float(row.ss), 0.0) / n_obs)
    base = dict(effect=effect, alpha=alpha, power=power, df1=df1, df2=df2,
                observed_partial_eta_sq=observed, observed_rms_term=obs_rms)
    if df1 <= 0 or df2 <= 0:
        why = "the effect has no degrees of freedom" if df1 <= 0 else "there is no within-cell error df"
        return DetectableEffect(noncentrality=None, partial_eta_sq=None, cohens_f=None, rms_term=None, method=None,
                                note=f"Sensitivity cannot be computed: {why}.", **base)
    lam, method = _solve_noncentrality(alpha, power, df1, df2)
    if lam is None:
        return DetectableEffect(noncentrality=None, partial_eta_sq=None, cohens_f=None, rms_term=None, method=None,
                                note="Sensitivity could not be computed: the noncentral F did not converge.", **base)
    total = df1 + df2 + 1.0
    eta = lam / (lam + total)
    f = math.sqrt(lam / total)
    rms = None
    note = None
    if effect != "AB":
        note = "rms_term is given for the interaction only."
    elif anova.ms_error is None or not n_obs:
        note = ("No error variance on the response's scale (none, or outside the float64 range): the size in "
                "response units cannot be given.")
    else:
        rms = math.sqrt(lam / n_obs) * math.sqrt(float(anova.ms_error))   # no overflow of lam * MS_error
    if method == _NCX2:
        note = ((note + " ") if note else "") + "Computed with the noncentral chi-square limit (large df2)."
    elif method == _APPROX:
        note = (((note + " ") if note else "")
                + "Computed with large-argument normal approximations of the noncentral F.")
    return DetectableEffect(noncentrality=lam, partial_eta_sq=eta, cohens_f=f, rms_term=rms, method=method,
                            note=note, **base)


def equivalence_test(
    F: float | None,
    df1: float | None,
    df2: float | None,
    *,
    bound_eta_sq: float | None = None,
    bound_rms: float | None = None,
    n_obs: int | None = None,
    ms_error: float | None = None,
    alpha: float = 0.05,
) -> EquivalenceResult:
    """Test that an effect is smaller than a bound (H0: effect >= bound).

    Parameters
    ----------
    F : float or None
        Observed F statistic of the effect.
    df1, df2 : float or None
        Its degrees of freedom (df2 may be ``math.inf``).
    bound_eta_sq : float, optional
        The bound as partial eta squared, in (0, 1).  Give this or ``bound_rms``.
    bound_rms : float, optional
        The bound as an n-weighted RMS interaction term in response units (> 0);
        needs ``n_obs`` and ``ms_error``.
    n_obs : int, optional
        The number of observations N (converts between the two bounds).
    ms_error : float, optional
        MS_error of the full model (converts between the two bounds).
    alpha : float, default 0.05
        Level of the equivalence decision.

    Returns
    -------
    EquivalenceResult
        p = P(F'(df1, df2, lambda_bound) <= F); None with a note when it cannot be
        computed (missing F or df, no error variance for a response-unit bound).
    """
    alpha = _check_level("alpha", alpha)
    if (bound_eta_sq is None) == (bound_rms is None):
        raise OptionError("equivalence bound: expected exactly one of a partial eta squared bound or a bound in "
                          f"response units; found {'both' if bound_eta_sq is not None else 'neither'}; "
                          "fix: give one bound.")
    if bound_eta_sq is not None and not (_finite(bound_eta_sq) and 0.0 < float(bound_eta_sq) < 1.0):
        raise OptionError(f"equivalence bound: expected a partial eta squared strictly between 0 and 1; "
                          f"found {bound_eta_sq!r}; fix: use e.g. 0.05.")
    if bound_rms is not None and not (_finite(bound_rms) and float(bound_rms) > 0.0):
        raise OptionError(f"equivalence bound: expected a positive size in response units; found {bound_rms!r}; "
                          f"fix: give the smallest interaction term that would matter, e.g. 1.5.")

    def out(**kw):
        base = dict(F=F if _finite(F) else None, df1=df1 if _finite(df1) else None,
                    df2=float(df2) if df2 is not None and not (isinstance(df2, float) and math.isnan(df2)) else None,
                    bound_partial_eta_sq=None, bound_rms=bound_rms, noncentrality=None, p=None, alpha=alpha,
                    equivalent=None, method=None)
        base.update(kw)
        return EquivalenceResult(**base)

    if not (_finite(F) and F >= 0 and _finite(df1) and df1 > 0 and df2 is not None and not math.isnan(df2) and df2 > 0):
        return out(bound_partial_eta_sq=bound_eta_sq,
                   note="The equivalence test needs an observed F and positive df; the test cannot be formed here.")
    F, df1, df2 = float(F), float(df1), float(df2)
    total = df1 + df2 + 1.0  # infinite when df2 is
    can_convert = _finite(ms_error) and float(ms_error) > 0 and _finite(n_obs) and n_obs > 0
    if bound_eta_sq is not None:
        eta = float(bound_eta_sq)
        if math.isfinite(total):
            lam = eta / (1.0 - eta) * total
        else:
            return out(bound_partial_eta_sq=eta,
                       note="With infinite df2 a partial eta squared bound has no finite noncentrality; "
                            "give the bound in response units.")
        rms = math.sqrt(lam / n_obs) * math.sqrt(float(ms_error)) if can_convert else None
    else:
        if not can_convert:
            return out(note="A bound in response units needs N and a positive MS_error; the test cannot be formed.")
        rms = float(bound_rms)
        r = rms / math.sqrt(float(ms_error))        # scale-free before squaring (no overflow)
        lam = n_obs * r * r
        eta = lam / (lam + total) if math.isfinite(total) else None
    if not math.isfinite(lam):
        return out(bound_partial_eta_sq=None, bound_rms=rms,
                   note="The bound's noncentrality is beyond the float64 range; the test cannot be formed.")
    p, method = noncentral_f_cdf(F, df1, df2, lam)
    note = None
    if p is None:
        note = "The noncentral F probability could not be computed for these values."
    elif method == _NCX2:
        note = "Computed with the noncentral chi-square limit (large df2)."
    elif method == _APPROX:
        note = "Computed with large-argument normal approximations of the noncentral F."
    return out(bound_partial_eta_sq=eta, bound_rms=rms, noncentrality=lam, p=p,
               equivalent=None if p is None else bool(p < alpha), method=method, note=note)
