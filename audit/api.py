"""The public entry points: :func:`check` (raw data) and :func:`check_summary`
(a table of cell means, SDs and sizes).  Both run the same engine:

intake -> design -> core fit -> diagnostics and alternative methods -> (verdict)
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import platform
import sys

from . import __version__
from .design import cells_from_summary, describe_design
from .findings import Findings
from .fit import fit_cells, fit_observations
from .intake import load
from .options import check_alpha, check_resamples, check_seed
from .results import Diagnostic

__all__ = ["check", "check_summary", "MAX_CALIBRATION"]

#: largest number of size-check replications accepted
MAX_CALIBRATION = 100_000


def _provenance(source_path: str | None, sha256: str | None) -> dict:
    import numpy
    import pandas
    import scipy

    return {
        "tool": "twoway-audit",
        "version": __version__,
        "input": source_path,
        "input_sha256": sha256,
        "python": platform.python_version(),
        "libraries": {"numpy": numpy.__version__, "scipy": scipy.__version__, "pandas": pandas.__version__},
        "timestamp": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "command": " ".join(sys.argv) if sys.argv and sys.argv[0].endswith(("twoway-audit", "__main__.py")) else None,
    }


def check(
    data,
    *,
    response: str,
    factors: tuple[str, str],
    alpha: float = 0.05,
    levels: dict | None = None,
    order: str | None = None,
    unit: str | None = None,
    sheet: str | int | None = None,
    encoding: str | None = None,
    decimal: str | None = None,
    resamples: int = 9999,
    seed: int | None = None,
    diagnostics: bool = True,
    methods: bool = True,
    figures: bool = False,
    progress=None,
    claim=None,
    calibration: int | None = None,
    equivalence=None,
    timestamp: bool = True,
    exact_resamples: bool = False,
) -> Findings:
    """Audit the two-way ANOVA of a long-format dataset.

    Parameters
    ----------
    data : str, path or pandas.DataFrame
        One row per observation (.csv/.tsv/.txt with the delimiter detected,
        .xlsx, .parquet, or a DataFrame).
    response : str
        Name of the numeric response column.
    factors : (str, str)
        Names of the two factor columns (always treated as categorical).
    alpha : float, default 0.05
        Significance level for every decision.
    levels : dict, optional
        {factor: [level, ...]} (or a sequence of (factor, [level, ...]) pairs)
        to fix a level order (default: first appearance); every level must be
        listed once.
    order : str, optional
        Run-order column (used by the independence checks).
    unit : str, optional
        Experimental-unit column (pseudo-replication check).
    sheet : str or int, optional
        Sheet of an .xlsx workbook, by name or number counting from 1;
        required when the workbook has several sheets.
    encoding : str, optional
        Encoding of a text file (default: UTF-8, or UTF-16 with a byte-order
        mark), e.g. 'latin-1'.
    decimal : {'.', ','}, optional
        Decimal mark of numbers in a text file (default '.'; a ';'-delimited
        file whose response values all use decimal commas is read with ','
        and a note).
    resamples : int, default 9999
        The largest number of resamples for each permutation / bootstrap method
        (0 skips them); each stops earlier once its decision at alpha is settled.
    seed : int, optional
        Seed of the resampling methods; when None a fresh one is drawn and
        recorded in ``provenance['seed']`` so the run can be repeated.
    diagnostics, methods : bool, default True
        Run the assumption/design diagnostics and the alternative methods.
    figures : bool, default False
        Also compute the plot coordinates for the report figures
        (``Findings.figure_data``).
    progress : bool or callable, optional
        Progress display for the resampling methods (True: a bar on a
        terminal's stderr).
    claim : str or sequence of str, optional
        The reported result(s) to judge: a test line such as
        ``"F(2, 54) = 4.11, p = .022"`` (optionally labelled ``"A: ..."``,
        ``"B: ..."``, ``"AB: ..."`` or with a factor name; unlabelled means
        the interaction), or ``"present"`` / ``"absent"``.  Without one the
        claim is the classical F's decision at alpha.
    calibration : int, optional
        Replications of the size check on null datasets shaped like this one
        (default :data:`audit.verdict.calibration.DEFAULT_REPLICATIONS`;
        0 turns it off).
    equivalence : float or str, optional
        A bound for an equivalence test of the interaction: the largest
        negligible RMS interaction term in response units, or ``"eta2=X"``.
    timestamp : bool, default True
        Record the time of the run in ``provenance`` (False for byte-identical
        reruns).
    exact_resamples : bool, default False
        Draw all ``resamples`` for every resampling method instead of stopping each
        as soon as its decision at alpha is settled (sequential rule, resampling
        risk 1e-3; see :mod:`audit.methods.resampling`).

    Returns
    -------
    Findings

    Raises
    ------
    audit.errors.AuditInputError
        Bad input, with a message naming the column or option at fault.
    """
    alpha = check_alpha(alpha)          # every option is checked before any data is read
    resamples = check_resamples(resamples)
    seed = check_seed(seed)
    if not isinstance(exact_resamples, bool):
        from .errors import OptionError
        raise OptionError(f"exact_resamples: expected True or False, found {exact_resamples!r}")
    claim, calibration, equivalence = _verdict_options(claim, calibration, equivalence, factors)
    obs = load(data, response=response, factors=factors, levels=levels, order=order, unit=unit,
               sheet=sheet, encoding=encoding, decimal=decimal)
    fit = fit_observations(obs, alpha=alpha)
    design = describe_design(
        fit.cells, dropped=obs.dropped.to_dict(obs.levels_a, obs.levels_b), centring=obs.centring
    )
    design = dataclasses.replace(design, notes=(*obs.notes, *design.notes)) if obs.notes else design
    return _assemble(fit, design, mode="data", source=(obs.source.path, obs.source.sha256),
                     claim=claim, calibration=calibration, equivalence=equivalence, timestamp=timestamp,
                     resamples=resamples, seed=seed, diagnostics=diagnostics, methods=methods,
                     figures=figures, progress=progress, exact_resamples=exact_resamples)


def _fragility_block(diags: tuple[Diagnostic, ...]) -> dict | None:
    for d in diags:
        if d.id == "fragility" and d.values.get("available", True):
            v = d.values
            return {"deletions_to_flip": v.get("deletions_to_flip"), "rows": v.get("rows", []),
                    "max_steps": v.get("max_steps"), "stopped": v.get("stopped")}
    return None


def _verdict_options(claim, calibration, equivalence, factors):
    """Check the verdict's options at the edge, before any data is read."""
    from .errors import OptionError
    from .verdict.calibration import DEFAULT_REPLICATIONS
    from .verdict.judge import parse_claims, parse_equivalence

    if calibration is None:
        calibration = DEFAULT_REPLICATIONS
    if isinstance(calibration, bool) or not isinstance(calibration, int) or not 0 <= calibration <= MAX_CALIBRATION:
        raise OptionError(f"calibration: expected a whole number from 0 to {MAX_CALIBRATION:,}, found "
                          f"{calibration!r}; try {DEFAULT_REPLICATIONS} (0 turns the size check off)")
    names = tuple(factors) if isinstance(factors, (tuple, list)) and len(factors) == 2 else ("A", "B")
    return parse_claims(claim, factors=names), calibration, parse_equivalence(equivalence)


def _assemble(fit, design, *, mode, source, resamples, seed, diagnostics, methods, figures, progress,
              claim=None, calibration=None, equivalence=None, timestamp=True, exact_resamples=False) -> Findings:
    """Run the later stages on a fit and collect everything into Findings."""
    from .methods import new_seed, run_methods

    diags: tuple = ()
    meths: tuple = ()
    if diagnostics:
        from .diagnostics import run_diagnostics

        diags = run_diagnostics(fit)
    prov = _provenance(*source)
    if not timestamp:
        prov.pop("timestamp", None)
    if seed is None and ((methods and resamples and fit.has_data) or (methods and calibration)):
        seed = new_seed()
    if methods:
        meths = run_methods(fit, resamples=resamples, seed=seed, progress=progress,
                            exact_resamples=bool(exact_resamples))
        prov["resamples"] = resamples
        prov["exact_resamples"] = bool(exact_resamples)
    prov["seed"] = seed
    calib = None
    judgement = None
    if methods:
        from .verdict.calibration import size_check
        from .verdict.judge import judge

        if calibration:
            calib = size_check(fit, alpha=fit.alpha, replications=calibration, seed=seed)
        prov["calibration_replications"] = calibration
        judgement = judge(fit, diagnostics=diags, methods=meths, claims=claim or (), calibration=calib,
                          equivalence=equivalence)
    fig = None
    if figures:
        from .diagnostics.plotdata import figure_data

        fig = figure_data(fit, diags)
    return Findings(
        mode=mode,
        alpha=fit.alpha,
        response=fit.cells.response,
        factors=fit.cells.factors,
        design=design,
        cells=fit.cells,
        anova=fit.anova,
        diagnostics=diags,
        methods=meths,
        fragility=_fragility_block(diags),
        provenance=prov,
        figure_data=fig,
        judgement=judgement,
        calibration=calib,
    )


def check_summary(
    table,
    *,
    factors: tuple[str, str],
    mean: str = "mean",
    sd: str = "sd",
    n: str = "n",
    response: str = "y",
    alpha: float = 0.05,
    diagnostics: bool = True,
    methods: bool = True,
    figures: bool = False,
    claim=None,
    calibration: int | None = None,
    equivalence=None,
    seed: int | None = None,
    timestamp: bool = True,
) -> Findings:
    """Audit from a table of cell means, SDs and sizes (one row per cell).

    The classical ANOVA of every SS type is exact from these sufficient
    statistics; checks that need the raw observations are not run.

    Parameters
    ----------
    table : pandas.DataFrame
        One row per cell with the two factor columns and ``mean``, ``sd``, ``n``.
    factors : (str, str)
    mean, sd, n : str
        Column names of the cell means, SDs (ddof 1) and sizes.
    response : str
        Name to show for the response.
    alpha : float, default 0.05
    diagnostics, methods, figures : bool
        As in :func:`check`; only what cell statistics support is computed
        (the others say they need the raw data).
    claim, calibration, equivalence, seed, timestamp : optional
        As in :func:`check` (the size check uses normal errors here).

    Returns
    -------
    Findings
    """
    alpha = check_alpha(alpha)
    seed = check_seed(seed)
    claim, calibration, equivalence = _verdict_options(claim, calibration, equivalence, factors)
    cells = cells_from_summary(table, factors=tuple(factors), mean=mean, sd=sd, n=n, response=response)
    fit = fit_cells(cells, alpha=alpha)
    design = describe_design(cells, dropped={"total": 0, "note": "summary table: rows dropped are unknown"})
    return _assemble(fit, design, mode="summary", source=(None, None), resamples=0, seed=seed,
                     diagnostics=diagnostics, methods=methods, figures=figures, progress=None,
                     claim=claim, calibration=calibration, equivalence=equivalence, timestamp=timestamp)
