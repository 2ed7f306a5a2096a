"""Command-line interface: parses arguments and calls the public API, nothing more.

Bad input (a typed :class:`~audit.errors.AuditInputError`, a bad option, an
unsafe output path) is printed as one line on stderr with exit status 2, never a
traceback; user strings in it are shown with control characters escaped.
Ctrl-C (SIGINT) prints one line and exits 130, SIGTERM exits 143; temporary
files are removed and the previous report folder is left whole.  Running out
of memory prints one line and exits 2.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import signal
import sys
import threading
import warnings

from .errors import OutputError

__all__ = ["main", "build_parser"]

PROG = "twoway-audit"


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2
        from .render.text import sanitize

        if "--factors" in message and "expected 2 argument" in message:
            message += "; give two names separated by a space: --factors COL_A COL_B"
        sys.stderr.write(f"{PROG}: error: {sanitize(message)} (see '{PROG} {self._sub or ''} --help')\n"
                         .replace("  ", " "))
        raise SystemExit(2)

    _sub = ""


def _levels(spec: str):
    name, sep, rest = spec.partition("=")
    if not sep or not name or not rest:
        raise argparse.ArgumentTypeError(
            f"expected COLUMN=LEVEL1,LEVEL2,..., found {spec!r}"
        )
    return name, [x.strip() for x in rest.split(",")]


def build_parser() -> argparse.ArgumentParser:
    from . import __version__
    from .options import MAX_RESAMPLES

    p = _Parser(prog=PROG, description="Audit the interaction test of a two-way factorial experiment.")
    p.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    c = sub.add_parser("check", help="audit a long-format dataset (one row per observation)",
                       description="Audit a long-format dataset: design, classical ANOVA of every SS type, "
                                   "and the findings JSON.")
    c._sub = "check"
    c.add_argument("data", metavar="DATA", help="data file: .csv, .tsv, .txt, .xlsx or .parquet")
    c.add_argument("--response", required=True, metavar="COL", help="numeric response column")
    c.add_argument("--factors", required=True, nargs=2, metavar=("COL_A", "COL_B"),
                   help="the two factor columns (always treated as categorical)")
    c.add_argument("--alpha", type=float, default=0.05, help="significance level (default 0.05)")
    c.add_argument("--levels", action="append", type=_levels, default=[], metavar="COL=L1,L2,...",
                   help="level order for a factor (repeatable; default: numeric for levels such as 4h, 12h, "
                        "else order of first appearance)")
    c.add_argument("--order", metavar="COL", help="run-order column (independence checks)")
    c.add_argument("--unit", metavar="COL", help="experimental-unit column (pseudo-replication check)")
    c.add_argument("--sheet", metavar="NAME|NUMBER", help="sheet of an .xlsx workbook (needed when it has several)")
    c.add_argument("--encoding", metavar="CODEC", help="text encoding, e.g. latin-1 (default: UTF-8 or UTF-16 with BOM)")
    c.add_argument("--decimal", metavar="MARK", help="decimal mark of the numbers: . (default) or ,")
    c.add_argument("--resamples", type=int, default=9999, metavar="B",
                   help="largest number of resamples for each permutation/bootstrap method, each stopping once its "
                        "decision is settled (default 9999; 0 skips them; "
                        f"at most {MAX_RESAMPLES:,})")
    c.add_argument("--exact-resamples", action="store_true",
                   help="draw all B resamples for every resampling method (default: each stops as soon as "
                        "its decision at alpha is settled, with resampling risk at most 0.001)")
    c.add_argument("--seed", type=int, metavar="N", default=None,
                   help="seed of the resampling methods, 0 <= N < 2**63 (default: a fresh one, printed in "
                        "the findings)")
    c.add_argument("--claim", action="append", default=[], metavar="TEXT",
                   help="the reported result to judge, e.g. 'F(2, 54) = 4.11, p = .022', 'A: F(1, 54) = 15.6, "
                        "p < .001', 'present' or 'absent' (repeatable, one per effect; unlabelled means the "
                        "interaction; default: the classical F's decision)")
    c.add_argument("--calibration", type=int, default=None, metavar="R",
                   help="replications of the size check on null data shaped like yours (default 2000; 0 off)")
    c.add_argument("--equivalence", metavar="BOUND",
                   help="also test that the interaction is smaller than BOUND (RMS interaction term in "
                        "response units, or eta2=X)")
    c.add_argument("--engine", choices=("auto", "memory", "duckdb", "spark"), default="auto",
                   help="where the data are read: memory, duckdb (Parquet/CSV files or globs, out of core) or spark "
                        "(a table name or a path); auto: duckdb for globs and files above 256 MiB")
    c.add_argument("--spark-master", metavar="URL", help="Spark master for --engine spark, e.g. local[2] "
                   "(default: the session's defaults)")
    c.add_argument("--sample-per-cell", type=int, default=None, metavar="N",
                   help="rows per cell in the engine's seeded sample for the row-based checks (default 2000)")
    c.add_argument("--strict", action="store_true", help="exit 1 for 'holds with caveats' too")
    c.add_argument("--no-timestamp", action="store_true",
                   help="leave the time of the run out of the findings (byte-identical reruns)")
    c.add_argument("--no-diagnostics", action="store_true", help="skip the assumption and design checks")
    c.add_argument("--no-methods", action="store_true", help="skip the alternative methods (and the verdict)")
    c.add_argument("--json", metavar="PATH", help="write the findings JSON to PATH ('-' for stdout only); never onto the input file")
    c.add_argument("--report", metavar="DIR", help="write report.html, report.md, report.txt, findings.json and the figures "
                        "into DIR, replaced as a whole (DIR must be new, empty or an earlier report)")
    c.add_argument("--full", action="store_true", help="print the whole text report (report.txt) instead of the summary")
    _add_figure_format(c)
    d = sub.add_parser("demo", help="run the full audit on bundled invented datasets, one per verdict",
                       description="Run the full audit on the bundled invented datasets, each built to show one "
                                   "verdict; exit 0 when every dataset gets the verdict it was built to show.")
    d._sub = "demo"
    d.add_argument("--report", metavar="DIR", help="also write one report folder per dataset under DIR")
    _add_figure_format(d)
    _add_run_parser(sub)
    _add_check_summary(sub)
    return p


def _add_figure_format(p) -> None:
    p.add_argument("--figure-format", choices=("svg", "png"), default="svg",
                   help="file format of the report's figures: svg (vector, default) or png (raster)")


def _start_figure_workers(args):
    """Figure-drawing processes, started before the heavy imports when a report is asked
    for (their start-up overlaps the audit); a no-op context otherwise."""
    import contextlib

    if not getattr(args, "report", None):
        return contextlib.nullcontext()
    from .render.workers import FigureWorkers

    return FigureWorkers(args.figure_format)


def _add_run_parser(sub) -> None:
    r = sub.add_parser("run", help="run the audits declared in pyproject.toml [tool.twoway-audit] or a TOML file",
                       description="Run every audit declared in a configuration file; exit 0 when none fails, "
                                   "1 when any fails, 2 for a configuration error.")
    r._sub = "run"
    r.add_argument("config", metavar="CONFIG", nargs="?", default=None,
                   help="a TOML file of [[audit]] tables, a pyproject.toml, or a folder holding one "
                        "(default: ./pyproject.toml with a [tool.twoway-audit] table)")
    r.add_argument("--junit", metavar="PATH", help="write a JUnit XML file (one test case per audit)")
    r.add_argument("--markdown", metavar="PATH", help="write a Markdown summary (a table fit for a pull-request comment)")
    r.add_argument("--json", metavar="PATH", help="write every audit's findings JSON, keyed by audit name")
    r.add_argument("--jobs", type=int, default=1, metavar="N", help="run audits in N processes (default 1; at most the cores available and the number "
                        "of audits, with a note when lowered)")
    r.add_argument("--cache", metavar="DIR", help="store findings in DIR and reuse them while the input, settings "
                                                  "and versions are unchanged")


def _add_check_summary(sub) -> None:
    s = sub.add_parser("check-summary", help="audit a table of cell statistics (a manuscript's means, SDs, ns)",
                       description="Audit a table of cell means, SDs (or SEs) and sizes, one row per cell, without "
                                   "the raw data: the ANOVA of every SS type, Welch-James, HC3/HC4, rounding "
                                   "sensitivity, reconciliation of reported tests, GRIM/GRIMMER, and the verdict.")
    s._sub = "check-summary"
    s.add_argument("data", metavar="TABLE", help="table file: .csv, .tsv, .txt, .xlsx or .parquet, one row per cell")
    s.add_argument("--factors", required=True, nargs=2, metavar=("COL_A", "COL_B"), help="the two factor columns")
    s.add_argument("--mean", required=True, metavar="COL", help="column of the cell means")
    spread = s.add_mutually_exclusive_group(required=True)
    spread.add_argument("--sd", metavar="COL", help="column of the cell SDs")
    spread.add_argument("--se", metavar="COL", help="column of the standard errors of the cell means (SD = SE*sqrt(n))")
    s.add_argument("--n", required=True, metavar="COL", help="column of the cell sizes")
    s.add_argument("--response", default="y", metavar="NAME", help="name to show for the response (default y)")
    s.add_argument("--alpha", type=float, default=0.05, help="significance level (default 0.05)")
    s.add_argument("--decimals", type=int, metavar="D",
                   help="decimals the table printed its means and SDs with (default: counted in the file)")
    s.add_argument("--scale-items", type=int, metavar="L",
                   help="each response is the mean of L integer items: run GRIM and GRIMMER")
    s.add_argument("--scale-min", type=float, metavar="MIN", help="smallest item response (with --scale-max)")
    s.add_argument("--scale-max", type=float, metavar="MAX", help="largest item response (with --scale-min)")
    s.add_argument("--sheet", metavar="NAME|NUMBER", help="sheet of an .xlsx workbook (needed when it has several)")
    s.add_argument("--encoding", metavar="CODEC", help="text encoding, e.g. latin-1")
    s.add_argument("--decimal", metavar="MARK", help="decimal mark of the numbers: . (default) or ,")
    s.add_argument("--claim", action="append", default=[], metavar="TEXT",
                   help="a reported test to reconcile and judge, e.g. 'F(2, 54) = 4.11, p = .022' or "
                        "'A: F(1, 54) = 15.6, p < .001' (repeatable, one per effect; unlabelled: the interaction)")
    s.add_argument("--calibration", type=int, default=None, metavar="R",
                   help="replications of the size check, simulated with normal errors (default 2000; 0 off)")
    s.add_argument("--equivalence", metavar="BOUND", help="also test that the interaction is smaller than BOUND")
    s.add_argument("--seed", type=int, metavar="N", default=None, help="seed of the size check")
    s.add_argument("--strict", action="store_true", help="exit 1 for 'holds with caveats' too")
    s.add_argument("--no-timestamp", action="store_true", help="leave the time of the run out of the findings")
    s.add_argument("--json", metavar="PATH", help="write the findings JSON to PATH ('-' for stdout only)")
    s.add_argument("--report", metavar="DIR", help="write report.html, report.md, report.txt, findings.json and the "
                                                   "figures into DIR")
    s.add_argument("--full", action="store_true", help="print the whole text report instead of the summary")
    _add_figure_format(s)


def _compute_summary(args):
    from .api import check_summary

    return check_summary(
        args.data, factors=tuple(args.factors), mean=args.mean, sd=args.sd, se=args.se, n=args.n,
        response=args.response, alpha=args.alpha, sheet=args.sheet, encoding=args.encoding,
        decimal=args.decimal, decimals=args.decimals, scale_items=args.scale_items, scale_min=args.scale_min,
        scale_max=args.scale_max, figures=bool(args.report), claim=args.claim or None,
        calibration=args.calibration, equivalence=args.equivalence, seed=args.seed,
        timestamp=not args.no_timestamp)


REPORT_TEXT = "report.txt"
REPORT_MARKDOWN = "report.md"
REPORT_HTML = "report.html"
REPORT_JSON = "findings.json"
#: the files a report folder holds besides the figures
REPORT_NAMES = (REPORT_TEXT, REPORT_MARKDOWN, REPORT_HTML, REPORT_JSON)

_SIGNAL_EXIT = {signal.SIGINT: 130, signal.SIGTERM: 143}


class _Stopped(BaseException):
    """Raised by the signal handler (SIGINT or SIGTERM) so that clean-up runs."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


