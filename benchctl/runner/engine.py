"""Run a validated plan on a bench, step by step, into a run folder.

The sequence: open and identify the instruments, arm the bench (protection before any
output), run each step's procedure, derive spec verdicts, and on every exit path
(normal end, exception, Ctrl-C, SIGTERM, instrument fault) put the bench in its safe
state before closing. Points are flushed as they are taken and parameters are rewritten
after every step, so an interrupted run loses nothing it had measured.
"""

from __future__ import annotations

import logging
import math
import platform
import signal
import threading
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from typing import Any

from benchctl import __version__
from benchctl.errors import (
    AbortRequested,
    BenchError,
    ConfigError,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    MeasurementError,
    ProtocolError,
)
from benchctl.procedures import base
from benchctl.runner.context import AbortFlag, ProcedureBug, RunContext, StepRecord, SystemClock
from benchctl.runner.plan import Plan
from benchctl.runner.safety import SafeStateReport, arm, make_safe

EXIT_PASS, EXIT_SPEC_FAIL, EXIT_BAD_INPUT, EXIT_FAULT = 0, 1, 2, 3

log = logging.getLogger("benchctl.runner")


@dataclass
class Outcome:
    """How a run ended."""

    status: str  # complete | aborted | failed
    exit_code: int
    message: str = ""
    parameters: dict[str, dict[str, Any]] = field(default_factory=dict)
    safe_state: SafeStateReport | None = None
    measured: int = 0
    replayed: int = 0


class Events:
    """Receives progress; the CLI supplies a rich, quiet or JSON implementation."""

    def run_started(self, plan: Plan, steps: int) -> None: ...
    def step_started(self, step_index: int, name: str, procedure: str) -> None: ...
    def point(self, step_name: str, row: Mapping[str, Any], replayed: bool) -> None: ...
    def step_progress(self, step_name: str, done: int, total: int | None, readings: Mapping[str, Any] | None) -> None: ...
    def step_finished(self, step_name: str, results: Mapping[str, base.Result]) -> None: ...
    def run_finished(self, outcome: Outcome) -> None: ...


def now_iso() -> str:
    """UTC time in ISO 8601 with a Z suffix, as the run folder writes it."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


@contextmanager
def abort_on_signals(flag: AbortFlag) -> Iterator[None]:
    """First SIGINT/SIGTERM asks the run to stop at the next point; a second SIGINT interrupts
    the point in progress. Neither interrupts the safe-state sequence."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous: dict[int, Any] = {}

    def handler(signum: int, _frame: Any) -> None:
        name = signal.Signals(signum).name
        if flag.shielded:
            log.warning("%s received while making the bench safe: finishing that first", name)
            return
        if flag.is_set() and signum == signal.SIGINT:
            raise KeyboardInterrupt
        flag.set(f"{name} received")

    for sig in (signal.SIGINT, signal.SIGTERM):
        previous[sig] = signal.signal(sig, handler)
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


