"""The public entry points: :func:`check` (raw data) and :func:`check_summary`
(a table of cell means, SDs and sizes).  Both run the same engine:

intake -> design -> core fit -> diagnostics and alternative methods -> (verdict)
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import math
import os
import platform
import sys

from . import __version__
from .design import cells_from_summary, describe_design
from .facts import FragilityFacts
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
    engine: str | None = None,
    spark_master: str | None = None,
    sample_per_cell: int | None = None,
    exact_resamples: bool = False,
    on_figure_data=None,
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
        to fix a level order; every level must be listed once.  Default:
        numeric when every level is a number with the same unit text around it
        (``4h, 12h, 16h``), else first appearance; the order used is recorded in
        ``design.level_order``.
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
    engine : {'auto', 'memory', 'duckdb', 'spark'}, optional
        Where the data are read: in memory, or by an SQL engine that returns
        per-cell moments and a seeded sample (``mode`` 'moments', see
        :mod:`audit.engines`).  Default 'auto': DuckDB for globs, lists of
        files and files above :data:`audit.engines.AUTO_ENGINE_BYTES`, else
        memory.  With spark, ``data`` is a table name or a path.
    spark_master : str, optional
        Spark master URL (e.g. 'local[2]'); default: the active session or the
        session's defaults.
    sample_per_cell : int, optional
        Rows per cell in the engine's seeded sample (default 2000).
    exact_resamples : bool, default False
        Draw all ``resamples`` for every resampling method instead of stopping each
        as soon as its decision at alpha is settled (sequential rule, resampling
        risk 1e-3; see :mod:`audit.methods.resampling`).
    on_figure_data : callable, optional
        With ``figures=True``: called with the figure data as parts of it become
        ready, so that figures can be drawn while the audit runs: first with the
        plots of the fitted model alone (``response``, ``alpha``, ``row_kind``,
        ``cell_means``, ``spread``, ``sd_n``), then with those of the checks
        added (``qq``, ``loo``, ``boxcox``), last with all of it (the dict in
        ``Findings.figure_data``).  The command line's ``--report`` uses it.

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
    if on_figure_data is not None and not callable(on_figure_data):
        from .errors import OptionError
        raise OptionError(f"on_figure_data: expected a function or None, found {type(on_figure_data).__name__}; "
                          "pass a function that takes one dict")
    claim, calibration, equivalence = _verdict_options(claim, calibration, equivalence, factors)
    from .engines import choose_engine

    chosen = choose_engine(data, engine)
    if chosen != "memory":
        return _check_engine(data, chosen, spark_master=spark_master, sample_per_cell=sample_per_cell,
                             sheet=sheet, encoding=encoding, decimal=decimal,
                             response=response, factors=factors, levels=levels, order=order, unit=unit,
                             alpha=alpha, resamples=resamples, seed=seed, diagnostics=diagnostics, methods=methods,
                             figures=figures, progress=progress, claim=claim, calibration=calibration,
                             equivalence=equivalence, timestamp=timestamp)
    obs = load(data, response=response, factors=factors, levels=levels, order=order, unit=unit,
               sheet=sheet, encoding=encoding, decimal=decimal)
    _refuse_cell_table(data, obs, sheet=sheet, encoding=encoding)
    fit = fit_observations(obs, alpha=alpha)
    design = describe_design(
        fit.cells, dropped=obs.dropped.to_dict(obs.levels_a, obs.levels_b), centring=obs.centring,
        level_order=obs.level_order,
    )
    design = dataclasses.replace(design, notes=(*obs.notes, *design.notes)) if obs.notes else design
    return _assemble(fit, design, mode="data", source=(obs.source.path, obs.source.sha256),
                     claim=claim, calibration=calibration, equivalence=equivalence, timestamp=timestamp,
                     resamples=resamples, seed=seed, diagnostics=diagnostics, methods=methods,
                     figures=figures, progress=progress, exact_resamples=exact_resamples,
                     on_figure_data=on_figure_data)


def _check_engine(data, engine, *, spark_master, sample_per_cell, response, factors, levels, order, unit, alpha,
                  resamples, seed, diagnostics, methods, figures, progress, claim, calibration, equivalence,
                  timestamp, sheet=None, encoding=None, decimal=None) -> Findings:
    """The engine path: per-cell moments and a seeded sample (audit/engines)."""
    from .engines import open_backend
    from .engines.audit import findings_from_scan
    from .engines.scan import DEFAULT_SAMPLE_PER_CELL, run_scan
    from .errors import OptionError
    from .methods import new_seed

    for name, val in (("order", order), ("unit", unit)):
        if val is not None:
            raise OptionError(f"{name}: not available with engine {engine}; the independence checks need every "
                              f"row in order; drop --{name} or use --engine memory")
    k = DEFAULT_SAMPLE_PER_CELL if sample_per_cell is None else sample_per_cell
    if isinstance(k, bool) or not isinstance(k, int) or k < 10:
        raise OptionError(f"sample_per_cell: expected a whole number >= 10, found {k!r}; try {DEFAULT_SAMPLE_PER_CELL}")
    from .intake import check_decimal, check_factors_option, check_levels_option

    # the in-memory intake's option checks, in its order (the engine then reads by its rules)
    factors = check_factors_option(factors)
    check_levels_option(levels)
    check_decimal(decimal)
    seed = new_seed() if seed is None else seed
    backend = open_backend(engine, data, spark_master=spark_master, encoding=encoding, sheet=sheet)
    try:
        scan = run_scan(backend, response=response, factors=tuple(factors), levels=levels, sample_per_cell=k,
                        seed=seed, progress=progress is not False, decimal=decimal)
        columns = backend.columns()
    finally:
        backend.close()
    counts = scan.moments.cells.counts
    _refuse_cells(counts, lambda: columns, factors=tuple(factors),
                  path=os.fspath(data) if isinstance(data, (str, os.PathLike)) else None, response=response)
    src = data if isinstance(data, str) else (", ".join(map(str, data)) if isinstance(data, (list, tuple)) else str(data))
    return findings_from_scan(scan, alpha=alpha, resamples=resamples, seed=seed, diagnostics=diagnostics,
                              methods=methods, figures=figures, progress=progress, claim=claim,
                              calibration=calibration, equivalence=equivalence, timestamp=timestamp,
                              source_path=src)


def _refuse_cell_table(data, obs, *, sheet, encoding) -> None:
    """Stop when a dataset given to :func:`check` is a table of cell statistics
    (one row per cell and columns named like mean / sd / se / n): auditing its
    means as raw observations would be wrong."""
    import numpy as np

    def columns():
        if isinstance(data, (str, os.PathLike)):
            from .intake import read_table

            return list(read_table(data, sheet=sheet, encoding=encoding)[0].columns)
        return list(data.columns)

    _refuse_cells(np.bincount(obs.cell, minlength=obs.J * obs.K), columns, factors=obs.factors,
                  path=os.fspath(data) if isinstance(data, (str, os.PathLike)) else None, response=obs.response)


def _refuse_cells(counts, columns, *, factors, path, response) -> None:
    """The refusal itself, for both paths: one observation in every cell and column names like
    those of a cell table (``columns``: a callable, so the names are read only when needed)."""
    if not (counts == 1).all():
        return
    from .errors import ColumnError
    from .summary import cell_table_hint

    hint = cell_table_hint(columns(), factors=factors, path=path, response=response)
    if hint:
        raise ColumnError(hint)


def _fragility_block(diags: tuple[Diagnostic, ...]) -> dict | None:
    """The top-level ``fragility`` block of the JSON, from the fragility check's typed facts."""
    for d in diags:
        if isinstance(d.facts, FragilityFacts):
            f = d.facts
            return {"deletions_to_flip": f.deletions_to_flip, "rows": list(f.rows), "max_steps": f.max_steps,
                    "stopped": f.stopped}
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
              claim=None, calibration=None, equivalence=None, timestamp=True, extra_diagnostics=(),
              exact_resamples=False, on_figure_data=None) -> Findings:
    """Run the later stages on a fit and collect everything into Findings."""
    from .methods import new_seed, run_methods

    model_part = None
    if figures and on_figure_data is not None:
        from .diagnostics.plotdata import model_figure_data

        model_part = model_figure_data(fit)
        on_figure_data(dict(model_part))
    diags: tuple = ()
    meths: tuple = ()
    if diagnostics:
        from .diagnostics import run_diagnostics

        diags = run_diagnostics(fit) + tuple(extra_diagnostics)
    diagnostic_part = None
    if model_part is not None:
        from .diagnostics.plotdata import diagnostic_figure_data

        diagnostic_part = diagnostic_figure_data(fit, diags)
        on_figure_data({**model_part, **diagnostic_part})
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

        fig = figure_data(fit, diags, methods=meths, judgement=judgement, model_part=model_part,
                          diagnostic_part=diagnostic_part)
        if on_figure_data is not None:
            on_figure_data(fig)
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


