"""``benchctl discover``: which instruments answer, and who they say they are.

Lists the resources the chosen VISA library can enumerate, adds the resource strings given
on the command line (SOCKET resources can never be enumerated), asks each one ``*IDN?``
with a per-resource timeout, and prints a table (rich) or JSON.
"""

from __future__ import annotations

import argparse
import json
import time
from dataclasses import asdict, dataclass

from rich.console import Console
from rich.table import Table

from benchctl.errors import BenchError

from .dialect import load_dialect
from .transport import list_resources, open_resource, resource_shape_ok

__all__ = ["Probe", "add_command", "probe_resource"]


@dataclass(frozen=True)
class Probe:
    """What one resource answered."""

    resource: str
    ok: bool
    maker: str = ""
    model: str = ""
    serial: str = ""
    firmware: str = ""
    error: str = ""
    elapsed_s: float = 0.0
    listed: bool = False


def probe_resource(
    resource: str,
    *,
    visa_library: str = "@py",
    timeout_s: float = 1.0,
    read_termination: str = "\n",
    write_termination: str = "\n",
    listed: bool = False,
) -> Probe:
    """Open ``resource``, ask ``*IDN?`` and close it; never raises for instrument trouble."""
    t0 = time.monotonic()
    idn_op = load_dialect("scpi1999", "supply").op("identify")
    try:
        with open_resource(
            resource,
            visa_library=visa_library,
            timeout_s=timeout_s,
            read_termination=read_termination,
            write_termination=write_termination,
        ) as transport:
            identity = idn_op.parse(transport.query(idn_op.render()))
    except BenchError as exc:
        return Probe(resource, False, error=str(exc).splitlines()[0], elapsed_s=time.monotonic() - t0, listed=listed)
    return Probe(
        resource,
        True,
        identity.maker,
        identity.model,
        identity.serial,
        identity.firmware,
        elapsed_s=time.monotonic() - t0,
        listed=listed,
    )


def add_command(subparsers: argparse._SubParsersAction) -> None:
    """Add ``discover`` to the benchctl command line."""
    p = subparsers.add_parser(
        "discover",
        help="list instruments and their *IDN? answers",
        description="List the VISA resources the VISA library sees, plus any given on the "
        "command line (SOCKET resources cannot be listed: give them), and ask each one *IDN?.",
    )
    p.add_argument("resources", nargs="*", metavar="RESOURCE", help="VISA resource strings to probe as well")
    p.add_argument("--visa-library", default="@py", help="pyvisa backend (default: @py, i.e. pyvisa-py)")
    p.add_argument("--timeout", type=float, default=1.0, metavar="SECONDS", help="per-resource timeout (default 1 s)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.add_argument("--no-scan", action="store_true", help="probe only the resources given; without it the VISA "
                   "library is asked for its list (pyvisa-py broadcasts on the local network for TCPIP)")
    p.add_argument("--crlf", action="store_true", help="instruments terminate with \\r\\n instead of \\n")
    p.set_defaults(func=run_discover)


def run_discover(args: argparse.Namespace, console: Console) -> int:
    """Handler of ``benchctl discover``; exit 0 if every given resource answered, 2 on a
    malformed resource string, 3 if one did not answer."""
    if not args.timeout > 0:
        console.print(f"discover: --timeout {args.timeout:g} must be > 0 seconds")
        return 2
    bad = [r for r in args.resources if not resource_shape_ok(r)]
    if bad:
        console.print(f"discover: {bad[0]!r} is not a VISA resource string (e.g. TCPIP::host::port::SOCKET)")
        return 2
    listed: list[str] = []
    scan_error = ""
    if not args.no_scan:
        try:
            listed = list(list_resources(visa_library=args.visa_library))
        except BenchError as exc:
            scan_error = str(exc)
    term = "\r\n" if args.crlf else "\n"
    probes = [
        probe_resource(r, visa_library=args.visa_library, timeout_s=args.timeout, read_termination=term,
                       write_termination=term, listed=r in listed)
        for r in dict.fromkeys([*listed, *args.resources])
    ]
    if args.json:
        console.out(json.dumps({"resources": [asdict(p) for p in probes], "scan_error": scan_error}, indent=2),
                    highlight=False)
    else:
        table = Table(title=f"Instruments seen through {args.visa_library}")
        for col in ("resource", "maker", "model", "serial", "firmware", "answer"):
            table.add_column(col)
        for p in probes:
            answer = f"{p.elapsed_s * 1e3:.0f} ms" if p.ok else p.error
            table.add_row(p.resource, p.maker, p.model, p.serial, p.firmware, answer)
        if probes:
            console.print(table)
        else:
            console.print("No instruments found. SOCKET resources cannot be listed: give them as arguments.")
        if scan_error:
            console.print(f"listing failed: {scan_error}")
    failed = [p for p in probes if not p.ok and not p.listed]
    return 3 if failed else 0