def _on_signal(signum, frame):
    for s in _SIGNAL_EXIT:  # a second signal must not cut the clean-up short
        signal.signal(s, signal.SIG_IGN)
    raise _Stopped(signum)


def _clean(text) -> str:
    from .render.text import sanitize

    return sanitize(str(text))



def _fail(message: str) -> int:
    sys.stdout.flush()
    sys.stderr.write(f"{PROG}: error: {_clean(message)}\n")
    return 2


def _report_known() -> set[str]:
    """The file names a report folder may hold (an earlier report is replaced as a whole)."""
    from .render.figures import ALL_FIGURE_FILES

    return {*REPORT_NAMES, *ALL_FIGURE_FILES}


def _write_report(folder, findings, js: bytes, *, known, written: list, json_name=None, figure_format="svg",
                  workers=None):
    """Write one report folder (report.html, report.md, report.txt, findings.json and the
    figures), replaced as a whole; returns the report model."""
    from ._io import replace_folder
    from .report.files import write_report_files

    model = None

    def build(tmp: str) -> list[str]:
        nonlocal model
        model, names = write_report_files(findings, tmp, report_dir=folder, figure_format=figure_format,
                                          workers=workers)
        with open(os.path.join(tmp, REPORT_JSON), "wb") as fh:
            fh.write(js)
        names.insert(3, REPORT_JSON)
        if json_name is not None and json_name not in names:
            with open(os.path.join(tmp, json_name), "wb") as fh:
                fh.write(js)
            names.append(json_name)
        return names

    replace_folder(folder, build, known=known, on_done=lambda: written.append(f"report folder {folder!r}"))
    return model