def _scale_options(items, lo, hi):
    """Check the scale options of the granularity checks at the edge."""
    from .errors import OptionError

    if items is None:
        if lo is not None or hi is not None:
            raise OptionError("scale_items: the scale's bounds were given without the number of integer items "
                              "averaged into each score; add --scale-items L (API scale_items=), e.g. 1")
        return None, None, None
    if isinstance(items, bool) or not isinstance(items, int) or not 1 <= items <= 10_000:
        raise OptionError(f"scale_items: expected a whole number of items from 1 to 10,000, found {items!r}")
    if (lo is None) != (hi is None):
        raise OptionError("scale_min/scale_max: give both ends of the item scale (--scale-min MIN --scale-max MAX) "
                          "or neither")
    if lo is not None:
        try:
            lo, hi = float(lo), float(hi)
        except (TypeError, ValueError):
            raise OptionError(f"scale_min/scale_max: expected numbers, found {lo!r} and {hi!r}") from None
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise OptionError(f"scale_min/scale_max: expected finite numbers with min < max, found {lo!r} and "
                              f"{hi!r}; e.g. --scale-min 1 --scale-max 7")
    return items, lo, hi


def _reconciliation_diagnostic(judgement) -> Diagnostic | None:
    """Every stated test's reconciliation checks as one graded finding (summary mode)."""
    from .results import SEVERITIES

    if judgement is None:
        return None
    recs = [c for c in judgement.claims if c.reconciliation is not None and c.reconciliation.checks]
    if not recs:
        return None
    worst = "clear"
    items = []
    for c in recs:
        r = c.reconciliation
        for ch in r.checks:
            if SEVERITIES.index(ch.severity) > SEVERITIES.index(worst):
                worst = ch.severity
            items.append({"effect": c.effect, "claim": c.claim.text, **ch.to_dict()})
    lines = [f"{c.effect}: {c.reconciliation.message.rstrip('.')}" for c in recs]
    values = {"checks": items,
              "claims": [{"effect": c.effect, "claim": c.claim.text, "reproduced": c.reconciliation.reproduced,
                          "reproducing_types": list(c.reconciliation.reproducing_types),
                          "implied_n": c.reconciliation.implied_n} for c in recs]}
    return Diagnostic(id="reconciliation", severity=worst, summary="Reconciliation: " + "; ".join(lines) + ".",
                      values=values)


