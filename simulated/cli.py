"""``benchctl sim``: serve a simulated bench on loopback until Ctrl-C or SIGTERM."""

from __future__ import annotations

import argparse
import signal
import threading
from pathlib import Path

from benchctl.errors import ConfigError
from benchctl.simulated.bench import ROLES, SimulatedBench, parse_fault
from benchctl.simulated.models import BUILTIN_BOARDS

LOOPBACK = ("127.0.0.1", "localhost")

HELP = """\
Start a simulated DC supply, function generator and oscilloscope speaking SCPI over TCP,
wired to a simulated board, and print their VISA resource strings. Serves until Ctrl-C
or SIGTERM. The servers bind 127.0.0.1; SCPI has no authentication, so binding any
other address needs --bind and is announced with a warning."""


def add_command(subparsers) -> None:
    """Add the ``sim`` sub-command."""
    from benchctl.cli import CAUTIONS

    p = subparsers.add_parser("sim", help="serve a simulated bench on loopback",
                              description=HELP, epilog=CAUTIONS,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--board", default="beacon",
                   help=f"built-in board ({', '.join(BUILTIN_BOARDS)}) or a board TOML file "
                        "(default: beacon)")
    p.add_argument("--revision", help="board revision (default: the board file's)")
    p.add_argument("--serial", help="unit serial number (default: the board file's)")
    p.add_argument("--seed", type=int, default=1, help="session seed (default: 1)")
    p.add_argument("--realtime", action="store_true",
                   help="really wait for settling and acquisitions (default: accelerated)")
    p.add_argument("--port-base", type=int, default=None, metavar="PORT",
                   help="supply on PORT, generator PORT+1, scope PORT+2 (default: ephemeral)")
    p.add_argument("--bind", default="127.0.0.1", metavar="ADDR",
                   help="address to bind (default 127.0.0.1; anything else is reachable "
                        "from the network without authentication)")
    p.add_argument("--wire-generator", choices=("rail", "input", "none"), default=None,
                   help="where the generator goes: summed onto the rail (modulation fixture) or "
                        "into the board input (default: rail for oscillators, input for "
                        "amplifiers)")
    p.add_argument("--write-bench", type=Path, metavar="PATH",
                   help="write a ready bench file for these servers")
    p.add_argument("--dialect", default="scpi1999", help="dialect named in the bench file")
    p.add_argument("--fault", action="append", default=[], metavar="ROLE:KIND[:K=V,...]",
                   help="arm a fault at start, e.g. scope:delay:seconds=3,count=1 "
                        f"(roles: {', '.join(ROLES)}; kinds: drop_after n=, delay seconds= "
                        "count=, truncate count=, corrupt_block count= mode=length|garbage, "
                        "push_error code= message=, trip_ovp, stall)")
    p.set_defaults(func=handler)


def handler(args, console, *, stop: threading.Event | None = None) -> int:
    """Run the simulated bench; exit 0 on Ctrl-C/SIGTERM, 2 on bad input."""
    faults = []
    for text in args.fault:
        try:
            faults.append(parse_fault(text))
        except ValueError as exc:
            console.print(f"benchctl sim: --fault: {exc}", markup=False, soft_wrap=True)
            return 2
    if args.bind not in LOOPBACK:
        console.print(f"benchctl sim: WARNING: binding {args.bind}: SCPI has no "
                      "authentication; anyone who can reach this address can drive the "
                      "simulated bench.", markup=False, soft_wrap=True)
    try:
        sim = SimulatedBench(board=args.board, revision=args.revision, serial=args.serial,
                             seed=args.seed, realtime=args.realtime, host=args.bind,
                             ports=args.port_base, faults=faults,
                             wiring_generator=args.wire_generator)
    except ConfigError as exc:
        console.print(f"benchctl sim: {exc}", markup=False, soft_wrap=True)
        return 2
    stop = stop or threading.Event()
    previous = {}
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGINT, signal.SIGTERM):
            previous[sig] = signal.signal(sig, lambda *_: stop.set())
    try:
        try:
            sim.start()
        except OSError as exc:
            console.print(f"benchctl sim: cannot bind {args.bind}: {exc.strerror or exc}",
                          markup=False, soft_wrap=True)
            return 2
        m = sim.model
        console.print(f"simulated board: {m.name} revision {m.revision} serial {m.serial} "
                      f"({'real-time' if args.realtime else 'accelerated'}, seed {args.seed})",
                      markup=False, soft_wrap=True)
        for role, res in sim.resources.items():
            console.print(f"{role}: {res}", markup=False, soft_wrap=True)
        if args.write_bench:
            try:
                sim.write_bench(args.write_bench, dialect=args.dialect)
            except OSError as exc:
                console.print(f"benchctl sim: --write-bench {args.write_bench}: "
                              f"{exc.strerror or exc}", markup=False, soft_wrap=True)
                return 2
            console.print(f"bench file: {args.write_bench}", markup=False, soft_wrap=True)
        console.print("serving; Ctrl-C or SIGTERM stops", markup=False, soft_wrap=True)
        console.file.flush()
        while not stop.wait(0.5):
            pass
        console.print("stopped", markup=False, soft_wrap=True)
        return 0
    finally:
        sim.close()
        for sig, old in previous.items():
            signal.signal(sig, old)