def _run_demo(args, written: list) -> int:
    """The full audit on the bundled invented datasets (see :mod:`audit.demo`)."""
    from ._io import check_folder_target
    from .demo import DEMO_DATASETS

    known = _report_known()
    if args.report:
        for ds in DEMO_DATASETS:  # every target is checked before any audit runs
            check_folder_target(os.path.join(args.report, ds.name), known=known)
    with _start_figure_workers(args) as workers:
        return _demo_loop(args, written, known, workers)


def _demo_loop(args, written: list, known, workers) -> int:
    import textwrap

    from .demo import DEMO_DATASETS, DEMO_RESAMPLES, DEMO_SEED, run_demo, terminal_lines

    out = sys.stdout
    out.write(f"twoway-audit demo: the full audit on {len(DEMO_DATASETS)} invented datasets, each built to\n"
              f"show one verdict (seed {DEMO_SEED}, {DEMO_RESAMPLES:,} resamples per method)\n")
    rows = []
    for i, res in enumerate(run_demo(figures=bool(args.report)), 1):
        ds, f = res.dataset, res.findings
        out.write(f"\n=== {i}. {ds.file}: built to show '{ds.shows}' ===\n")
        out.write("\n".join(textwrap.wrap(ds.scenario, 78)) + "\n")
        out.write(f"Audit: {ds.response} by {ds.factors[0]} x {ds.factors[1]}\n\n")
        out.write("\n".join(_clean(x) for x in terminal_lines(f)) + "\n")
        out.flush()
        if args.report:
            folder = os.path.join(args.report, ds.name)
            _write_report(folder, f, (f.to_json() + "\n").encode("utf-8"), known=known, written=written,
                          figure_format=args.figure_format, workers=workers)
            out.write(f"Report: {folder}\n")
        rows.append((ds.name, ds.shows, f.verdict or "-", "yes" if res.as_built else "NO"))
    header = ("dataset", "built to show", "verdict obtained", "as built")
    widths = [max(len(r[c]) for r in (header, *rows)) for c in range(4)]
    out.write("\nSummary\n")
    for r in (header, *rows):
        out.write("  ".join(x.ljust(w) for x, w in zip(r, widths)).rstrip() + "\n")
    ok = all(r[3] == "yes" for r in rows)
    out.write("\n" + ("Every dataset got the verdict it was built to show." if ok else
                       "Some datasets did not get the verdict they were built to show.") + "\n")
    out.write("The datasets are invented. An automated audit supports a statistician's\n"
              "judgement; it does not replace it.\n")
    out.flush()
    return 0 if ok else 1