def execute(
    plan: Plan,
    *,
    open_bench: Callable[[], Any],
    folder: Any,
    events: Events | None = None,
    clock: base.Clock | None = None,
    abort: AbortFlag | None = None,
    resume: bool = False,
) -> Outcome:
    """Run ``plan``; return the :class:`Outcome` (never raises for instrument faults)."""
    events = events or Events()
    clock = clock or SystemClock()
    abort = abort or AbortFlag()
    history: dict[str, StepRecord] = {}
    parameters: dict[str, dict[str, Any]] = {}
    outcome = Outcome(status="failed", exit_code=EXIT_FAULT)
    bench = None
    counts = {"measured": 0, "replayed": 0}
    meta_resumes = int(folder.meta.get("resumes", 0)) + (1 if resume else 0)
    folder.update_meta(status="running", resumes=meta_resumes, last_started=now_iso())
    events.run_started(plan, len(plan.steps))
    with abort_on_signals(abort):
        try:
            bench = open_bench()
            folder.update_meta(instruments={role: _idn_dict(idn) for role, idn in bench.idn.items()})
            check_roles(bench)
            arm(bench, plan.limits, log)
            shared = shared_result_names(plan)
            for step in plan.steps:
                record = _run_step(step, plan, bench, folder, history, clock, abort, events, counts)
                parameters.update(_step_parameters(step, record, shared))
                folder.write_parameters(parameters)
            failed = [n for n, p in parameters.items() if p.get("verdict") == "fail"]
            outcome = Outcome(
                status="complete",
                exit_code=EXIT_SPEC_FAIL if failed else EXIT_PASS,
                message=f"spec failed: {', '.join(failed)}" if failed else "all spec limits pass",
            )
        except (AbortRequested, KeyboardInterrupt) as exc:
            outcome = Outcome(status="aborted", exit_code=EXIT_FAULT, message=f"aborted: {exc or 'interrupted'}")
        except (InstrumentError, InstrumentTimeout, ConnectionLost, ProtocolError, OSError) as exc:
            outcome = Outcome(status="failed", exit_code=EXIT_FAULT, message=f"instrument fault ({type(exc).__name__}): {exc}")
        except ConfigError as exc:
            outcome = Outcome(status="failed", exit_code=EXIT_BAD_INPUT, message=str(exc))
        except (ProcedureBug, MeasurementError, BenchError) as exc:
            outcome = Outcome(status="failed", exit_code=EXIT_FAULT, message=f"{type(exc).__name__}: {exc}")
        except Exception as exc:  # a bug: still safe state, data kept, traceback in the log
            log.exception("internal error")
            outcome = Outcome(status="failed", exit_code=EXIT_FAULT,
                              message=f"internal error ({type(exc).__name__}): {exc}; see log.txt")
        finally:
            abort.shielded = True  # a second Ctrl-C must not interrupt the safe state
            if bench is not None:
                outcome.safe_state = make_safe(bench, plan.limits, log)
                try:
                    bench.close()
                except (BenchError, OSError) as exc:  # closing must not hide the outcome
                    log.warning("closing the bench: %s", exc)
            if parameters:
                folder.write_parameters(parameters)
    outcome.parameters = parameters
    outcome.measured, outcome.replayed = counts["measured"], counts["replayed"]
    folder.update_meta(
        status=outcome.status,
        ended=now_iso(),
        message=outcome.message,
        exit_code=outcome.exit_code,
        safe_state=outcome.safe_state.summary() if outcome.safe_state else "bench never opened",
        points_measured=outcome.measured,
        points_replayed=outcome.replayed,
    )
    events.run_finished(outcome)
    return outcome


def _run_step(step, plan, bench, folder, history, clock, abort, events, counts) -> StepRecord:
    proc_cls = base.get(step.procedure)
    proc = proc_cls()
    record = StepRecord(step.index, step.name, step.procedure)
    recorded = {str(row["point"]): row for row in folder.points(step.index, step.name)}
    events.step_started(step.index, step.name, step.procedure)

    def on_point(rec: StepRecord, row: Mapping[str, Any], replayed: bool) -> None:
        counts["replayed" if replayed else "measured"] += 1
        events.point(rec.name, row, replayed)

    ctx = RunContext(
        step=record,
        columns=tuple(c.name for c in proc_cls.columns),
        bench=bench,
        limits=plan.limits,
        board=plan.board,
        folder=folder,
        recorded=recorded,
        history=history,
        clock=clock,
        abort=abort,
        on_point=on_point,
        on_progress=lambda done, total, readings: events.step_progress(step.name, done, total, readings),
        log=log.getChild(step.name),
        check=lambda: check_bench(bench),
    )
    try:
        results = proc.run(ctx, dict(step.params))
        ctx.flush()
    except BaseException:
        # points acquired before the failure are recorded if a check still passes; the
        # context logs each one it cannot keep, with the reason
        ctx.flush_after_failure()
        raise
    record.results = {r.name: r for r in results}
    history[step.name] = record
    events.step_finished(step.name, record.results)
    return record