def check_summary(
    table,
    *,
    factors: tuple[str, str],
    mean: str = "mean",
    sd: str | None = None,
    se: str | None = None,
    n: str = "n",
    response: str = "y",
    alpha: float = 0.05,
    sheet: str | int | None = None,
    encoding: str | None = None,
    decimal: str | None = None,
    decimals=None,
    scale_items: int | None = None,
    scale_min: float | None = None,
    scale_max: float | None = None,
    diagnostics: bool = True,
    methods: bool = True,
    figures: bool = False,
    claim=None,
    calibration: int | None = None,
    equivalence=None,
    seed: int | None = None,
    timestamp: bool = True,
) -> Findings:
    """Audit from a table of cell means, SDs (or SEs) and sizes, one row per cell:
    a manuscript's table, reviewed without the raw data.

    The classical ANOVA of every SS type, Welch-James, HC3/HC4, SD ratios and
    their pairing with the cell sizes and balance are exact from these
    sufficient statistics (identical to :func:`check` on the same data).  The
    size check of the verdict simulates normal errors with the table's cell
    sizes and SDs.  Checks that need the raw observations are 'not-run' and
    listed in the JSON's ``not_run``.  Added in summary mode: ``rounding`` (the
    interaction F and p over every table that rounds to the reported one; the
    counterpart of fragility), ``granularity`` (GRIM/GRIMMER with a scale) and,
    with stated tests, ``reconciliation``.

    Parameters
    ----------
    table : str, path or pandas.DataFrame
        One row per cell with the two factor columns, a mean, an SD or SE and
        a size column (.csv/.tsv/.txt, .xlsx, .parquet, or a DataFrame).
    factors : (str, str)
    mean, n : str
        Columns of the cell means and sizes.
    sd, se : str, optional
        Column of the SDs (ddof 1) or of the standard errors of the means
        (SD = SE * sqrt(n)); one of them (default ``sd='sd'``).
    response : str
        Name to show for the response.
    alpha : float, default 0.05
    sheet, encoding, decimal : optional
        As in :func:`check`.
    decimals : int or dict, optional
        Reported decimals of the mean and SD/SE columns ({column: int}, or one
        int for both).  Default: counted in the file's text; for a workbook,
        Parquet file or DataFrame, from the shortest repr of the stored floats
        (trailing zeros are lost there).
    scale_items, scale_min, scale_max : optional
        When each response is the mean of ``scale_items`` integer items on a
        scale from ``scale_min`` to ``scale_max``: GRIM, GRIMMER and range checks.
    diagnostics, methods, figures : bool
        As in :func:`check`; only what cell statistics support is computed
        (the others are 'not-run').
    claim, calibration, equivalence, seed, timestamp : optional
        As in :func:`check` (the size check uses normal errors here).

    Returns
    -------
    Findings
        ``mode`` 'summary'.
    """
    from .summary import read_summary

    alpha = check_alpha(alpha)
    seed = check_seed(seed)
    claim, calibration, equivalence = _verdict_options(claim, calibration, equivalence, factors)
    scale_items, scale_min, scale_max = _scale_options(scale_items, scale_min, scale_max)
    tab = read_summary(table, factors=factors, mean=mean, sd=sd, se=se, n=n, response=response, sheet=sheet,
                       encoding=encoding, decimal=decimal, decimals=decimals)
    cells = tab.cells
    fit = fit_cells(cells, alpha=alpha)
    design = describe_design(cells, dropped={"total": 0, "note": "summary table: rows dropped are unknown"})
    if tab.notes:
        design = dataclasses.replace(design, notes=(*tab.notes, *design.notes))
    extra: tuple = ()
    if diagnostics:
        from .diagnostics.granularity import granularity
        from .diagnostics.rounding import rounding

        extra = (rounding(fit, mean_half=tab.half_units()[0], sd_low=_sd_bounds(tab, -1), sd_high=_sd_bounds(tab, 1),
                          decimals=dict(tab.decimals), decimals_source=tab.decimals_source),
                 granularity(tab, items=scale_items, scale_min=scale_min, scale_max=scale_max))
    out = _assemble(fit, design, mode="summary", source=(tab.path, tab.sha256), resamples=0, seed=seed,
                    diagnostics=diagnostics, methods=methods, figures=figures, progress=None,
                    claim=claim, calibration=calibration, equivalence=equivalence, timestamp=timestamp,
                    extra_diagnostics=extra)
    recon = _reconciliation_diagnostic(out.judgement)
    diags = out.diagnostics + ((recon,) if recon is not None else ())
    return dataclasses.replace(out, diagnostics=diags, summary_input=tab.to_dict())


def _sd_bounds(tab, side: int):
    """Each cell's SD at the low (side -1) or high (+1) end of its rounding interval."""
    import numpy as np

    h = tab.half_units()[1]
    v = np.asarray(tab.spread_values, dtype=float)
    if h is None:
        e = v
    else:
        e = np.maximum(v + side * h, 0.0)
    if tab.spread == "se":
        e = e * np.sqrt(np.asarray(tab.cells.counts, dtype=float))
    return e
