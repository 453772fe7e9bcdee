"""Progress shown while a run goes: rich bars, quiet, or JSON lines for scripts."""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import Any

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)

from benchctl.procedures import base
from benchctl.report.formatting import json_safe
from benchctl.runner.engine import Events, Outcome
from benchctl.runner.plan import Plan

_READING_UNITS = (("rail_v", "V"), ("vpp_v", "Vpp"), ("freq_hz", "Hz"), ("current_a", "A"), ("thd_db", "dB"))


def format_readings(row: Mapping[str, Any]) -> str:
    """A short human line of the readings a row holds."""
    parts = []
    for key, unit in _READING_UNITS:
        value = row.get(key)
        if isinstance(value, float) and math.isfinite(value):
            parts.append(f"{key.split('_')[0]} {value:.5g} {unit}")
    if "oscillating" in row and row["oscillating"] is not None:
        parts.append("osc" if row["oscillating"] else "no osc")
    return ", ".join(parts)


class RichEvents(Events):
    """Two bars (overall steps and the current step's points, each with its ETA) and the last reading."""

    def __init__(self, console: Console) -> None:
        self.console = console
        self.progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TimeElapsedColumn(),
            TextColumn("eta"),
            TimeRemainingColumn(),
            TextColumn("{task.fields[last]}"),
            console=console,
            transient=False,
        )
        self._overall = None
        self._step = None

    def run_started(self, plan: Plan, steps: int) -> None:
        self.progress.start()
        self._overall = self.progress.add_task("run", total=steps, last="")

    def step_started(self, step_index: int, name: str, procedure: str) -> None:
        if self._step is not None:
            self.progress.remove_task(self._step)
        self._step = self.progress.add_task(f"  {name}", total=None, last="")

    def point(self, step_name: str, row: Mapping[str, Any], replayed: bool) -> None:
        if self._step is not None:
            tag = "(recorded) " if replayed else ""
            self.progress.update(self._step, last=tag + format_readings(row))

    def step_progress(self, step_name, done, total, readings) -> None:
        if self._step is not None:
            self.progress.update(self._step, completed=done, total=total)
            if readings:
                self.progress.update(self._step, last=format_readings(readings))

    def step_finished(self, step_name: str, results: Mapping[str, base.Result]) -> None:
        if self._overall is not None:
            self.progress.advance(self._overall)

    def run_finished(self, outcome: Outcome) -> None:
        self.progress.stop()


class QuietEvents(Events):
    """Nothing while running; the command prints the final line."""


class JsonEvents(Events):
    """One JSON object per line on the console: for scripts."""

    def __init__(self, console: Console) -> None:
        self.console = console

    def _emit(self, **obj: Any) -> None:
        text = json.dumps(json_safe(obj), default=_json_default, allow_nan=False)
        self.console.print(text, markup=False, highlight=False, soft_wrap=True)

    def run_started(self, plan: Plan, steps: int) -> None:
        self._emit(event="run_started", board=plan.board.name, serial=plan.board.serial, steps=steps)

    def step_started(self, step_index: int, name: str, procedure: str) -> None:
        self._emit(event="step_started", step=name, procedure=procedure, index=step_index)

    def point(self, step_name: str, row: Mapping[str, Any], replayed: bool) -> None:
        self._emit(event="point", step=step_name, replayed=replayed, row=dict(row))

    def step_finished(self, step_name: str, results: Mapping[str, base.Result]) -> None:
        self._emit(event="step_finished", step=step_name,
                   results={k: {"value": r.value, "unit": r.unit, "uncertainty": r.uncertainty} for k, r in results.items()})


def _json_default(value: Any) -> Any:
    if hasattr(value, "item"):
        return value.item()
    return str(value)
