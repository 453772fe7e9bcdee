"""``benchctl run`` and ``benchctl demo``."""

from __future__ import annotations

import argparse
import json
import logging
import shutil
import tempfile
from collections.abc import Mapping
from importlib import resources
from pathlib import Path
from typing import Any

from rich.console import Console
from rich.table import Table

from benchctl.errors import ConfigError, ConfigErrors
from benchctl.runner.engine import (
    EXIT_BAD_INPUT,
    EXIT_FAULT,
    Events,
    Outcome,
    execute,
    run_metadata,
)
from benchctl.runner.plan import Plan, parse_plan
from benchctl.runner.progress import JsonEvents, QuietEvents, RichEvents

DEMO_PLAN = "demo_plan.toml"


def add_command(subparsers: argparse._SubParsersAction) -> None:
    from benchctl.cli import CAUTIONS

    run = subparsers.add_parser(
        "run",
        help="run a plan on a bench, unattended, into a run folder",
        description="Validate the plan and bench files in full (nothing is sent to any instrument "
        "if either has a problem), then run every step, flushing each point to the run folder. "
        "Exit codes: 0 all spec limits pass, 1 a spec limit failed, 2 bad input, 3 instrument "
        "fault or abort. On every exit the bench is left in its safe state (generator off, supply "
        "ramped down and off).",
        epilog=CAUTIONS,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    run.add_argument("plan", nargs="?", help="plan file (TOML); with --resume, defaults to the folder's copy")
    run.add_argument("--bench", help="bench file (TOML); with --resume, defaults to the folder's copy")
    run.add_argument("--out", help="run folder to create (must not exist or be empty)")
    run.add_argument("--resume", metavar="DIR", help="continue the interrupted run in DIR without repeating its points")
    _output_options(run)
    run.set_defaults(func=_cmd_run)

    demo = subparsers.add_parser(
        "demo",
        help="run the demo plan on the simulated bench (no hardware needed)",
        description="Start the simulated bench in this process, run the demo plan (all six "
        "procedures on an invented demo board) into a run folder and write its report.",
        epilog=CAUTIONS,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    demo.add_argument("--out", default="runs/demo", help="run folder (default: runs/demo)")
    demo.add_argument("--replace", action="store_true", help="replace OUT if it holds an earlier run")
    demo.add_argument("--board", default="beacon", help="simulated board: built-in name or board file")
    demo.add_argument("--revision", default="B", help="board revision (default: B)")
    demo.add_argument("--serial", default="B0001", help="board serial number (default: B0001)")
    demo.add_argument("--seed", type=int, default=1, help="simulation seed (default: 1)")
    demo.add_argument("--plan", help="a plan file to run instead of the demo plan")
    _output_options(demo)
    demo.set_defaults(func=_cmd_demo)


def _output_options(parser: argparse.ArgumentParser) -> None:
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--quiet", action="store_true", help="print only the final line")
    group.add_argument("--json", action="store_true", help="JSON lines on stdout, for scripts")


def demo_plan_text(args: argparse.Namespace) -> str:
    """The shipped demo steps, preceded by a [board] table naming the simulated board."""
    steps = resources.files("benchctl.runner").joinpath(DEMO_PLAN).read_text(encoding="utf-8")
    board = Path(args.board).stem if args.board.endswith(".toml") else args.board
    # JSON string literals are valid TOML basic strings (same escapes).
    head = (f"[board]\nname = {json.dumps(board)}\nrevision = {json.dumps(args.revision)}\n"
            f"serial = {json.dumps(args.serial)}\n\n")
    return head + steps


def _events(args: argparse.Namespace, console: Console) -> Events:
    if args.json:
        return JsonEvents(console)
    if args.quiet:
        return QuietEvents()
    return RichEvents(console)


def _say_errors(console: Console, errors: list[ConfigError]) -> int:
    for e in errors:
        console.print(f"benchctl: {e}", markup=False, highlight=False, soft_wrap=True)
    return EXIT_BAD_INPUT


def _validate(plan_src: tuple[str, str], bench_path: Path) -> tuple[Plan, Any]:
    """Validate plan and bench together; raise ConfigErrors with every problem of both."""
    from benchctl.drivers import load_bench_file

    errors: list[ConfigError] = []
    plan = bench = None
    try:
        bench = load_bench_file(bench_path)
    except ConfigErrors as exc:
        errors.extend(exc.errors)
    except ConfigError as exc:
        errors.append(exc)
    try:
        plan = parse_plan(plan_src[1], file=plan_src[0], wiring=getattr(bench, "wiring", None),
                          bench_file=str(bench_path))
    except ConfigErrors as exc:
        errors.extend(exc.errors)
    if errors:
        raise ConfigErrors(errors)
    return plan, bench


def _cmd_run(args: argparse.Namespace, console: Console) -> int:
    from benchctl.store import RunFolder

    if args.resume and args.out:
        return _say_errors(console, [ConfigError("<command line>", "--out", "give either --out or --resume, not both")])
    if not args.resume and not (args.plan and args.bench and args.out):
        return _say_errors(console, [ConfigError("<command line>", "", "run needs PLAN, --bench and --out (or --resume DIR)")])
    try:
        if args.resume:
            folder = RunFolder.open(args.resume)
            stored_plan = (folder.path / "plan.toml").read_text(encoding="utf-8")
            if args.plan and Path(args.plan).read_text(encoding="utf-8") != stored_plan:
                raise ConfigErrors([ConfigError(args.plan, "", f"differs from the plan of the run in {args.resume}; "
                                                "a resumed run keeps its plan")])
            plan_src = (str(folder.path / "plan.toml"), stored_plan)
            bench_path = Path(args.bench) if args.bench else folder.path / "bench.toml"
            plan, bench_cfg = _validate(plan_src, bench_path)
        else:
            plan_src = (args.plan, _read(args.plan))
            bench_path = Path(args.bench)
            plan, bench_cfg = _validate(plan_src, bench_path)
            folder = RunFolder.create(args.out, plan_text=plan.text, bench_text=_read(bench_path),
                                      meta=run_metadata(plan, getattr(bench_cfg, "name", "")))
    except ConfigErrors as exc:
        return _say_errors(console, exc.errors)
    except ConfigError as exc:
        return _say_errors(console, [exc])
    return _run_into(folder, plan, bench_cfg, args, console, resume=bool(args.resume))


def _read(path: str | Path) -> str:
    try:
        return Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigErrors([ConfigError(str(path), "", f"cannot read: {exc.strerror or exc}")]) from None


def _run_into(folder: Any, plan: Plan, bench_cfg: Any, args: argparse.Namespace, console: Console, *, resume: bool) -> int:
    from benchctl.drivers import open_bench

    handler = logging.FileHandler(folder.log_path, encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(name)s %(levelname)s %(message)s"))
    handler.setLevel(logging.INFO)
    root = logging.getLogger("benchctl")
    old_level = root.level
    root.addHandler(handler)
    if root.getEffectiveLevel() > logging.INFO:
        root.setLevel(logging.INFO)
    try:
        outcome = execute(
            plan,
            open_bench=lambda: open_bench(bench_cfg, max_voltage_v=plan.limits.max_rail_v),
            folder=folder,
            events=_events(args, console),
            resume=resume,
        )
    finally:
        root.removeHandler(handler)
        root.setLevel(old_level)
        handler.close()
    report_path = _try_report(folder.path)
    _summarise(console, folder.path, outcome, report_path, args)
    return outcome.exit_code


def _try_report(run_dir: Path) -> Path | None:
    try:
        from benchctl.report import build_report
    except ImportError:
        return None
    try:
        return build_report(run_dir)
    except Exception as exc:  # a report problem never changes the run's verdict
        logging.getLogger("benchctl.runner").warning("report not written: %s", exc)
        return None


def _summarise(console: Console, run_dir: Path, outcome: Outcome, report: Path | None, args: argparse.Namespace) -> None:
    if args.json:
        console.print(json.dumps({"event": "run_finished", "status": outcome.status, "exit_code": outcome.exit_code,
                                  "message": outcome.message, "run_dir": str(run_dir),
                                  "report": str(report) if report else None,
                                  "safe_state": outcome.safe_state.summary() if outcome.safe_state else None},
                                 allow_nan=False), markup=False, highlight=False, soft_wrap=True)
        return
    if not args.quiet and outcome.parameters:
        console.print(parameters_table(outcome.parameters))
    if outcome.safe_state is not None and not args.quiet:
        console.print(outcome.safe_state.summary(), markup=False)
    tail = f"; report {report}" if report else ""
    console.print(f"benchctl: {outcome.status}: {outcome.message} (run folder {run_dir}{tail})",
                  markup=False, highlight=False, soft_wrap=True)


def parameters_table(params: Mapping[str, Mapping[str, Any]]) -> Table:
    """Derived parameters for the terminal; methods and notes are in the report and JSON."""
    table = Table(title="Derived parameters")
    table.add_column("parameter", no_wrap=True)
    table.add_column("value ± u", justify="right", min_width=12)
    table.add_column("unit")
    table.add_column("spec")
    table.add_column("verdict")
    for name, p in params.items():
        value = _fmt(p.get("value"), 6) if p.get("value") is not None else "n/a"
        if p.get("uncertainty"):
            value += f" ± {_fmt(p['uncertainty'], 2)}"
        spec_text = _spec_text(p.get("spec") or {})
        table.add_row(name, value, str(p.get("unit") or ""), spec_text, str(p.get("verdict") or ""))
    return table


def _spec_text(spec: Mapping[str, Any]) -> str:
    lo, hi = spec.get("min"), spec.get("max")
    if lo is not None and hi is not None:
        return f"{lo:g}..{hi:g}"
    return f">= {lo:g}" if lo is not None else f"<= {hi:g}" if hi is not None else ""


def _fmt(value: Any, digits: int = 6) -> str:
    return "" if value is None else f"{value:.{digits}g}" if isinstance(value, float) else str(value)


def _cmd_demo(args: argparse.Namespace, console: Console) -> int:
    from benchctl.simulated import SimulatedBench
    from benchctl.store import RunFolder

    out = Path(args.out)
    if out.exists() and any(out.iterdir()):
        if not args.replace:
            return _say_errors(console, [ConfigError(str(out), "", "exists and is not empty; use --replace to overwrite an earlier demo run")])
        if not (out / "run.json").exists():
            return _say_errors(console, [ConfigError(str(out), "", "is not a run folder; refusing to replace it")])
        shutil.rmtree(out)
    try:
        plan_src = (args.plan, _read(args.plan)) if args.plan else ("<demo plan>", demo_plan_text(args))
    except ConfigErrors as exc:
        return _say_errors(console, exc.errors)
    try:
        sim_cm = SimulatedBench(board=args.board, revision=args.revision, serial=args.serial, seed=args.seed)
    except ConfigError as exc:
        return _say_errors(console, [exc])
    with sim_cm as sim, tempfile.TemporaryDirectory(prefix="benchctl-demo-") as tmp:
        bench_path = sim.write_bench(Path(tmp) / "bench.toml")
        try:
            plan, bench_cfg = _validate(plan_src, bench_path)
            folder = RunFolder.create(out, plan_text=plan.text, bench_text=bench_path.read_text(encoding="utf-8"),
                                      meta=run_metadata(plan, "simulated bench", seed=args.seed))
        except ConfigErrors as exc:
            return _say_errors(console, exc.errors)
        except ConfigError as exc:
            return _say_errors(console, [exc])
        if not args.quiet and not args.json:
            console.print(f"benchctl demo: simulated {args.board} rev {args.revision} serial {args.serial}, "
                          f"seed {args.seed}; instruments at {', '.join(sim.resources.values())}", markup=False)
        try:
            return _run_into(folder, plan, bench_cfg, args, console, resume=False)
        except KeyboardInterrupt:
            return EXIT_FAULT

