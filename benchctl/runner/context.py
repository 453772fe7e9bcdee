"""The runner's side of the procedure interface: one :class:`RunContext` per step.

It records each point in the run folder as it is taken (flushed per point) and, on a
resumed run, hands back the recorded row for a key instead of measuring it again.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from benchctl.errors import AbortRequested, BenchError
from benchctl.procedures import base

_PLAIN = (float, int, bool, str, type(None))


class SystemClock:
    """The real clock (injected so that procedures can be tested with a fake one)."""

    def monotonic(self) -> float:
        return time.monotonic()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds)


class AbortFlag:
    """Set by a signal handler; procedures see it through ``ctx.check_abort()``."""

    def __init__(self) -> None:
        self._event = threading.Event()
        self.reason = ""
        self.shielded = False  # True while the safe state runs: signals are then only logged

    def set(self, reason: str) -> None:
        self.reason = self.reason or reason
        self._event.set()

    def is_set(self) -> bool:
        return self._event.is_set()


class ProcedureBug(BenchError):
    """A procedure broke the interface contract (duplicate key, row with unknown columns...)."""


@dataclass
class StepRecord:
    """What one step left: its rows (by key, in order) and its results."""

    index: int
    name: str
    procedure: str
    rows: dict[str, Mapping[str, Any]] = field(default_factory=dict)
    results: dict[str, base.Result] = field(default_factory=dict)


class RunContext:
    """Implements :class:`benchctl.procedures.base.StepContext` for one step."""

    def __init__(
        self,
        *,
        step: StepRecord,
        columns: tuple[str, ...],
        bench: Any,
        limits: base.Limits,
        board: base.BoardInfo,
        folder: Any,
        recorded: Mapping[str, Mapping[str, Any]],
        history: Mapping[str, StepRecord],
        clock: base.Clock,
        abort: AbortFlag,
        on_point: Callable[[StepRecord, Mapping[str, Any], bool], None],
        on_progress: Callable[[int, int | None, Mapping[str, Any] | None], None],
        log: logging.Logger,
        check: Callable[[], None] = lambda: None,
    ) -> None:
        self._step = step
        self._columns = columns
        self.bench = bench
        self.limits = limits
        self.board = board
        self.clock = clock
        self.log = log
        self.step_name = step.name
        self._folder = folder
        self._recorded = recorded
        self._history = history
        self._abort = abort
        self._on_point = on_point
        self._on_progress = on_progress
        self._check = check
        self.replayed = 0
        self.measured = 0

    # -- points -----------------------------------------------------------------------
    def point(self, key: str, measure: Callable[[], Mapping[str, Any]]) -> Mapping[str, Any]:
        if not isinstance(key, str) or not key or "/" in key or "\\" in key:
            raise ProcedureBug(f"step {self.step_name!r}: point key must be a non-empty name, got {key!r}")
        if key in self._step.rows:
            raise ProcedureBug(f"step {self.step_name!r}: point key {key!r} used twice")
        if key in self._recorded:
            row = dict(self._recorded[key])
            self._step.rows[key] = row
            self.replayed += 1
            self._on_point(self._step, row, True)
            return row
        self.check_abort()
        raw = measure()
        row = self._clean(key, raw)
        self._check()  # an instrument fault during the point: the point is not recorded
        self._folder.append_point(self._step.index, self._step.name, row, self._columns)
        self._step.rows[key] = row
        self.measured += 1
        self._on_point(self._step, row, False)
        return row

    def _clean(self, key: str, raw: Mapping[str, Any]) -> dict[str, Any]:
        unknown = [k for k in raw if k not in self._columns and k != "point"]
        if unknown:
            raise ProcedureBug(f"step {self.step_name!r}: row has undeclared columns {unknown}")
        row: dict[str, Any] = {"point": key}
        for col in self._columns:
            value = raw.get(col)
            if hasattr(value, "item") and not isinstance(value, _PLAIN):  # numpy scalar
                value = value.item()
            if not isinstance(value, _PLAIN):
                raise ProcedureBug(f"step {self.step_name!r}: column {col!r} holds {type(value).__name__}")
            row[col] = value
        return row

    def save_waveform(self, key: str, **arrays: Any) -> str:
        return self._folder.save_waveform(self._step.index, self._step.name, key, **arrays)

    # -- progress, history, abort ----------------------------------------------------------
    def progress(self, done: int, total: int | None, readings: Mapping[str, Any] | None = None) -> None:
        self._on_progress(done, total, readings)

    def _find(self, name: str) -> StepRecord:
        if name in self._history:
            return self._history[name]
        for rec in reversed(list(self._history.values())):
            if rec.procedure == name:
                return rec
        raise KeyError(f"no earlier step named {name!r} in this run")

    def earlier(self, name: str) -> Mapping[str, base.Result]:
        return dict(self._find(name).results)

    def earlier_points(self, name: str) -> list[Mapping[str, Any]]:
        return list(self._find(name).rows.values())

    def check_abort(self) -> None:
        if self._abort.is_set():
            raise AbortRequested(self._abort.reason or "abort requested")