def _run_check(args, written: list, compute=None) -> int:
    from ._io import (MANIFEST, check_file_target, check_folder_target, is_inside, refuse_folder_overlap,
                      refuse_input_overlap, write_file)
    inputs = [args.data]
    known = set(REPORT_NAMES)
    json_name = None  # set when --json names a file directly inside the report folder: written with it
    if args.json and args.json != "-" and args.report:
        if os.path.realpath(os.path.dirname(os.path.abspath(args.json))) == os.path.realpath(args.report):
            json_name = os.path.basename(args.json)
            from .render.figures import ALL_FIGURE_FILES

            if json_name in {REPORT_TEXT, REPORT_MARKDOWN, REPORT_HTML, MANIFEST, *ALL_FIGURE_FILES}:
                raise OutputError(f"--json {args.json!r} is a file the report folder itself holds; "
                                  f"choose another name (the folder has its own {REPORT_JSON})")
            known.add(json_name)
    if args.json and args.json != "-" and json_name is None:
        refuse_input_overlap(args.json, inputs, option="--json")
        if args.report:  # found before the audit runs, not when the report is already written
            j, r = os.path.realpath(args.json), os.path.realpath(args.report)
            if is_inside(j, r):
                where = "the --report folder" if j == r else "in a sub-folder of the --report folder"
                raise OutputError(f"--json {args.json!r} is {where} {args.report!r}; give a file beside the "
                                  f"report or directly in its folder (the folder has its own {REPORT_JSON})")
        check_file_target(args.json)
    if args.report:
        known |= _report_known()
        refuse_input_overlap(args.report, inputs, option="--report")
        refuse_folder_overlap(args.report, inputs)
        check_folder_target(args.report, known=known)

    with _start_figure_workers(args) as workers:
        return _check_and_write(args, written, compute, inputs=inputs, known=known, json_name=json_name,
                                workers=workers)


