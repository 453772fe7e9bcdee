"""The runner's side of the procedure interface: one :class:`RunContext` per step.

It records each point in the run folder as it is taken (flushed per point) and, on a
resumed run, hands back the recorded row for a key instead of measuring it again.

A point taken with :meth:`RunContext.point_later` is recorded in two parts: the
procedure's ``measure`` does the instrument work and returns ``finish`` (pure
computation), and the row is made and recorded while the next point waits on an
instrument (:meth:`RunContext.idle`), or at :meth:`RunContext.flush` -- at the latest when
the step ends, also when it ends by an exception.
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
        # point_later: rows acquired but not yet made, oldest first (key, finish, then)
        self._pending: list[tuple[str, Callable[[], Mapping[str, Any]], Callable | None]] = []
        self._later_key: str | None = None  # the point_later point being measured
        self._checked = False  # ... and whether checkpoint() checked the bench during it

    # -- points -----------------------------------------------------------------------
    def point(self, key: str, measure: Callable[[], Mapping[str, Any]]) -> Mapping[str, Any]:
        self._check_key(key)
        if key in self._recorded:
            self.flush()
            return self._replay(key)
        self.flush()  # rows are recorded in the order their points were taken
        self.check_abort()
        raw = measure()
        row = self._clean(key, raw)
        self._check()  # an instrument fault during the point: the point is not recorded
        self._record(key, row)
        return row

    def point_later(self, key: str, measure: Callable[[], Callable[[], Mapping[str, Any]]],
                    then: Callable[[Mapping[str, Any], bool], None] | None = None) -> None:
        """Take a point whose row is made later; ``then(row, replayed)`` gets the row.

        ``measure()`` does the instrument work and returns ``finish``: a callable that
        makes the row from what was acquired without touching the instruments. The bench
        is checked after ``measure`` (or, earlier, by :meth:`checkpoint` during it); the
        row is made and recorded at the next :meth:`idle` or :meth:`flush`. A recorded
        point (resume) calls ``then`` at once, without ``measure``.
        """
        self._check_key(key)
        if key in self._recorded:
            self.flush()
            row = self._replay(key)
            if then is not None:
                then(row, True)
            return
        self.check_abort()
        self._later_key, self._checked = key, False
        try:
            finish = measure()
            if not self._checked:
                self._check()  # an instrument fault during the point: it is not recorded
        finally:
            self._later_key = None
        self.flush()  # older rows first (when measure never called idle)
        self._pending.append((key, finish, then))

    def idle(self) -> None:
        """The procedure waits on an instrument: make and record the rows taken earlier.

        Pure computation and the run folder only; no instrument I/O.
        """
        self.flush()

    def checkpoint(self) -> None:
        """Check the instruments now, for the point being measured by :meth:`point_later`.

        Called by measuring code once its commands to the supply and generator are done
        (while the scope acquires), so the check costs no time of its own. Does nothing
        outside a ``point_later`` measure.
        """
        if self._later_key is not None:
            self._check()
            self._checked = True

    def flush(self) -> None:
        """Make and record every row still waiting (oldest first)."""
        while self._pending:
            key, finish, then = self._pending.pop(0)
            row = self._clean(key, finish())
            self._record(key, row)
            if then is not None:
                then(row, False)

    def flush_after_failure(self) -> list[str]:
        """After a failure: record what can still be made; returns the keys that could not."""
        lost = []
        while self._pending:
            key, finish, _ = self._pending.pop(0)
            try:
                self._record(key, self._clean(key, finish()))
            except Exception as exc:  # the step has failed already: keep what can be kept
                self.log.warning("point %s could not be recorded after the failure: %s", key, exc)
                lost.append(key)
        return lost

    def _check_key(self, key: str) -> None:
        if not isinstance(key, str) or not key or "/" in key or "\\" in key:
            raise ProcedureBug(f"step {self.step_name!r}: point key must be a non-empty name, got {key!r}")
        if key in self._step.rows or any(key == p[0] for p in self._pending) or key == self._later_key:
            raise ProcedureBug(f"step {self.step_name!r}: point key {key!r} used twice")

    def _replay(self, key: str) -> dict[str, Any]:
        row = dict(self._recorded[key])
        self._step.rows[key] = row
        self.replayed += 1
        self._on_point(self._step, row, True)
        return row

    def _record(self, key: str, row: dict[str, Any]) -> None:
        self._folder.append_point(self._step.index, self._step.name, row, self._columns)
        self._step.rows[key] = row
        self.measured += 1
        self._on_point(self._step, row, False)

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
