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
                   help="level order for a factor (repeatable; default: order of first appearance)")
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
    c.add_argument("--strict", action="store_true", help="exit 1 for 'holds with caveats' too")
    c.add_argument("--no-timestamp", action="store_true",
                   help="leave the time of the run out of the findings (byte-identical reruns)")
    c.add_argument("--no-diagnostics", action="store_true", help="skip the assumption and design checks")
    c.add_argument("--no-methods", action="store_true", help="skip the alternative methods (and the verdict)")
    c.add_argument("--json", metavar="PATH", help="write the findings JSON to PATH ('-' for stdout only); never onto the input file")
    c.add_argument("--report", metavar="DIR", help="write report.txt, findings.json and the figures into DIR, replaced as a whole "
                        "(DIR must be new, empty or an earlier report)")
    return p


REPORT_TEXT = "report.txt"
REPORT_JSON = "findings.json"

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


def _run_check(args, written: list) -> int:
    from ._io import (MANIFEST, check_file_target, check_folder_target, refuse_folder_overlap, refuse_input_overlap,
                      replace_folder, write_file)
    inputs = [args.data]
    known = {REPORT_TEXT, REPORT_JSON}
    json_name = None  # set when --json names a file directly inside the report folder: written with it
    if args.json and args.json != "-" and args.report:
        if os.path.realpath(os.path.dirname(os.path.abspath(args.json))) == os.path.realpath(args.report):
            json_name = os.path.basename(args.json)
            from .render.figures import FIGURE_FILES

            if json_name in {REPORT_TEXT, MANIFEST, *FIGURE_FILES.values()}:
                raise OutputError(f"--json {args.json!r} is a file the report folder itself holds; "
                                  f"choose another name (the folder has its own {REPORT_JSON})")
            known.add(json_name)
    if args.json and args.json != "-" and json_name is None:
        refuse_input_overlap(args.json, inputs, option="--json")
        check_file_target(args.json)
    if args.report:
        from .render.figures import FIGURE_FILES

        known |= set(FIGURE_FILES.values())
        refuse_input_overlap(args.report, inputs, option="--report")
        refuse_folder_overlap(args.report, inputs)
        check_folder_target(args.report, known=known)

    from .api import check  # the heavy imports only after the output paths passed
    from .render.text import render_text

    with warnings.catch_warnings():
        # floating-point RuntimeWarnings from numpy/scipy inside a run are not messages for the
        # user (results carry their own notes); scoped to this run, library callers still see them
        warnings.filterwarnings("ignore", category=RuntimeWarning)
        findings = check(
            args.data, response=args.response, factors=tuple(args.factors), alpha=args.alpha,
            levels=args.levels or None, order=args.order, unit=args.unit,
            sheet=args.sheet, encoding=args.encoding, decimal=args.decimal,
            resamples=args.resamples, seed=args.seed, diagnostics=not args.no_diagnostics,
            methods=not args.no_methods, figures=bool(args.report), progress=sys.stderr.isatty(),
            claim=args.claim or None, calibration=args.calibration, equivalence=args.equivalence,
            timestamp=not args.no_timestamp, exact_resamples=args.exact_resamples,
        )
    text = render_text(findings)
    js = (findings.to_json() + "\n").encode("utf-8")
    if args.json == "-":
        sys.stdout.write(js.decode("utf-8"))
    else:
        sys.stdout.write(text)
    sys.stdout.flush()
    if args.report:
        from .render.figures import write_figures

        def build(tmp: str) -> list[str]:
            with open(os.path.join(tmp, REPORT_TEXT), "w", encoding="utf-8") as fh:
                fh.write(text)
            with open(os.path.join(tmp, REPORT_JSON), "wb") as fh:
                fh.write(js)
            figs = write_figures(findings.figure_data, tmp)
            names = [REPORT_TEXT, REPORT_JSON, *(os.path.basename(p) for p in figs)]
            if json_name is not None and json_name not in names:
                with open(os.path.join(tmp, json_name), "wb") as fh:
                    fh.write(js)
                names.append(json_name)
            return names

        replace_folder(args.report, build, known=known,
                       on_done=lambda: written.append(f"report folder {args.report!r}"))
    if args.json and args.json != "-" and json_name is None:
        refuse_input_overlap(args.json, inputs, option="--json")
        write_file(args.json, js, on_done=lambda: written.append(f"findings JSON {args.json!r}"))
    return findings.exit_status(strict=args.strict)


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