def _check_and_write(args, written: list, compute, *, inputs, known, json_name, workers) -> int:
    from ._io import refuse_input_overlap, write_file
    from .api import check  # the heavy imports only after the output paths passed

    with warnings.catch_warnings():
        # floating-point RuntimeWarnings from numpy/scipy inside a run are not messages for the
        # user (results carry their own notes); scoped to this run, library callers still see them
        warnings.filterwarnings("ignore", category=RuntimeWarning)
        findings = compute(args) if compute is not None else check(
            args.data, response=args.response, factors=tuple(args.factors), alpha=args.alpha,
            levels=args.levels or None, order=args.order, unit=args.unit,
            sheet=args.sheet, encoding=args.encoding, decimal=args.decimal,
            resamples=args.resamples, seed=args.seed, diagnostics=not args.no_diagnostics,
            methods=not args.no_methods, figures=bool(args.report), progress=sys.stderr.isatty(),
            claim=args.claim or None, calibration=args.calibration, equivalence=args.equivalence,
            timestamp=not args.no_timestamp, engine=args.engine, spark_master=args.spark_master,
            sample_per_cell=args.sample_per_cell, exact_resamples=args.exact_resamples,
            on_figure_data=workers.early if getattr(workers, "parallel", False) else None,
        )
    js = (findings.to_json() + "\n").encode("utf-8")
    model = None
    if args.report:
        model = _write_report(args.report, findings, js, known=known, written=written, json_name=json_name,
                              figure_format=args.figure_format, workers=workers)
    else:
        from .report import build_report

        model = build_report(findings)
    if args.json == "-":
        sys.stdout.write(js.decode("utf-8"))
    elif args.full:
        from .render.text import render_report_text

        sys.stdout.write(render_report_text(model))
    else:
        from .render.terminal import render_terminal

        sys.stdout.write(render_terminal(model))
    sys.stdout.flush()
    if args.json and args.json != "-" and json_name is None:
        refuse_input_overlap(args.json, inputs, option="--json")
        write_file(args.json, js, on_done=lambda: written.append(f"findings JSON {args.json!r}"))
    return findings.exit_status(strict=args.strict)


