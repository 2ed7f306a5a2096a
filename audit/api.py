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

__all__ = ["check", "check_summary"]


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
        Resamples for each permutation / bootstrap method (0 skips them).
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
    obs = load(data, response=response, factors=factors, levels=levels, order=order, unit=unit,
               sheet=sheet, encoding=encoding, decimal=decimal)
    fit = fit_observations(obs, alpha=alpha)
    design = describe_design(
        fit.cells, dropped=obs.dropped.to_dict(obs.levels_a, obs.levels_b), centring=obs.centring
    )
    design = dataclasses.replace(design, notes=(*obs.notes, *design.notes)) if obs.notes else design
    return _assemble(fit, design, mode="data", source=(obs.source.path, obs.source.sha256),
                     resamples=resamples, seed=seed, diagnostics=diagnostics, methods=methods,
                     figures=figures, progress=progress)


def _fragility_block(diags: tuple[Diagnostic, ...]) -> dict | None:
    for d in diags:
        if d.id == "fragility" and d.values.get("available", True):
            v = d.values
            return {"deletions_to_flip": v.get("deletions_to_flip"), "rows": v.get("rows", []),
                    "max_steps": v.get("max_steps"), "stopped": v.get("stopped")}
    return None


def _assemble(fit, design, *, mode, source, resamples, seed, diagnostics, methods, figures, progress) -> Findings:
    """Run the later stages on a fit and collect everything into Findings."""
    from .methods import new_seed, run_methods

    diags: tuple = ()
    meths: tuple = ()
    if diagnostics:
        from .diagnostics import run_diagnostics

        diags = run_diagnostics(fit)
    prov = _provenance(*source)
    if methods:
        if seed is None and resamples and fit.has_data:
            seed = new_seed()
        meths = run_methods(fit, resamples=resamples, seed=seed, progress=progress)
        prov["resamples"] = resamples
        prov["seed"] = seed
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

    Returns
    -------
    Findings
    """
    alpha = check_alpha(alpha)
    cells = cells_from_summary(table, factors=tuple(factors), mean=mean, sd=sd, n=n, response=response)
    fit = fit_cells(cells, alpha=alpha)
    design = describe_design(cells, dropped={"total": 0, "note": "summary table: rows dropped are unknown"})
    return _assemble(fit, design, mode="summary", source=(None, None), resamples=0, seed=None,
                     diagnostics=diagnostics, methods=methods, figures=figures, progress=None)
