"""Command-line interface: parses arguments and calls the public API, nothing more.

Bad input (a typed :class:`~audit.errors.AuditInputError`, a bad option) is
printed as one line on stderr with exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import os
import sys

__all__ = ["main", "build_parser"]

PROG = "twoway-audit"


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2
        if "--factors" in message and "expected 2 argument" in message:
            message += "; give two names separated by a space: --factors COL_A COL_B"
        sys.stderr.write(f"{PROG}: error: {message} (see '{PROG} {self._sub or ''} --help')\n".replace("  ", " "))
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
                   help="resamples for each permutation/bootstrap method (default 9999; 0 skips them)")
    c.add_argument("--seed", type=int, default=None,
                   help="seed of the resampling methods (default: a fresh one, printed in the findings)")
    c.add_argument("--no-diagnostics", action="store_true", help="skip the assumption and design checks")
    c.add_argument("--no-methods", action="store_true", help="skip the alternative methods")
    c.add_argument("--json", metavar="PATH", help="write the findings JSON to PATH ('-' for stdout only)")
    c.add_argument("--report", metavar="DIR", help="write report.txt, findings.json and the figures into DIR")
    return p


def _run_check(args) -> int:
    from .api import check
    from .render.text import render_text
    from ._io import atomic_write_text

    findings = check(
        args.data, response=args.response, factors=tuple(args.factors), alpha=args.alpha,
        levels=args.levels or None, order=args.order, unit=args.unit,
        sheet=args.sheet, encoding=args.encoding, decimal=args.decimal,
        resamples=args.resamples, seed=args.seed, diagnostics=not args.no_diagnostics,
        methods=not args.no_methods, figures=bool(args.report), progress=sys.stderr.isatty(),
    )
    text = render_text(findings)
    js = findings.to_json()
    if args.json == "-":
        sys.stdout.write(js + "\n")
    else:
        sys.stdout.write(text)
        if args.json:
            atomic_write_text(args.json, js + "\n")
    if args.report:
        os.makedirs(args.report, exist_ok=True)
        atomic_write_text(os.path.join(args.report, "report.txt"), text)
        atomic_write_text(os.path.join(args.report, "findings.json"), js + "\n")
        from .render.figures import write_figures

        write_figures(findings.figure_data, args.report)
    return 0


def main(argv: list[str] | None = None) -> int:
    from .errors import AuditInputError

    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        if args.command == "check":
            return _run_check(args)
    except AuditInputError as exc:
        sys.stderr.write(f"{PROG}: error: {exc}\n")
        return 2
    except OSError as exc:  # e.g. an output folder that cannot be written
        sys.stderr.write(f"{PROG}: error: {exc.strerror or exc}: {exc.filename or ''}\n")
        return 2
    return 2
