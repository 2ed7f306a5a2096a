"""Findings from an engine scan: what runs exactly on every row's cell
moments, and what runs on the seeded sample (and says so).

Exact, from the moments of every row: the ANOVA of every SS type, the
classical F, Welch-James, HC3 and HC4, balance, missingness per cell, the
homogeneity check with Levene and Brown-Forsythe (mean and centred SS of
|y - cell mean| and |y - cell median|), Bartlett and its kurtosis adjustment,
the skewness and kurtosis of the residuals (pooled cell moments; they grade
normality), the shape of the interaction (cell means).

On the sample (each result says so, with its size and seed): the normality
tests (Shapiro-Wilk, D'Agostino-Pearson, Anderson-Darling), Fligner-Killeen
(ranks), outliers, influence and fragility (rows; their decisions are about
the sample, so the verdict does not read them), the log and Box-Cox re-tests
(the profile likelihood needs rows), trimmed Welch-James (trimmed means need
order statistics), rank and aligned-rank tests, permutation and wild-bootstrap
tests (the verdict's votes come from the exact methods).  The size check runs
from the exact cell statistics: with the sample's residual shape when the
sample holds every row, else with normal errors drawn as cell sufficient
statistics (resampling residuals into every row would cost R x N draws).  The
independence checks need the order of every row and are not run.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..design import describe_design
from ..fit import Fit, fit_cells, fit_observations
from ..intake import DroppedRows, Observations, Source
from ..results import NOT_RUN, Diagnostic
from .moments import bartlett_kurtosis_from_moments, levene_from_moments, pooled_shape
from .scan import Scan

__all__ = ["findings_from_scan", "SAMPLE_DIAGNOSTICS", "SAMPLE_METHODS", "sample_observations"]

SAMPLE_DIAGNOSTICS = ("outliers", "influence", "fragility", "scale")
SAMPLE_METHODS = ("welch-james-trimmed", "rank-transform", "aligned-rank-transform", "permutation-freedman-lane",
                  "permutation-ter-braak", "permutation-studentized", "wild-bootstrap")
#: sample-based diagnostics whose typed facts the verdict does not read (decisions about the sample)
_NO_FACTS = ("influence", "fragility")


def sample_observations(scan: Scan, dropped: DroppedRows, source: Source) -> Observations:
    cells = scan.moments.cells
    n = scan.sample_y.size
    rows = scan.sample_rows if scan.sample_rows is not None else np.arange(n)
    return Observations(response=cells.response, factors=cells.factors, y=scan.sample_y, offset=cells.offset,
                        centring=scan.centring, a=scan.sample_a, b=scan.sample_b, levels_a=cells.levels_a,
                        levels_b=cells.levels_b, rows=np.asarray(rows, np.int64), row_kind="position", order=None,
                        unit=None, order_name=None, unit_name=None, dropped=dropped, source=source)


def _sample_sentence(info: dict, N: int) -> str:
    return (f"on a seeded uniform sample of {info['sample_rows']:,} rows (up to {info['sample_per_cell']:,} per "
            f"cell, seed {info['sample_seed']}), not on all {N:,} rows")


def _mark_diag(d: Diagnostic, sample: dict, sentence: str, keep_facts: bool = True) -> Diagnostic:
    if d.severity == NOT_RUN:
        return d
    return dataclasses.replace(d, summary=f"{d.summary} (Ran {sentence}.)", values={**d.values, "sample": sample},
                               facts=d.facts if keep_facts else None)


def _exact_homogeneity_tests(cm, fit_s) -> dict:
    from ..diagnostics.assumptions import _groups_sorted, bartlett_from_cells, fligner_test

    c = cm.cells
    use = c.counts >= 2
    out: dict = {"reason": None}
    if use.sum() < 2:
        return out
    n = c.counts[use]
    st = c.standardised()
    out["levene_mean"] = levene_from_moments(n, cm.absdev_mean_mean[use], cm.absdev_mean_css[use])
    out["brown_forsythe"] = levene_from_moments(n, cm.absdev_median_mean[use], cm.absdev_median_css[use])
    bart = bartlett_from_cells(n.astype(float), st.css[use] / (n - 1))
    if bart.get("statistic") is not None:
        out["bartlett_adjusted"] = bartlett_kurtosis_from_moments(bart["statistic"], bart["df"], n, st.css[use],
                                                                  cm.m4[use])
    obs = fit_s.obs
    keep = use.ravel()
    if keep[obs.cell].sum() >= 2:
        ys, g = _groups_sorted(obs.y, obs.cell, keep)
        fk = fligner_test(ys, g)
        fk["sample_rows"] = int(ys.size)
        out["fligner_killeen"] = fk
    out["reason"] = ("Levene and Brown-Forsythe exact from every row's cell moments; Fligner-Killeen (ranks) on "
                     "the sample")
    return out


def _with_sample_methods(judgement, meths, voting, sentence, alpha):
    """The judgement's per-method trust and agreement, aligned with every
    method listed: the sample-based ones are listed as not voting."""
    from ..decision import decision
    from ..verdict.trust import MethodTrust

    pos = {id(r): i for i, r in enumerate(voting)}
    present = {r.effect: r.present for r in judgement.claims}
    trust, agrees = [], []
    for m in meths:
        if id(m) in pos:
            trust.append(judgement.trust[pos[id(m)]])
            agrees.append(judgement.agrees[pos[id(m)]])
        else:
            trust.append(MethodTrust(method=m.id, effect=m.effect, trusted=False, rule="engine-sample",
                                     reason=f"Ran {sentence}: shown for comparison; the verdict's votes come from "
                                            "the methods computed from every row."))
            agrees.append(None if (m.p is None or present.get(m.effect) is None)
                          else decision(m.p, alpha) == present[m.effect])
    return dataclasses.replace(judgement, trust=tuple(trust), agrees=tuple(agrees))


def findings_from_scan(scan: Scan, *, alpha, resamples, seed, diagnostics, methods, figures, progress, claim,
                       calibration, equivalence, timestamp, source_path):
    from ..api import _fragility_block, _provenance
    from ..findings import Findings

    cm = scan.moments
    cells = cm.cells
    la, lb = cells.levels_a, cells.levels_b
    dropped = scan.dropped if scan.dropped is not None else DroppedRows(
        total=int(cm.missing_response.sum()) + cm.missing_factor, missing_response=cm.missing_response,
        missing_factor=cm.missing_factor, missing_other=0, blank_lines=0, rows=())
    source = Source(path=str(source_path), sha256=None, format=scan.info["source"].get("format", "engine"))
    obs_s = sample_observations(scan, dropped, source)
    fit_m = fit_cells(cells, alpha=alpha)
    fit_s = fit_observations(obs_s, alpha=alpha)
    cell = obs_s.cell
    ff = cells.means.ravel()[cell]
    fa = fit_m.anova.additive_fit.ravel()[cell]
    hybrid = Fit(cells=cells, anova=fit_m.anova, alpha=fit_m.alpha, obs=obs_s, fitted_full=ff,
                 resid_full=obs_s.y - ff, fitted_additive=fa, resid_additive=obs_s.y - fa)
    design = describe_design(cells, dropped=dropped.to_dict(la, lb), centring=scan.centring,
                             level_order=scan.level_order)
    if scan.notes:
        design = dataclasses.replace(design, notes=(*scan.notes, *design.notes))
    N = cells.N
    sentence = _sample_sentence(scan.info, N)
    sample = {"rows": scan.info["sample_rows"], "per_cell": scan.info["sample_per_cell"],
              "seed": scan.info["sample_seed"], "of_rows": N}
    design = dataclasses.replace(design, notes=(*design.notes, (
        f"Read through the {scan.info['name']} engine: the ANOVA, Welch-James, HC3/HC4, balance, missingness, "
        "variance checks and residual skewness/kurtosis come from every row's cell moments; checks that need "
        f"rows ran {sentence} (each says so).")))

    diags: tuple = ()
    if diagnostics:
        from ..diagnostics import DIAGNOSTIC_IDS
        from ..diagnostics.assumptions import homogeneity, normality
        from ..diagnostics.design_checks import balance, independence, missingness
        from ..diagnostics.influence import fragility, influence, outliers
        from ..diagnostics.scale import scale, shape

        by_id = {}
        nm = normality(fit_s, shape=pooled_shape(cm))
        by_id["normality"] = _mark_diag(nm, sample, "its tests " + sentence + "; skewness and kurtosis (which "
                                        "grade it) from every row's cell moments")
        by_id["homogeneity"] = homogeneity(fit_m, tests=_exact_homogeneity_tests(cm, fit_s))
        by_id["balance"] = balance(fit_m)
        by_id["missingness"] = missingness(hybrid)
        # when the sample is every row, the row-based checks are exact and vote as in memory
        whole_rows = scan.info["sample_rows"] == N
        for fn in (outliers, influence, fragility, scale):
            d = fn(fit_s)
            by_id[d.id] = _mark_diag(d, sample, sentence, keep_facts=whole_rows or d.id not in _NO_FACTS)
        by_id["shape"] = shape(fit_m)
        ind = independence(fit_m)
        by_id["independence"] = dataclasses.replace(
            ind, summary="Independence: the run-order and repeated-unit checks need every row in order and are "
                         "not run through an engine scan; independence cannot be checked from the data anyway.")
        diags = tuple(by_id[i] for i in DIAGNOSTIC_IDS)

    prov = _provenance(str(source_path), None)
    if not timestamp:
        prov.pop("timestamp", None)
    prov["engine"] = scan.info
    meths: tuple = ()
    calib = judgement = None
    if methods:
        from ..methods import run_methods

        exact = run_methods(fit_m, resamples=0, seed=seed)
        samp = {(r.id, r.effect): r for r in run_methods(fit_s, resamples=resamples, seed=seed, progress=progress)}
        note = f"ran {sentence}"
        merged = []
        done = set()
        for r in exact:
            if r.id in SAMPLE_METHODS and (r.id, r.effect) in samp:
                s = samp[(r.id, r.effect)]
                merged.append(dataclasses.replace(s, notes=(*s.notes, note), extra={**s.extra, "sample": sample}))
                done.add((r.id, r.effect))
            else:
                merged.append(r)
        for key, s in samp.items():
            if key[0] in SAMPLE_METHODS and key not in done:
                merged.append(dataclasses.replace(s, notes=(*s.notes, note), extra={**s.extra, "sample": sample}))
        meths = tuple(merged)
        prov["resamples"] = resamples
        from ..verdict.calibration import size_check
        from ..verdict.judge import judge

        if calibration:
            # resampling the sample's residuals into every row of every replication is O(R N): when the
            # sample is every row use it (the data-mode check), else draw the cells' sufficient statistics
            # under normal errors (O(R m); with cells this large their means are near normal anyway)
            whole = scan.info["sample_rows"] == N
            calib = size_check(hybrid if whole else fit_m, alpha=fit_m.alpha, replications=calibration, seed=seed)
        prov["calibration_replications"] = calibration
        voting = tuple(r for r in meths if r.id not in SAMPLE_METHODS)
        judgement = judge(fit_m, diagnostics=diags, methods=voting, claims=claim or (), calibration=calib,
                          equivalence=equivalence)
        judgement = _with_sample_methods(judgement, meths, voting, sentence, fit_m.alpha)
    prov["seed"] = seed
    fig = None
    if figures:
        from ..diagnostics.plotdata import figure_data

        fig = figure_data(fit_s, diags)
    return Findings(mode="moments", alpha=fit_m.alpha, response=cells.response, factors=cells.factors,
                    design=design, cells=cells, anova=fit_m.anova, diagnostics=diags, methods=meths,
                    fragility=_fragility_block(diags), provenance=prov, figure_data=fig, judgement=judgement,
                    calibration=calib)
