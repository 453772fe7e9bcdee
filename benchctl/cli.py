"""The ``benchctl`` command line.

Each sub-command lives in the module that owns its job and exposes
``add_command(subparsers) -> None``; that function adds its parser and sets
``func=handler`` where ``handler(args, console) -> int`` returns the exit code.
The console is injected so output is testable through a StringIO.

Exit codes: 0 all pass, 1 a spec limit failed, 2 bad input, 3 instrument fault or abort.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from rich.console import Console

from benchctl import __version__

CAUTIONS = """\
Cautions: bench supplies and boards can be hazardous; follow your lab's electrical
safety rules. Set current limits and protection before enabling outputs. An oscillator
connected to an antenna radiates: transmitting on broadcast or other bands needs
authorisation under local rules, so use a dummy load or a shielded setup. Defer to local
codes, lab safety rules and licensed practice. Software limits never replace hardware
protection (fuses, current-limited supplies, interlocks)."""

# Modules that contribute sub-commands, in the order --help lists them.
COMMAND_MODULES = (
    "benchctl.runner.commands",
    "benchctl.simulated.cli",
    "benchctl.drivers.discovery",
    "benchctl.report.commands",
)


def build_parser() -> argparse.ArgumentParser:
    """Return the top-level parser with every available sub-command."""
    parser = argparse.ArgumentParser(
        prog="benchctl",
        description="Characterise analog and RF boards across their supply rail: dropout and "
        "start-up voltages, amplitude and frequency vs rail, linear region, modulation, "
        "current draw, revision comparison and datasheet tables.",
        epilog=CAUTIONS,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"benchctl {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output (-vv: every SCPI exchange)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:  # a sub-command whose module is not built yet
            if exc.name and name.startswith(exc.name):
                continue
            raise
        module.add_command(sub)
    return parser


def main(argv: Sequence[str] | None = None, console: Console | None = None) -> int:
    """Run the command line; return the exit code."""
    console = console or Console(stderr=False)
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    _configure_logging(args.verbose)
    try:
        return int(args.func(args, console))
    except KeyboardInterrupt:
        console.print("benchctl: interrupted")
        return 3


def _configure_logging(verbosity: int) -> None:
    import logging

    level = logging.WARNING if verbosity == 0 else logging.INFO if verbosity == 1 else logging.DEBUG
    handler = logging.StreamHandler(sys.stderr)
    handler.setLevel(level)  # the run's log file may take more (INFO) than the terminal shows
    handler.setFormatter(logging.Formatter("%(asctime)s %(name)s %(levelname)s %(message)s"))
    root = logging.getLogger()
    root.setLevel(level)
    if not any(getattr(h, "_benchctl", False) for h in root.handlers):
        handler._benchctl = True  # type: ignore[attr-defined]
        root.addHandler(handler)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
