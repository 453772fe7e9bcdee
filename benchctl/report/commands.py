"""Sub-commands ``report``, ``compare`` and ``datasheet`` (see :mod:`benchctl.cli`)."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from rich.console import Console

from benchctl.errors import BenchError

EXIT_OK = 0
EXIT_SHIFTED = 1
EXIT_BAD_INPUT = 2


def add_command(subparsers) -> None:
    """Add ``report``, ``compare`` and ``datasheet`` to the ``benchctl`` parser."""
    p = subparsers.add_parser(
        "report", help="make plots, index.html and summary.md from a run folder (offline)",
        description="Make the report of a run folder from the folder alone: PNG plots of every "
        "step, index.html and summary.md with the board, instruments, status and parameters.",
    )
    p.add_argument("run_dir", metavar="RUN_DIR", help="the run folder")
    p.add_argument("--out", metavar="DIR", help="where to write (default RUN_DIR/report)")
    p.set_defaults(func=_cmd_report)

    p = subparsers.add_parser(
        "compare", help="compare two runs (e.g. two board revisions); exit 1 if a parameter shifted",
        description="Compare the derived parameters and the amplitude-vs-rail curves of run B "
        "against run A. A parameter is shifted when |B - A| exceeds both k times the combined "
        "standard uncertainty and the relative tolerance. Exit code 1 when any parameter shifted.",
    )
    p.add_argument("run_a", metavar="RUN_A", help="reference run folder")
    p.add_argument("run_b", metavar="RUN_B", help="run folder to check against it")
    p.add_argument("--tolerance", type=float, default=0.01, metavar="REL",
                   help="relative tolerance below which a difference is never a shift (default 0.01)")
    p.add_argument("--k", type=float, default=2.0, dest="coverage_k", metavar="K",
                   help="coverage factor on the combined uncertainty (default 2)")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.add_argument("--markdown", metavar="FILE", help="also write the comparison as Markdown")
    p.set_defaults(func=_cmd_compare)

    p = subparsers.add_parser(
        "datasheet", help="Min/Typ/Max tables across units, grouped by board and revision",
        description="Tabulate each parameter across units (serials) of a board revision: Min, "
        "Typ (the median), Max and n units; optionally guard-banded limits mean -/+ k*s with k "
        "a normal tolerance-interval factor.",
    )
    p.add_argument("run_dirs", metavar="RUN_DIR", nargs="+", help="run folders, one or more per unit")
    p.add_argument("--out", metavar="DIR", help="write datasheet.md and datasheet.csv here")
    p.add_argument("--json", action="store_true", help="print the tables as JSON")
    p.add_argument("--coverage", type=float, metavar="P",
                   help="add guard-banded limits covering this fraction of units (e.g. 0.99)")
    p.add_argument("--confidence", type=float, default=0.95, metavar="G",
                   help="confidence of the guard-banded limits (default 0.95)")
    p.add_argument("--factor", choices=("exact", "howe"), default="exact",
                   help="tolerance factor: exact (default) or Howe's approximation")
    p.add_argument("--include-incomplete", action="store_true",
                   help="also use runs that were aborted or failed")
    p.set_defaults(func=_cmd_datasheet)


def _bad(console: Console, command: str, exc: Exception) -> int:
    console.print(f"benchctl {command}: {exc}", markup=False, highlight=False, soft_wrap=True)
    return EXIT_BAD_INPUT


def _cmd_report(args: argparse.Namespace, console: Console) -> int:
    from benchctl.report.build import build_report

    try:
        index = build_report(args.run_dir, out_dir=args.out)
    except (BenchError, OSError) as exc:
        return _bad(console, "report", exc)
    console.print(f"report written: {index}", markup=False, highlight=False, soft_wrap=True)
    return EXIT_OK


def _cmd_compare(args: argparse.Namespace, console: Console) -> int:
    from benchctl.report.compare import compare_runs

    try:
        result = compare_runs(args.run_a, args.run_b, tolerance=args.tolerance, coverage_k=args.coverage_k)
        if args.markdown:
            from benchctl.store.atomic import write_text_atomic

            write_text_atomic(Path(args.markdown), result.to_markdown())
    except (BenchError, OSError, ValueError) as exc:
        return _bad(console, "compare", exc)
    if args.json:
        console.out(json.dumps(result.to_dict(), indent=2, ensure_ascii=False), highlight=False)
    else:
        for table in result.tables():
            console.print(table)
        for note in result.notes:
            console.print(f"note: {note}", markup=False, highlight=False, soft_wrap=True)
        verdict = f"shifted: {', '.join(result.shifted)}" if result.any_shifted else "no parameter shifted"
        console.print(verdict, markup=False, highlight=False, soft_wrap=True)
    return EXIT_SHIFTED if result.any_shifted else EXIT_OK


def _cmd_datasheet(args: argparse.Namespace, console: Console) -> int:
    from benchctl.report.datasheets import datasheet

    try:
        sheet = datasheet(args.run_dirs, coverage=args.coverage, confidence=args.confidence,
                          include_incomplete=args.include_incomplete, factor=args.factor)
        written = sheet.write(args.out) if args.out else ()
    except (BenchError, OSError, ValueError) as exc:
        return _bad(console, "datasheet", exc)
    if args.json:
        console.out(json.dumps(sheet.to_dict(), indent=2, ensure_ascii=False), highlight=False)
    else:
        for table in sheet.tables():
            console.print(table)
        for line in sheet.skipped:
            console.print(f"not used: {line}", markup=False, highlight=False, soft_wrap=True)
        for path in written:
            console.print(f"written: {path}", markup=False, highlight=False, soft_wrap=True)
    return EXIT_OK
