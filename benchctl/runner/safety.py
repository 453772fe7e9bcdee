"""Arming the bench safely, and the safe state every exit path ends in.

Order matters and is common practice (no published source): outputs off first, then
protection (current limit, over-voltage) programmed and read back, and only then may a
procedure enable an output. The safe state is: generator output off, supply ramped down
at the plan's ramp rate and switched off, both verified by readback where reachable.
Each action is tried on its own, so one unreachable instrument never stops the others
from being made safe.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from benchctl.errors import BenchError, ConnectionLost, SafetyError
from benchctl.procedures.base import Limits

_READBACK_REL_TOL = 0.02


@dataclass
class SafeStateReport:
    """What the safe-state sequence did; ``verified`` is True only if readback confirmed it."""

    actions: list[str] = field(default_factory=list)
    failures: list[str] = field(default_factory=list)
    generator_off: bool | None = None
    supply_off: bool | None = None

    @property
    def verified(self) -> bool:
        return bool(self.generator_off) and bool(self.supply_off) and not self.failures

    def summary(self) -> str:
        gen = {True: "off (read back)", False: "NOT confirmed off", None: "unreachable"}[self.generator_off]
        sup = {True: "off (read back)", False: "NOT confirmed off", None: "unreachable"}[self.supply_off]
        return f"safe state: generator {gen}, supply {sup}"


def arm(bench: Any, limits: Limits, log: logging.Logger) -> None:
    """Put the bench in a known state with protection programmed; outputs stay off.

    Raises
    ------
    SafetyError
        If the supply does not read back the current limit or protection level asked.
    """
    bench.generator.output(False)
    bench.supply.output(False)
    bench.supply.set_voltage(0.0)
    bench.supply.set_current_limit(limits.current_limit_a)
    bench.supply.set_ovp(limits.ovp_v)
    _check_readback(bench.supply, "current_limit", limits.current_limit_a, "current limit", "A")
    _check_readback(bench.supply, "ovp", limits.ovp_v, "over-voltage protection", "V")
    if bench.supply.is_output_on():
        raise SafetyError("supply output reads back ON after being switched off")
    log.info("bench armed: current limit %.4g A, OVP %.4g V, outputs off", limits.current_limit_a, limits.ovp_v)


def _check_readback(supply: Any, name: str, wanted: float, what: str, unit: str) -> None:
    getter: Callable[[], float] | None = getattr(supply, f"get_{name}", None)
    if getter is None:  # a driver without the query cannot verify; the setting was still sent
        return
    got = float(getter())
    if abs(got - wanted) > _READBACK_REL_TOL * abs(wanted) + 1e-9:
        raise SafetyError(f"{what} reads back {got:g} {unit}, asked {wanted:g} {unit}")


def make_safe(bench: Any, limits: Limits, log: logging.Logger) -> SafeStateReport:
    """Drive the bench to its safe state; never raises (failures are in the report).

    A role whose connection dropped is reopened once (``bench.reopen(role)``) and its
    sequence is tried again on the fresh session.
    """
    report = SafeStateReport()
    lost: list[bool] = []

    def attempt(label: str, fn: Callable[[], Any]) -> tuple[bool, Any]:
        try:
            value = fn()
            report.actions.append(label)
            return True, value
        except (BenchError, OSError) as exc:
            report.failures.append(f"{label}: {exc}")
            lost.append(isinstance(exc, ConnectionLost | OSError))
            log.warning("safe state: %s failed: %s", label, exc)
            return False, exc

    def generator_off(gen: Any) -> bool | None:
        attempt("generator output off", lambda: gen.output(False))
        ok, state = attempt("generator readback", gen.is_output_on)
        return (not state) if ok else None

    def supply_off(sup: Any) -> bool | None:
        attempt("supply ramp down", lambda: sup.ramp_to(0.0, rate_v_per_s=limits.ramp_v_per_s))
        attempt("supply output off", lambda: sup.output(False))
        ok, state = attempt("supply readback", sup.is_output_on)
        return (not state) if ok else None

    for role, sequence in (("generator", generator_off), ("supply", supply_off)):
        inst = getattr(bench, role, None)
        if inst is None:
            continue
        first_failure = len(report.failures)
        lost.clear()
        result = sequence(inst)
        if result is None and any(lost) and hasattr(bench, "reopen"):
            ok, fresh = attempt(f"{role} reconnect", lambda role=role: bench.reopen(role))
            if ok:
                log.info("safe state: %s reconnected after a dropped connection", role)
                del report.failures[first_failure:]  # superseded by the retry on the new session
                result = sequence(fresh)
        setattr(report, f"{role}_off", result)
    log.info(report.summary())
    return report
