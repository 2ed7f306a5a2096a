"""Permutation tests of the two-way effects (METHODS.md section 5).

No exact permutation test exists for an interaction; these are the recognised
approximations, all run on the chunked engine of :mod:`.resampling`:

* ``permutation-freedman-lane`` (default; Freedman & Lane 1983): fit the model
  restricted by the hypothesis (for AB the additive model A + B), permute its
  residuals e_r and add them back to its fitted values, y* = yhat_r + P e_r;
  statistic: the classical F of the effect.  Because yhat_r is constant within
  cells and satisfies the hypothesis, F(y*) = F(P e_r) exactly, so only P e_r
  is formed.  Main effects use the Type III hypotheses: the restricted model is
  the full model under C_A mu = 0 (i.e. B + AB in sum-to-zero coding), and the
  unpermuted statistic is the Type III F.
* ``permutation-ter-braak`` (ter Braak 1992): y* = P e_full, statistic F.
* ``permutation-studentized`` (Pauly, Brunner & Konietschke 2015): permute the
  whole response; statistic the Welch-James Wald-type T (= the HC2 Wald
  chi-square) of the effect, studentized cell by cell, so the test stays
  asymptotically valid with unequal variances and unequal cell sizes, where
  the two residual permutations are not (they assume exchangeable errors).

Every result carries the resamples used n, p = (1 + count)/(n + 1), the Monte
Carlo SE and a 99% Clopper-Pearson interval for p; by default each effect stops
as soon as its decision at alpha is settled (:mod:`.resampling`, Gandy 2009),
``exact_resamples`` draws all B.  With the same seed every effect of every
permutation method sees the same permutations (:func:`permutation_all` draws
them once for all three methods).

References
----------
.. [1] Freedman, D. & Lane, D. (1983). A nonstochastic interpretation of reported
       significance levels. Journal of Business & Economic Statistics 1, 292-298.
.. [2] ter Braak, C. J. F. (1992). Permutation versus bootstrap significance
       tests in multiple regression and ANOVA. In Bootstrapping and Related
       Techniques, Springer, 79-86.
.. [3] Anderson, M. J. & ter Braak, C. J. F. (2003). Permutation tests for
       multi-factorial analysis of variance. Journal of Statistical Computation
       and Simulation 73, 85-113.
.. [4] Pauly, M., Brunner, E. & Konietschke, F. (2015). Asymptotic permutation
       tests in general factorial designs. JRSS B 77, 461-473.
.. [5] Winkler, A. M., Ridgway, G. R., Webster, M. A., Smith, S. M. & Nichols,
       T. E. (2014). Permutation inference for the general linear model.
       NeuroImage 92, 381-397.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from ..fit import Fit
from ..results import MethodResult
from .resampling import (
    P_INTERVAL_LEVEL,
    TIE_RTOL,
    Job,
    check_resamples,
    effect_hypothesis,
    f_statistic_maker,
    layout_from_fit,
    none_result,
    p_notes,
    p_from_count,
    progress_fn,
    restricted_cell_fit,
    run_jobs,
    seed_value,
    stopping_rule_text,
    wald_statistic_maker,
)
from .welch import EFFECTS, check_effect, welch_james_cells

__all__ = [
    "freedman_lane",
    "freedman_lane_all",
    "ter_braak",
    "ter_braak_all",
    "studentized_permutation",
    "studentized_permutation_all",
    "permutation_all",
]

_HYP = {
    "A": "main effect A on unweighted marginal means (Type III hypothesis)",
    "B": "main effect B on unweighted marginal means (Type III hypothesis)",
    "AB": "interaction: all interaction contrasts of the cell means",
}

_EXCHANGE = ("residual permutation assumes exchangeable errors (equal variances across cells); with unequal "
             "variances in unequal cells it loses its footing - read permutation-studentized or wild-bootstrap "
             "instead (Anderson & ter Braak 2003)")


def _checks(fit: Fit, effects, resamples, mid: str, name: str, *, need_two: str | None):
    """Common validation; returns (B, list of early results or None)."""
    for e in effects:
        check_effect(e)
    B = check_resamples(resamples)
    reason = None
    cells = fit.cells.standardised()   # css in range (a tiny response's SS may underflow to 0 unscaled)
    if fit.obs is None:
        reason = "not computed: resampling needs the raw observations (only cell summaries were given)"
    elif cells.df_within == 0:
        reason = ("not computed: one observation per cell leaves no within-cell error term "
                  "(see the one-degree-of-freedom test for non-additivity)")
    elif not cells.sse_within > 0:
        reason = "not computed: zero variation within every cell, the statistic is undefined"
    elif need_two:
        n = cells.counts
        small = (n == 1)
        if small.any():
            lab = [cells.cell_label(j, k) for j, k in zip(*np.nonzero(small))]
            reason = (f"not computed: {need_two} needs n >= 2 in every filled cell, found "
                      f"{len(lab)} cell(s) with one observation ({', '.join(lab[:5])})")
        elif (cells.css[n > 0] <= 0).any():
            lab = [cells.cell_label(j, k) for j, k in zip(*np.nonzero((n > 0) & (cells.css <= 0)))]
            reason = (f"not computed: zero variance in cell(s) {', '.join(lab[:5])} makes {need_two} "
                      "undefined")
    if reason:
        return B, [none_result(mid, e, reason, name, B) for e in effects]
    return B, None


def _results(mid, name, effects, Cs, obs, tally, B, seed, alpha, extra_common, notes_common, df1s,
             reported=None, extra_each=None, offset=0):
    """One MethodResult per effect; ``obs`` are the ordering statistics and ``tally`` the
    engine's counts of resamples at least as extreme among the ``used`` first ones (effects
    ``offset`` .. of the tally), ``reported`` (default ``obs``) the statistic shown."""
    out = []
    for i, e in enumerate(effects):
        n = int(tally.used[offset + i])
        early = bool(tally.stopped[offset + i])
        pinfo = p_from_count(int(tally.counts[offset + i]), n, alpha=alpha)
        if early:
            pinfo["settled"] = True       # the stopping rule settled it (risk SEQUENTIAL_RISK)
        extra = {**extra_common, **(extra_each[i] if extra_each else {}), "count": pinfo["count"],
                 "settled": pinfo["settled"], "seed": seed, "chunk_size": int(tally.chunk),
                 "p_interval_level": P_INTERVAL_LEVEL, "tie_rtol": TIE_RTOL, "max_resamples": int(B),
                 "stopped_early": early, "stopping_rule": stopping_rule_text(tally)}
        notes = [_HYP[e], *notes_common, *p_notes(pinfo, n, alpha, max_resamples=B, stopped_early=early)]
        out.append(MethodResult(
            id=mid, effect=e, statistic=float((obs if reported is None else reported)[i]), statistic_name=name,
            df1=float(df1s[i]), df2=None, p=pinfo["p"], resamples=n, mc_se=pinfo["mc_se"],
            p_interval=pinfo["p_interval"], valid_for_interaction=True, notes=tuple(notes), extra=extra))
    return out


def _split_estimable(fit, effects, mid, name, B):
    """Hypothesis matrices for the estimable effects, reasons for the others."""
    Cs, ok, skipped = [], [], {}
    for e in effects:
        C, reason = effect_hypothesis(fit.cells, e)
        if C is None:
            skipped[e] = none_result(mid, e, reason, name, B)
        else:
            Cs.append(C)
            ok.append(e)
    return Cs, ok, skipped


def _merge(effects, done: list[MethodResult], skipped: dict) -> tuple[MethodResult, ...]:
    by = {r.effect: r for r in done}
    by.update(skipped)
    return tuple(by[e] for e in effects)


class _Setup(NamedTuple):
    """What every resampling method needs once its inputs have passed the checks."""

    B: int
    Cs: list
    ok: list
    skipped: dict
    layout: object
    y_sorted: np.ndarray
    means: np.ndarray


class Plan(NamedTuple):
    """A resampling method ready to run: its ``jobs`` for :func:`resampling.run_jobs` and
    ``finish(tallies, seed_record)`` that turns their tallies into the method's results.
    ``early`` holds the finished results instead when nothing can be resampled."""

    early: tuple | None
    jobs: list
    finish: object
    layout: object
    scheme: str


def _prepare(fit: Fit, effects, resamples, mid: str, name: str, *, need_two: str | None):
    """Checks, estimable hypotheses and the cell-sorted layout, shared by every
    resampling method.  Returns (early, setup): ``early`` is the finished tuple of
    results when nothing can be resampled (setup None then)."""
    B, early = _checks(fit, effects, resamples, mid, name, need_two=need_two)
    if early:
        return tuple(early), None
    Cs, ok, skipped = _split_estimable(fit, effects, mid, name, B)
    if not ok:
        return _merge(effects, [], skipped), None
    layout = layout_from_fit(fit)
    st = fit.cells.standardised()      # exact power-of-two scale: squares stay in range at every data scale
    y_sorted = np.asarray(fit.obs.y, dtype=float)[layout.order] / st.unit
    means = st.means.ravel()[layout.filled]
    return None, _Setup(B, Cs, ok, skipped, layout, y_sorted, means)


def _done(early) -> Plan:
    return Plan(early=early, jobs=[], finish=None, layout=None, scheme="permute")


def _cell_sums(u_sorted, layout, squares=False):
    S = np.add.reduceat(u_sorted[None, :], layout.starts, axis=1)
    SQ = np.add.reduceat((u_sorted * u_sorted)[None, :], layout.starts, axis=1) if squares else None
    return S, SQ


def plan_freedman_lane(fit, effects, resamples) -> Plan:
    mid, name = "permutation-freedman-lane", "F"
    early, st = _prepare(fit, effects, resamples, mid, name, need_two=None)
    if early is not None:
        return _done(early)
    B, Cs, ok, skipped, layout, y_sorted, means = st
    cs = layout.cell_sorted
    jobs = []
    for C in Cs:
        mu_r = restricted_cell_fit(means, layout.counts, C)
        u = y_sorted - mu_r[cs]
        fn = f_statistic_maker(layout, [C], float(u @ u))
        jobs.append(Job(u=u, statistic=fn, observed=fn(*_cell_sums(u, layout))[0]))

    def finish(tallies, seed_rec):
        done = []
        for e, C, job, tally in zip(ok, Cs, jobs, tallies):
            extra = {"df_error": int(layout.N - layout.m), "scheme": "permute restricted-model residuals",
                     "robust_to_unequal_variances": False}
            notes = [f"Freedman-Lane: residuals of the model restricted by the hypothesis "
                     f"({'the additive model A + B' if e == 'AB' else 'the full model without ' + e}) permuted "
                     "and added back to its fitted values; statistic: the classical F", _EXCHANGE]
            done += _results(mid, name, [e], [C], job.observed, tally, B, seed_rec, fit.alpha, extra, notes,
                             [C.shape[0]])
        return _merge(effects, done, skipped)

    return Plan(early=None, jobs=jobs, finish=finish, layout=layout, scheme="permute")


def plan_ter_braak(fit, effects, resamples) -> Plan:
    mid, name = "permutation-ter-braak", "F"
    early, st = _prepare(fit, effects, resamples, mid, name, need_two=None)
    if early is not None:
        return _done(early)
    B, Cs, ok, skipped, layout, y_sorted, means = st
    u = y_sorted - means[layout.cell_sorted]
    fn = f_statistic_maker(layout, Cs, float(u @ u))
    # observed statistic: the classical F of the data (residual permutation of the full model)
    y_c = y_sorted - float(np.mean(y_sorted))
    obs = f_statistic_maker(layout, Cs, float(y_c @ y_c))(*_cell_sums(y_c, layout))[0]
    job = Job(u=u, statistic=fn, observed=obs)

    def finish(tallies, seed_rec):
        extra = {"df_error": int(layout.N - layout.m), "scheme": "permute full-model residuals",
                 "robust_to_unequal_variances": False}
        notes = ["ter Braak: residuals of the full model permuted; statistic: the classical F", _EXCHANGE]
        done = _results(mid, name, ok, Cs, obs, tallies[0], B, seed_rec, fit.alpha, extra, notes,
                        [C.shape[0] for C in Cs])
        return _merge(effects, done, skipped)

    return Plan(early=None, jobs=[job], finish=finish, layout=layout, scheme="permute")


def plan_studentized(fit, effects, resamples) -> Plan:
    mid, name = "permutation-studentized", "T/c"
    early, st = _prepare(fit, effects, resamples, mid, name,
                         need_two="the studentized statistic (cell variances s2/n)")
    if early is not None:
        return _done(early)
    B, Cs, ok, skipped, layout, y_sorted, means = st
    u = y_sorted - float(np.mean(y_sorted))
    scale = float(u @ u) / layout.N
    fn = wald_statistic_maker(layout, Cs, kind="wj", scale=scale)
    S, SQ = _cell_sums(u, layout, squares=True)
    obs = fn(S, SQ)[0]
    # the reported statistic: Welch-James T / c of the data, with T, A, c
    n = layout.counts
    var = fit.cells.standardised().variances.ravel()[layout.filled]   # same units as y_sorted
    shown, each = [], []
    for C in Cs:
        T, A, c, df2 = (float(x) for x in welch_james_cells(means, var, n, C))
        shown.append(T / c)
        each.append({"T": T, "A": A, "c": c, "welch_james_df2": df2})
    job = Job(u=u, statistic=fn, observed=obs, squares=True)

    def finish(tallies, seed_rec):
        extra = {"scheme": "permute the whole response", "ordering": "Welch-James approximate p-value of T/c",
                 "robust_to_unequal_variances": True}
        notes = ["studentized permutation (after Pauly, Brunner & Konietschke 2015): the whole response "
                 "permuted; each resample is studentized cell by cell with the Welch-James statistic and "
                 "resamples are ordered by its approximate p-value (T/c on F(r, r(r+2)/(3A)), Johansen 1980), "
                 "a monotone form of T that is asymptotically equivalent to ordering by T; valid with unequal "
                 "variances and unequal cell sizes",
                 "ordering by T itself was liberal in small cells in our Type I error simulation (about 0.09 at "
                 "alpha = 0.05 with cells of 5-20 and large variances in small cells; see "
                 "tests/test_typei_resampling.py)"]
        done = _results(mid, name, ok, Cs, obs, tallies[0], B, seed_rec, fit.alpha, extra, notes,
                        [C.shape[0] for C in Cs], reported=shown, extra_each=each)
        return _merge(effects, done, skipped)

    return Plan(early=None, jobs=[job], finish=finish, layout=layout, scheme="permute")


def run_plans(plans: list[Plan], fit: Fit, resamples, seed, progress, *, label: str, exact: bool = False,
              budget=None) -> list[tuple]:
    """Run several methods' plans on ONE stream of resamples (same scheme, same layout)
    drawn from ``seed``, and finish each.  Every plan gets exactly the resamples it would
    get if run alone with the same seed (the stream does not depend on the jobs)."""
    live = [p for p in plans if p.early is None]
    out: dict[int, tuple] = {id(p): p.early for p in plans if p.early is not None}
    if live:
        B = check_resamples(resamples)
        rng, seed_rec = seed_value(seed)
        jobs = [j for p in live for j in p.jobs]
        kw = {} if budget is None else {"budget": budget}
        tallies = run_jobs(jobs, live[0].layout, scheme=live[0].scheme, resamples=B, rng=rng, alpha=fit.alpha,
                           exact=exact, progress=progress_fn(progress, label, B), **kw)
        at = 0
        for p in live:
            out[id(p)] = p.finish(tallies[at:at + len(p.jobs)], seed_rec)
            at += len(p.jobs)
    return [out[id(p)] for p in plans]


def _freedman_lane(fit, effects, resamples, seed, progress, budget=None, exact=False):
    plan = plan_freedman_lane(fit, effects, resamples)
    return run_plans([plan], fit, resamples, seed, progress, label="permutation-freedman-lane", exact=exact,
                     budget=budget)[0]


def _ter_braak(fit, effects, resamples, seed, progress, budget=None, exact=False):
    plan = plan_ter_braak(fit, effects, resamples)
    return run_plans([plan], fit, resamples, seed, progress, label="permutation-ter-braak", exact=exact,
                     budget=budget)[0]


def _studentized(fit, effects, resamples, seed, progress, budget=None, exact=False):
    plan = plan_studentized(fit, effects, resamples)
    return run_plans([plan], fit, resamples, seed, progress, label="permutation-studentized", exact=exact,
                     budget=budget)[0]


# --------------------------------------------------------------------------- public API

def freedman_lane(fit: Fit, *, effect: str = "AB", resamples: int = 9999, seed: int | None = None,
                  progress=None, exact_resamples: bool = False) -> MethodResult:
    """Freedman-Lane permutation test of one effect (default method).

    Parameters
    ----------
    fit : Fit
        Data mode (raw observations needed).
    effect : 'A', 'B' or 'AB'
    resamples : int
        B, the largest number of permutations (default 9999).
    seed : int or None
        ``np.random.default_rng(seed)``; None draws fresh entropy, recorded in
        ``extra['seed']``.
    progress : None, bool or callable(done, total)
        True shows :class:`audit.progress.TerminalProgress` on stderr.
    exact_resamples : bool, default False
        False: sequential stopping (the effect stops as soon as its decision at the
        fit's alpha is settled, resampling risk ``resampling.SEQUENTIAL_RISK``);
        True: all B permutations.

    Returns
    -------
    MethodResult
        statistic: the classical F of the data; df1: its numerator df; p:
        (1 + count)/(n + 1) with n = ``resamples`` the permutations used; ``extra``:
        seed, count, chunk_size, df_error, settled (the 99% interval lies on one side
        of alpha, or the sequential rule stopped), max_resamples (B), stopped_early,
        stopping_rule, p_interval_level, tie_rtol, scheme, robust_to_unequal_variances.
    """
    return _freedman_lane(fit, (effect,), resamples, seed, progress, exact=exact_resamples)[0]


def freedman_lane_all(fit: Fit, *, resamples: int = 9999, seed: int | None = None, progress=None,
                      effects=EFFECTS, exact_resamples: bool = False) -> tuple[MethodResult, ...]:
    """Freedman-Lane results for ``effects`` (default A, B, AB), same permutations for each."""
    return _freedman_lane(fit, tuple(effects), resamples, seed, progress, exact=exact_resamples)


def ter_braak(fit: Fit, *, effect: str = "AB", resamples: int = 9999, seed: int | None = None,
              progress=None, exact_resamples: bool = False) -> MethodResult:
    """ter Braak permutation test (full-model residuals permuted); see :func:`freedman_lane`."""
    return _ter_braak(fit, (effect,), resamples, seed, progress, exact=exact_resamples)[0]


def ter_braak_all(fit: Fit, *, resamples: int = 9999, seed: int | None = None, progress=None,
                  effects=EFFECTS, exact_resamples: bool = False) -> tuple[MethodResult, ...]:
    """ter Braak results for ``effects`` from one shared set of permutations."""
    return _ter_braak(fit, tuple(effects), resamples, seed, progress, exact=exact_resamples)


def studentized_permutation(fit: Fit, *, effect: str = "AB", resamples: int = 9999, seed: int | None = None,
                            progress=None, exact_resamples: bool = False) -> MethodResult:
    """Studentized permutation test (whole response permuted, Welch-James T).

    statistic: T of the data (statistic_name 'T'); needs n >= 2 and nonzero
    variance in every filled cell.  Other fields as :func:`freedman_lane`.
    """
    return _studentized(fit, (effect,), resamples, seed, progress, exact=exact_resamples)[0]


def studentized_permutation_all(fit: Fit, *, resamples: int = 9999, seed: int | None = None, progress=None,
                                effects=EFFECTS, exact_resamples: bool = False) -> tuple[MethodResult, ...]:
    """Studentized permutation results for ``effects`` from one shared set of permutations."""
    return _studentized(fit, tuple(effects), resamples, seed, progress, exact=exact_resamples)


def permutation_all(fit: Fit, *, resamples: int = 9999, seed: int | None = None, progress=None,
                    effects=EFFECTS, exact_resamples: bool = False) -> tuple[tuple[MethodResult, ...], ...]:
    """Freedman-Lane, ter Braak and the studentized permutation from ONE permutation draw.

    The three methods permute different vectors, but the same row permutations serve all
    three: one (b, N) block of permuted indices per chunk, each method's vector gathered
    through it.  Because each method alone draws the same permutations from the same seed,
    the results equal those of :func:`freedman_lane_all`, :func:`ter_braak_all` and
    :func:`studentized_permutation_all` called separately with that seed (tested); drawing
    once saves two thirds of the dominant cost.  A method whose effects are all settled
    stops gathering while the others go on.

    Returns
    -------
    (freedman-lane results, ter-braak results, studentized results)
    """
    effects = tuple(effects)
    plans = [plan_freedman_lane(fit, effects, resamples), plan_ter_braak(fit, effects, resamples),
             plan_studentized(fit, effects, resamples)]
    return tuple(run_plans(plans, fit, resamples, seed, progress, label="permutation", exact=exact_resamples))