def _run_run(args, written: list) -> int:
    from ._io import check_file_target, refuse_input_overlap, write_file
    from .config import load_config
    from .errors import OptionError

    if args.jobs < 1:
        raise OptionError(f"--jobs: expected a whole number >= 1, found {args.jobs}; try 2")
    config = load_config(args.config, claims=not args.cache)  # with a cache: claims of audits to run, later
    inputs = [config.path, *(a.path for a in config.audits)]
    outputs = [(opt, path) for opt, path in (("--junit", args.junit), ("--markdown", args.markdown),
                                             ("--json", args.json)) if path]
    seen: dict[str, str] = {}
    for opt, path in outputs:
        refuse_input_overlap(path, inputs, option=opt)
        check_file_target(path)
        real = os.path.realpath(path)
        if real in seen:
            raise OptionError(f"{opt} {path!r} is also given to {seen[real]}; give each output its own file")
        seen[real] = opt
    if args.cache:
        if os.path.exists(args.cache) and not os.path.isdir(args.cache):
            raise OutputError(f"--cache {args.cache!r} exists and is not a folder; choose a folder name")
        refuse_input_overlap(args.cache, inputs, option="--cache")
        if os.path.realpath(args.cache) in seen:  # found before any audit runs, not at the end
            raise OptionError(f"--cache {args.cache!r} is also given to {seen[os.path.realpath(args.cache)]}; "
                              "give the cache its own folder")

    from .runner import render_json, render_junit, render_line, render_markdown, run_config, worker_count

    jobs, why = worker_count(args.jobs, len(config.audits))
    if why:
        sys.stderr.write(f"{PROG}: note: --jobs {args.jobs} lowered to {jobs} ({why})\n")
        sys.stderr.flush()

    def show(r):
        sys.stdout.write(render_line(r) + "\n")
        sys.stdout.flush()

    outcome = run_config(config, jobs=jobs, cache=args.cache, on_result=show)
    n = len(outcome.results)
    sys.stdout.write(f"{n} audit{'s' if n != 1 else ''}: {outcome.failures} failed, {outcome.errors} could not run, "
                     f"{n - outcome.failures - outcome.errors} passed\n")
    sys.stdout.flush()
    for r in outcome.results:
        if r.error is not None:
            sys.stderr.write(f"{PROG}: error: {_clean(config.file)}: audit {_clean(repr(r.name))}: {_clean(r.error)}\n")
    for opt, path, render in (("--junit", args.junit, render_junit), ("--markdown", args.markdown, render_markdown),
                              ("--json", args.json, render_json)):
        if path:
            data = render(outcome)
            refuse_input_overlap(path, inputs, option=opt)
            write_file(path, data if isinstance(data, bytes) else data.encode("utf-8"),
                       on_done=lambda opt=opt, path=path: written.append(f"{opt} file {path!r}"))
    return outcome.exit_status()


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit status: 0 the conclusion holds
    (with or without caveats), 1 it is fragile, does not hold or cannot be
    reproduced, 3 it cannot be judged, 2 bad input or output path, 130
    interrupted by Ctrl-C, 143 stopped by SIGTERM."""
    from .errors import AuditInputError

    previous = {}
    if threading.current_thread() is threading.main_thread():
        for s in _SIGNAL_EXIT:
            previous[s] = signal.signal(s, _on_signal)
    written: list[str] = []
    args = None
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if args.command is None:
            parser.print_help(sys.stderr)
            return 2
        if args.command == "check":
            return _run_check(args, written)
        if args.command == "demo":
            return _run_demo(args, written)
        if args.command == "run":
            return _run_run(args, written)
        if args.command == "check-summary":
            return _run_check(args, written, compute=_compute_summary)
    except AuditInputError as exc:
        return _fail(str(exc))
    except (_Stopped, KeyboardInterrupt) as exc:
        code = _SIGNAL_EXIT.get(getattr(exc, "signum", signal.SIGINT), 130)
        what = "interrupted" if code == 130 else "stopped (SIGTERM)"
        done = ("; only the " + " and the ".join(written) + " was written") if written else "; no output file written"
        with contextlib.suppress(OSError, ValueError):
            sys.stdout.flush()
        if sys.stderr.isatty():
            sys.stderr.write("\n")
        sys.stderr.write(f"{PROG}: {what}{_clean(done)}\n")
        return code
    except MemoryError:
        return _fail(f"out of memory (the data set or --resamples {getattr(args, 'resamples', '')} is too large "
                     "for this machine); try fewer resamples, e.g. --resamples 9999")
    except BrokenPipeError:  # the reader of standard output went away (e.g. `| head`): stop quietly
        with contextlib.suppress(OSError):
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except OSError as exc:  # e.g. an output folder that cannot be written
        return _fail(f"{exc.strerror or exc}: {exc.filename or ''}")
    finally:
        for s, h in previous.items():
            signal.signal(s, h)
    return 2
