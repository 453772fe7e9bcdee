"""The runner's side of the procedure interface: one :class:`RunContext` per step.

It records each point in the run folder as it is taken (flushed per point) and, on a
resumed run, hands back the recorded row for a key instead of measuring it again.

A point taken with :meth:`RunContext.point_later` is taken in two parts: the
procedure's ``measure`` does the instrument work and returns ``finish`` (pure
computation). The row is made while the next point waits on an instrument
(:meth:`RunContext.idle`) and recorded after the instrument check that follows the point
(:meth:`RunContext.checkpoint`, during the next point's acquisition, or
:meth:`RunContext.flush`) -- at the latest when the step ends; when it ends by an
exception, :meth:`RunContext.flush_after_failure` keeps what is safe to keep.
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


@dataclass
class _Pending:
    """A point_later point acquired and not yet recorded."""

    key: str
    finish: Callable[[], Mapping[str, Any]]
    then: Callable[[Mapping[str, Any], bool], None] | None
    row: dict[str, Any] | None = None

    def make(self, ctx: RunContext) -> None:
        if self.row is None:
            self.row = ctx._clean(self.key, self.finish())


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
        # point_later: points acquired but not yet recorded, oldest first
        self._pending: list[_Pending] = []
        self._later_key: str | None = None  # the point_later point being measured
        self._checked_during = False  # ... and whether checkpoint() ran during it
        self._tainted: list[str] = []  # pending when a check failed: not kept (keys)

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
        makes the row from what was acquired without touching the instruments. A point is
        recorded only after an instrument check that ran after its ``measure`` ended: the
        :meth:`checkpoint` of the next point (while the scope acquires) or :meth:`flush`.
        When ``measure`` does not call :meth:`checkpoint`, the check follows it and the row
        is recorded at once. A recorded point (resume) calls ``then`` at once, without
        ``measure``.
        """
        self._check_key(key)
        if key in self._recorded:
            self.flush()
            row = self._replay(key)
            if then is not None:
                then(row, True)
            return
        self.check_abort()
        self._later_key, self._checked_during = key, False
        try:
            finish = measure()
        finally:
            self._later_key = None
        self._pending.append(_Pending(key, finish, then))
        if not self._checked_during:
            self.flush()  # nothing checked during the point: check and record now

    def idle(self) -> None:
        """The procedure waits on an instrument: make the rows of the points taken earlier.

        Pure computation, no instrument I/O and nothing recorded yet (that waits for the
        check, :meth:`checkpoint`).
        """
        for p in self._pending:
            p.make(self)

    def checkpoint(self) -> None:
        """Check the instruments now and record the points taken earlier (during point_later).

        Called by measuring code inside a :meth:`point_later` measure, after the commands of
        the new point to the supply and generator (while the scope acquires): the check
        then covers every command of the earlier points, which are recorded. A failed check
        keeps them out of the data. Does nothing outside a ``point_later`` measure.
        """
        if self._later_key is None:
            return
        self._checked_during = True
        if self._pending:
            self._verify()
            self._record_pending()

    def flush(self) -> None:
        """Check the instruments (if points are pending) and record every pending point."""
        if self._pending:
            self._verify()
            self._record_pending()

    def flush_after_failure(self) -> list[str]:
        """After a failure: record the pending points that can be; returns the others' keys.

        A pending point is kept when an instrument check still passes after the failure
        (an abort, an analysis error) and its row can be made; not when the failure was a
        check that found a fault (the fault may have come from that point) or when the
        instruments cannot be checked any more.
        """
        lost = []
        for key in self._tainted:
            self.log.warning("point %s is not recorded: the instrument check that followed it "
                             "found a fault", key)
            lost.append(key)
        self._tainted.clear()
        if not self._pending:
            return lost
        reason = ""
        try:
            self._check()
        except Exception as exc:  # the step has failed already: keep what can be kept
            reason = f"the instruments could not be checked after it ({exc})"
        while self._pending:
            p = self._pending[0]
            why = reason
            if not why:
                try:
                    p.make(self)
                    self._record(p.key, p.row)
                except Exception as exc:
                    why = f"its row could not be made ({exc})"
            if why:
                self.log.warning("point %s is not recorded: %s", p.key, why)
                lost.append(p.key)
            self._pending.pop(0)
        return lost

    def _verify(self) -> None:
        try:
            self._check()
        except Exception:  # (an interrupt leaves them to flush_after_failure's own check)
            # the fault may have come from these points: they leave the queue unrecorded
            self._tainted.extend(p.key for p in self._pending)
            self._pending.clear()
            raise

    def _record_pending(self) -> None:
        while self._pending:
            p = self._pending[0]
            p.make(self)
            self._record(p.key, p.row)
            self._pending.pop(0)
            if p.then is not None:
                p.then(p.row, False)

    def _check_key(self, key: str) -> None:
        if not isinstance(key, str) or not key or "/" in key or "\\" in key:
            raise ProcedureBug(f"step {self.step_name!r}: point key must be a non-empty name, got {key!r}")
        if key in self._step.rows or any(key == p.key for p in self._pending) or key == self._later_key:
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