def check_roles(bench: Any) -> None:
    """Each role is a different instrument, and answers a query of its role.

    Raises
    ------
    ConfigError
        Two roles answered ``*IDN?`` with the same maker, model and serial (a bench file that
        names one instrument twice).
    InstrumentError, InstrumentTimeout
        An instrument does not answer its role's query (it is not what the bench file says).
    """
    seen: dict[tuple[str, ...], str] = {}
    for role, idn in bench.idn.items():
        key = tuple(str(getattr(idn, f, "")) for f in ("maker", "model", "serial")) if hasattr(idn, "serial") else (str(idn),)
        if key in seen:
            raise ConfigError("bench", f"roles.{role}", f"answers *IDN? like role {seen[key]!r} ({', '.join(key)}): "
                              "one instrument cannot play two roles")
        seen[key] = role
    bench.supply.get_voltage()
    bench.generator.is_output_on()
    log.info("roles checked: %s", ", ".join(f"{r} = {i}" for r, i in bench.idn.items()))


def check_bench(bench: Any) -> None:
    """After each point: every instrument's error queue, and the supply's protection latch.

    Raises
    ------
    InstrumentError
        An instrument queued an error, or the supply's over-voltage protection tripped.
    """
    supply = bench.supply
    checked = getattr(supply, "protection_checked", None)  # the latch and the queue at once
    for inst in bench.instruments.values():
        if inst is not supply or checked is None:
            inst.check_errors()
    if checked() if checked is not None else supply.protection_tripped():
        raise InstrumentError(0, "over-voltage protection tripped; the supply output is off",
                              resource=bench.supply.resource)


def shared_result_names(plan: Plan) -> set[str]:
    """Result names that more than one step of the plan declares (they get the step's name)."""
    seen: dict[str, int] = {}
    for step in plan.steps:
        for name in base.get(step.procedure).results:
            seen[name] = seen.get(name, 0) + 1
    return {name for name, count in seen.items() if count > 1}


def parameter_key(step_name: str, name: str, shared: set[str]) -> str:
    """``name``, or ``<step>.<name>`` when several steps of the plan give ``name``."""
    return f"{step_name}.{name}" if name in shared else name


def _step_parameters(step, record: StepRecord, shared: set[str]) -> dict[str, dict[str, Any]]:
    out: dict[str, dict[str, Any]] = {}
    for name, result in record.results.items():
        entry = {k: _plain(v) for k, v in asdict(result).items() if k != "name"}
        entry["step"] = step.name
        limit = step.spec.get(name)
        entry["spec"] = limit.as_dict() if limit else None
        entry["verdict"] = limit.verdict(result.value) if limit else None
        out[parameter_key(step.name, name, shared)] = entry
    for name, limit in step.spec.items():
        if name not in record.results:  # a spec on a parameter the step did not give fails
            out[parameter_key(step.name, name, shared)] = {
                "value": None, "unit": "", "uncertainty": None, "method": "", "low": None, "high": None,
                "note": "not determined by the step", "step": step.name, "spec": limit.as_dict(), "verdict": "fail"}
    return out


def _plain(value: Any) -> Any:
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _idn_dict(idn: Any) -> dict[str, str] | str:
    if hasattr(idn, "__dataclass_fields__"):
        return {k: str(v) for k, v in asdict(idn).items()}
    return str(idn)


def run_metadata(plan: Plan, bench_name: str, seed: int | None = None) -> dict[str, Any]:
    """Metadata written to run.json when a run folder is created."""
    return {
        "board": {"name": plan.board.name, "revision": plan.board.revision, "serial": plan.board.serial},
        "plan_file": plan.file,
        "bench": bench_name,
        "benchctl_version": __version__,
        "python": platform.python_version(),
        "host": platform.node(),
        "seed": seed,
        "resumes": 0,
    }
