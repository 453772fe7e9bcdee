"""The two-part point (``ctx.point_later``) of the runner's context, and its use by the engine.

A point taken with ``point_later`` is acquired by ``measure`` (instrument work) and made into a
row by the ``finish`` it returns. The row may be made early, while the next point waits on an
instrument (``ctx.idle()``: computation only), but the point is RECORDED only after an
instrument check that ran after its ``measure`` ended: the ``ctx.checkpoint()`` called during
the next point's measure, or ``ctx.flush()``. A ``measure`` that never calls ``checkpoint`` is
checked and recorded at once. A failed check keeps the pending points out of the data; after
any other failure ``flush_after_failure`` checks once more and records what it can.

Unit level: a RunContext with a recording folder, check and callbacks. Engine level: a
test-only procedure on the recording fake bench of test_runner_engine.py. Real stack: a short
rail sweep through pyvisa-py sockets to the simulated bench, with supply faults between a
point's acquisition and the check that follows it.
"""

from __future__ import annotations

import csv
import logging

import numpy as np
import pytest
from test_runner_engine import FakeBench, FakeSupply

import benchctl.procedures.rail_sweep as rail_sweep
from benchctl.drivers.bench import load_bench_text, open_bench
from benchctl.errors import (
    AbortRequested,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    MeasurementError,
)
from benchctl.procedures import base
from benchctl.procedures.common import point_key, rail_grid
from benchctl.runner.context import AbortFlag, ProcedureBug, RunContext, StepRecord, SystemClock
from benchctl.runner.engine import EXIT_FAULT, EXIT_PASS, Events, execute
from benchctl.runner.plan import parse_plan
from benchctl.simulated import SimulatedBench
from benchctl.store import RunFolder

COLUMNS = ("v", "w")
LIMITS = base.Limits(max_rail_v=6.0, current_limit_a=0.05, ovp_v=6.6, ramp_v_per_s=5.0)
RIG_LOGGER = "benchctl.runner.test_point_later"


# --------------------------------------------------------------------------------------
# unit level: one RunContext with recording fakes


class _Folder:
    """Records append_point calls (and writes them into the rig's event log)."""

    def __init__(self, events):
        self.events = events
        self.appended = []

    def append_point(self, step_index, step_name, row, columns):
        self.appended.append((step_index, step_name, dict(row), tuple(columns)))
        self.events.append(("append", row["point"]))

    @property
    def keys(self):
        return [row["point"] for _, _, row, _ in self.appended]

    @property
    def rows(self):
        return [row for _, _, row, _ in self.appended]


def _supply_error():
    return InstrumentError(-222, "Data out of range", resource="fake::supply")


def _connection_lost():
    return ConnectionLost("socket closed", command="SYST:ERR?", resource="fake::supply")


class _Check:
    """The bench check: counts its calls; raises ``error()`` on the calls in ``fail_on``."""

    def __init__(self, events, fail_on=(), error=_supply_error):
        self.events = events
        self.fail_on = set(fail_on)
        self.error = error
        self.calls = 0

    def __call__(self):
        self.calls += 1
        self.events.append(("check", self.calls))
        if self.calls in self.fail_on:
            raise self.error()


class _Rig:
    """A RunContext for step 2 "sweep" with columns v, w, and everything it calls recorded."""

    def __init__(self, *, recorded=None, fail_checks=(), check_error=_supply_error, abort=None):
        self.events = []
        self.folder = _Folder(self.events)
        self.check = _Check(self.events, fail_checks, check_error)
        self.points = []  # on_point: (key, replayed)
        self.progress = []
        self.rows_seen = []  # then: (row, replayed)
        self.abort = abort or AbortFlag()
        self.step = StepRecord(2, "sweep", "fake_sweep")
        self.ctx = RunContext(
            step=self.step, columns=COLUMNS, bench=None, limits=LIMITS,
            board=base.BoardInfo("fake"), folder=self.folder, recorded=recorded or {},
            history={}, clock=SystemClock(), abort=self.abort,
            on_point=lambda rec, row, replayed: self.points.append((row["point"], replayed)),
            on_progress=lambda done, total, readings: self.progress.append(done),
            log=logging.getLogger(RIG_LOGGER), check=self.check)

    def measure(self, key, row=None, *, idle=False, checkpoint=False, error=None, finish=None):
        """A ``measure`` for point_later: logs its start and end; optionally calls ctx.idle()
        (first), raises ``error`` (then) and calls ctx.checkpoint(). Its ``finish`` logs and
        returns ``row`` (default v=1), or what the callable ``finish`` returns."""
        made = {"v": 1.0} if row is None else row

        def measure_():
            self.events.append(("measure", key))
            if idle:
                self.ctx.idle()
            if error is not None:
                raise error
            if checkpoint:
                self.ctx.checkpoint()
            self.events.append(("measured", key))

            def finish_():
                self.events.append(("finish", key))
                return made if finish is None else finish()
            return finish_
        return measure_

    def later(self, key, row=None, **kw):
        """A pipelined ``measure``, as measure_output_deferred does it: idle, then checkpoint."""
        return self.measure(key, row, idle=True, checkpoint=True, **kw)

    def then(self, row, replayed):
        self.events.append(("then", row["point"], replayed))
        self.rows_seen.append((dict(row), replayed))

    def at(self, event):
        return self.events.index(event)

    def count(self, kind):
        return sum(1 for e in self.events if e[0] == kind)

    def last_check_before(self, event):
        end = self.at(event)
        return max(i for i, e in enumerate(self.events[:end]) if e[0] == "check")


def _never_called():
    raise AssertionError("measure must not be called")


def _warned_about(caplog, key):
    """The warnings (of the rig's logger) that name the point ``key``."""
    return [r for r in caplog.records
            if r.name == RIG_LOGGER and r.levelno == logging.WARNING and key in r.getMessage().split()]


def test_a_point_is_recorded_only_at_the_check_during_the_next_points_measure():
    rig = _Rig()
    rig.ctx.point_later("a", rig.later("a"), rig.then)
    # nothing was pending at a's own checkpoint: no check, and a waits for one that follows it
    assert rig.check.calls == 0 and rig.folder.keys == [] and "a" not in rig.step.rows
    assert ("finish", "a") not in rig.events and rig.rows_seen == [] and rig.points == []
    rig.ctx.point_later("b", rig.later("b"), rig.then)
    # during b's measure: idle made a's row, checkpoint checked, then a was recorded
    assert (rig.at(("measure", "b")) < rig.at(("finish", "a")) < rig.at(("check", 1))
            < rig.at(("append", "a")) < rig.at(("then", "a", False)) < rig.at(("measured", "b")))
    assert rig.folder.keys == ["a"] and ("finish", "b") not in rig.events
    rig.ctx.flush()
    assert (rig.at(("check", 2)) < rig.at(("finish", "b")) < rig.at(("append", "b"))
            < rig.at(("then", "b", False)))
    assert rig.folder.keys == ["a", "b"] and rig.check.calls == 2
    assert list(rig.step.rows) == ["a", "b"] and rig.ctx.measured == 2
    assert rig.points == [("a", False), ("b", False)]
    assert rig.count("finish") == 2  # each row made once


def test_idle_makes_the_pending_rows_and_nothing_else():
    rig = _Rig()
    rig.ctx.idle()  # nothing pending: nothing to do
    assert rig.events == []
    rig.ctx.point_later("a", rig.measure("a", {"v": 2.5}, checkpoint=True), rig.then)
    before = len(rig.events)
    rig.ctx.idle()
    assert rig.events[before:] == [("finish", "a")]  # made: no check, nothing recorded, no then
    assert rig.folder.keys == [] and rig.points == [] and rig.rows_seen == []
    assert "a" not in rig.step.rows and rig.ctx.measured == 0
    rig.ctx.idle()  # a row is made once
    rig.ctx.flush()
    assert rig.events[before:] == [("finish", "a"), ("check", 1), ("append", "a"), ("then", "a", False)]
    assert rig.folder.rows == [{"point": "a", "v": 2.5, "w": None}]


@pytest.mark.parametrize("idle", [False, True], ids=["plain", "with-idle"])
def test_a_measure_that_never_calls_checkpoint_is_checked_and_recorded_at_once(idle):
    rig = _Rig()
    for n, key in enumerate(("a", "b"), start=1):
        rig.ctx.point_later(key, rig.measure(key, idle=idle), rig.then)
        assert rig.events[-5:] == [("measured", key), ("check", n), ("finish", key),
                                   ("append", key), ("then", key, False)]
    assert rig.folder.keys == ["a", "b"] and rig.check.calls == 2
    rig.ctx.flush()  # nothing pending: no check
    assert rig.check.calls == 2 and rig.folder.keys == ["a", "b"]


def test_a_measure_without_checkpoint_records_the_pending_points_with_its_own_oldest_first():
    rig = _Rig()
    rig.ctx.point_later("a", rig.later("a"), rig.then)
    rig.ctx.point_later("b", rig.measure("b"), rig.then)  # one check, after b, covers a and b
    assert rig.check.calls == 1
    assert rig.at(("measured", "b")) < rig.at(("check", 1)) < rig.at(("append", "a"))
    assert [e for e in rig.events if e[0] in ("append", "then")] == [
        ("append", "a"), ("then", "a", False), ("append", "b"), ("then", "b", False)]


def test_point_records_pending_rows_first_so_mixed_points_keep_their_order():
    rig = _Rig()
    seen_in_point = {}

    def plain(key):
        def measure():
            seen_in_point[key] = (list(rig.folder.keys), rig.check.calls)
            return {"v": 2.0}
        return measure

    rig.ctx.point_later("a", rig.later("a"), rig.then)
    rig.ctx.point("b", plain("b"))  # checks and records a first
    rig.ctx.point_later("c", rig.later("c"), rig.then)  # nothing pending: no check
    rig.ctx.point_later("d", rig.later("d"), rig.then)  # records c
    rig.ctx.point("e", plain("e"))  # checks and records d first
    rig.ctx.point_later("f", rig.later("f"), rig.then)
    rig.ctx.flush()
    assert rig.folder.keys == ["a", "b", "c", "d", "e", "f"]
    assert seen_in_point == {"b": (["a"], 1), "e": (["a", "b", "c", "d"], 4)}
    assert [k for k, _ in rig.points] == ["a", "b", "c", "d", "e", "f"]
    assert list(rig.step.rows) == ["a", "b", "c", "d", "e", "f"]
    assert rig.check.calls == 6  # one per point: point() checks before its measure and after it


def test_then_gets_the_cleaned_recorded_row_with_replayed_false():
    rig = _Rig()
    rig.ctx.point_later("a", rig.measure("a", {"v": np.float32(1.25)}), rig.then)
    rig.ctx.flush()
    (row, replayed), = rig.rows_seen
    assert row == {"point": "a", "v": 1.25, "w": None}  # key added, missing column None
    assert type(row["v"]) is float and replayed is False
    assert rig.folder.appended == [(2, "sweep", row, COLUMNS)]
    assert rig.step.rows["a"] == row
    assert rig.at(("append", "a")) < rig.at(("then", "a", False))  # on disk before then
    assert rig.points == [("a", False)]


@pytest.mark.parametrize("checkpoint", [False, True], ids=["recorded-at-once", "pending"])
def test_a_recorded_point_is_replayed_at_once_without_measure_after_older_rows(checkpoint):
    recorded = {"b": {"point": "b", "v": 7.0, "w": "x"}}
    rig = _Rig(recorded=recorded)
    rig.ctx.point_later("a", rig.measure("a", checkpoint=checkpoint), rig.then)
    rig.ctx.point_later("b", _never_called, rig.then)
    # b's then ran inside point_later, after a was checked, recorded and its then called
    assert rig.events[-1] == ("then", "b", True)
    assert (rig.at(("check", 1)) < rig.at(("append", "a")) < rig.at(("then", "a", False))
            < rig.at(("then", "b", True)))
    assert rig.rows_seen[-1] == (recorded["b"], True)
    assert rig.folder.keys == ["a"]  # a replayed row is not written again
    assert rig.points == [("a", False), ("b", True)]
    assert rig.check.calls == 1  # only a was checked
    assert (rig.ctx.measured, rig.ctx.replayed) == (1, 1)
    assert list(rig.step.rows) == ["a", "b"]


@pytest.mark.parametrize("checkpoint", [False, True], ids=["after-measure", "at-checkpoint"])
def test_the_bench_is_checked_once_per_point_after_the_measure_of_each_point_it_records(checkpoint):
    rig = _Rig()
    keys = ("a", "b", "c", "d")
    for key in keys:
        rig.ctx.point_later(key, rig.measure(key, idle=True, checkpoint=checkpoint), rig.then)
    rig.ctx.flush()
    assert rig.folder.keys == list(keys) and rig.check.calls == len(keys)
    for key, after in zip(keys, (*keys[1:], None), strict=True):
        check = rig.last_check_before(("append", key))
        assert rig.at(("measured", key)) < check  # the check followed the point's measure
        if checkpoint and after is not None:  # ... during the next point's measure
            assert rig.at(("measure", after)) < check < rig.at(("measured", after))
    rig.ctx.flush()
    assert rig.check.calls == len(keys)  # nothing pending: no check


def test_checkpoint_outside_a_point_later_measure_does_nothing():
    rig = _Rig()
    rig.ctx.checkpoint()
    assert rig.check.calls == 0

    def plain():
        rig.ctx.checkpoint()
        assert rig.check.calls == 0  # inside point(): point checks after measure itself
        return {"v": 1.0}

    rig.ctx.point("p", plain)
    assert rig.check.calls == 1

    def then(row, replayed):
        rig.ctx.checkpoint()  # the point is measured and checked already

    rig.ctx.point_later("a", rig.measure("a"), then)
    rig.ctx.flush()
    assert rig.check.calls == 2

    def broken():
        raise RuntimeError("a measure that fails")

    with pytest.raises(RuntimeError):
        rig.ctx.point_later("x", broken)
    rig.ctx.checkpoint()  # the failed measure is over
    assert rig.check.calls == 2


@pytest.mark.parametrize("where", ["at-checkpoint", "at-flush", "after-measure"])
def test_a_failed_check_keeps_the_pending_point_out_of_the_data(where, caplog):
    rig = _Rig(fail_checks={1})

    def take():
        if where == "after-measure":  # p1's own check, right after its measure
            rig.ctx.point_later("p1", rig.measure("p1"), rig.then)
            return
        rig.ctx.point_later("p1", rig.later("p1"), rig.then)
        if where == "at-checkpoint":  # during the next point's measure
            rig.ctx.point_later("p2", rig.later("p2"), rig.then)
        else:
            rig.ctx.flush()

    with pytest.raises(InstrumentError, match="Data out of range"):
        take()
    assert rig.check.calls == 1 and rig.folder.keys == []
    if where == "at-checkpoint":  # the fault interrupted p2's measure: p2 was not queued
        assert ("measured", "p2") not in rig.events
    with caplog.at_level(logging.WARNING, logger=RIG_LOGGER):
        lost = rig.ctx.flush_after_failure()
    assert lost == ["p1"]
    assert rig.check.calls == 1  # not checked again: the fault may have come from p1
    assert rig.folder.keys == [] and rig.step.rows == {} and rig.points == []
    assert rig.rows_seen == [] and rig.ctx.measured == 0
    assert len(_warned_about(caplog, "p1")) == 1
    assert ("finish", "p2") not in rig.events
    assert rig.ctx.flush_after_failure() == [] and rig.folder.keys == []  # nothing left


def test_points_pending_at_a_failed_check_stay_out_even_if_the_procedure_carries_on(caplog):
    """A procedure that catches the fault and goes on: the point pending when the check
    failed is never recorded, and later points are checked as usual."""
    rig = _Rig(fail_checks={1})
    rig.ctx.point_later("p1", rig.later("p1"), rig.then)
    with pytest.raises(InstrumentError):
        rig.ctx.point_later("p2", rig.later("p2"), rig.then)  # check 1 fails: p1 pending
    rig.ctx.point_later("p3", rig.later("p3"), rig.then)  # nothing pending: no check
    rig.ctx.point_later("p4", rig.later("p4"), rig.then)  # check 2 passes: p3 recorded
    assert rig.folder.keys == ["p3"]
    with caplog.at_level(logging.WARNING, logger=RIG_LOGGER):
        lost = rig.ctx.flush_after_failure()  # p1 lost; p4 checked (check 3) and kept
    assert lost == ["p1"] and rig.folder.keys == ["p3", "p4"]
    assert rig.check.calls == 3


@pytest.mark.parametrize("failure", ["abort", "analysis", "timeout"])
def test_after_another_failure_a_passing_check_keeps_the_pending_point(failure):
    rig = _Rig()
    rig.ctx.point_later("p1", rig.later("p1", {"v": 4.0, "w": "ok"}), rig.then)
    if failure == "abort":
        rig.abort.set("SIGTERM received")
        with pytest.raises(AbortRequested, match="SIGTERM"):
            rig.ctx.point_later("p2", _never_called, rig.then)
    else:
        error = (MeasurementError("output still clipped") if failure == "analysis"
                 else InstrumentTimeout("no reply", command="MEAS:VOLT?", timeout_s=0.1))
        with pytest.raises(type(error)):  # p2 fails before its checkpoint
            rig.ctx.point_later("p2", rig.later("p2", error=error), rig.then)
    assert rig.check.calls == 0 and rig.folder.keys == []
    assert rig.ctx.flush_after_failure() == []
    assert rig.check.calls == 1 and rig.at(("check", 1)) < rig.at(("append", "p1"))
    assert rig.folder.rows == [{"point": "p1", "v": 4.0, "w": "ok"}]
    assert rig.points == [("p1", False)] and list(rig.step.rows) == ["p1"]
    assert rig.rows_seen == []  # then is not called after a failure
    assert rig.ctx.flush_after_failure() == [] and rig.check.calls == 1  # nothing pending: no check


def test_an_abort_stops_before_measure_and_leaves_pending_rows_recordable():
    rig = _Rig()
    rig.ctx.point_later("a", rig.measure("a"), rig.then)
    rig.abort.set("SIGTERM received")
    with pytest.raises(AbortRequested, match="SIGTERM"):
        rig.ctx.point_later("b", _never_called, rig.then)
    assert rig.ctx.flush_after_failure() == []
    assert rig.folder.keys == ["a"]


def test_a_pending_point_is_lost_when_the_instruments_cannot_be_checked_after_a_failure(caplog):
    rig = _Rig(fail_checks={1}, check_error=_connection_lost)
    rig.ctx.point_later("p1", rig.later("p1"), rig.then)
    with pytest.raises(ConnectionLost):  # the next point's first command finds the link down
        rig.ctx.point_later("p2", rig.later("p2", error=_connection_lost()), rig.then)
    with caplog.at_level(logging.WARNING, logger=RIG_LOGGER):
        assert rig.ctx.flush_after_failure() == ["p1"]
    assert rig.check.calls == 1  # tried once
    assert rig.folder.keys == [] and rig.points == [] and rig.rows_seen == []
    assert len(_warned_about(caplog, "p1")) == 1


@pytest.mark.parametrize("bad", [
    pytest.param(lambda: 1 / 0, id="raises"),
    pytest.param(lambda: {"v": 1.0, "bogus": 2.0}, id="undeclared-column"),
    pytest.param(lambda: {"v": [1.0, 2.0]}, id="not-a-cell"),
])
def test_flush_after_failure_loses_a_point_whose_row_cannot_be_made(bad, caplog):
    rig = _Rig()
    rig.ctx.point_later("p1", rig.later("p1"), rig.then)
    rig.ctx.point_later("p2", rig.measure("p2", checkpoint=True, finish=bad), rig.then)
    assert rig.folder.keys == ["p1"]  # recorded at p2's checkpoint; p2 waits
    with caplog.at_level(logging.WARNING, logger=RIG_LOGGER):
        lost = rig.ctx.flush_after_failure()
    assert lost == ["p2"]
    assert rig.check.calls == 2  # p2 passed a check after the failure: only its row failed
    assert rig.folder.keys == ["p1"] and "p2" not in rig.step.rows
    assert [row["point"] for row, _ in rig.rows_seen] == ["p1"]
    assert len(_warned_about(caplog, "p2")) == 1 and _warned_about(caplog, "p1") == []
    assert rig.ctx.flush_after_failure() == [] and rig.folder.keys == ["p1"]  # nothing left
    assert rig.check.calls == 2


def test_flush_after_failure_records_a_pending_row_that_can_be_made():
    rig = _Rig()
    rig.ctx.point_later("a", rig.later("a", {"v": 4.0, "w": "ok"}), rig.then)
    assert rig.folder.keys == []
    assert rig.ctx.flush_after_failure() == []
    assert rig.folder.rows == [{"point": "a", "v": 4.0, "w": "ok"}]
    assert rig.points == [("a", False)] and rig.check.calls == 1
    assert rig.rows_seen == []


@pytest.mark.parametrize("when", ["flush", "idle", "next-measure"])
def test_a_finish_with_an_undeclared_column_is_a_procedure_bug_when_the_row_is_made(when):
    rig = _Rig()
    rig.ctx.point_later("a", rig.later("a", {"v": 1.0, "bogus": 2.0}), rig.then)  # no error yet
    with pytest.raises(ProcedureBug, match="bogus"):
        if when == "flush":
            rig.ctx.flush()
        elif when == "idle":
            rig.ctx.idle()
        else:  # made while the next point waits on an instrument
            rig.ctx.point_later("b", rig.later("b"), rig.then)
    assert rig.folder.keys == [] and "a" not in rig.step.rows
    assert not any(e[0] == "then" for e in rig.events)
    if when != "flush":  # found when the row was made, before any check
        assert rig.check.calls == 0 and ("measured", "b") not in rig.events


def _dup_recorded(rig):
    rig.ctx.point_later("a", rig.measure("a"))
    rig.ctx.flush()
    rig.ctx.point_later("a", _never_called)


def _dup_pending(rig):
    rig.ctx.point_later("a", rig.later("a"))
    rig.ctx.point_later("a", _never_called)


def _dup_inside_own_measure(rig):
    def measure():
        rig.ctx.point_later("a", _never_called)
        return lambda: {"v": 1.0}
    rig.ctx.point_later("a", measure)


def _dup_point_inside_own_measure(rig):
    def measure():
        rig.ctx.point("a", _never_called)
        return lambda: {"v": 1.0}
    rig.ctx.point_later("a", measure)


def _dup_point_of_a_pending_key(rig):
    rig.ctx.point_later("a", rig.later("a"))
    rig.ctx.point("a", _never_called)


def _dup_replayed(rig):
    rig.ctx.point_later("r", _never_called)
    rig.ctx.point_later("r", _never_called)


@pytest.mark.parametrize("use", [_dup_recorded, _dup_pending, _dup_inside_own_measure,
                                 _dup_point_inside_own_measure, _dup_point_of_a_pending_key,
                                 _dup_replayed], ids=lambda f: f.__name__[5:])
def test_a_key_used_twice_is_a_procedure_bug(use):
    rig = _Rig(recorded={"r": {"point": "r", "v": 3.0, "w": None}})
    with pytest.raises(ProcedureBug, match="used twice"):
        use(rig)
    rig.ctx.flush_after_failure()
    keys = rig.folder.keys + [k for k, replayed in rig.points if replayed]
    assert len(keys) == len(set(keys)) <= 1  # never two rows for one key


# --------------------------------------------------------------------------------------
# engine level: _run_step flushes at the end of the step, and after a failure

TAKEN: list[tuple[str, bool]] = []


class _TrippingSupply(FakeSupply):
    """The fake supply, with an over-voltage latch the bench check reads."""

    tripped = False

    def trip(self):
        self.calls.append(("supply", "trip"))
        self.tripped, self.on = True, False

    def protection_tripped(self):
        return self.tripped


@base.register
class _Later(base.Procedure):
    """Test-only: `n` points by ctx.point_later, never flushed by the procedure itself.

    Each measure sets the rail, then (pipelined) makes the earlier rows (ctx.idle) and calls
    ctx.checkpoint, as measure_output_deferred does. fail: "timeout" / "abort" / "analysis"
    -- the last measure fails after setting its rail, before its checkpoint; "finish" -- the
    next-to-last row cannot be made, and the last measure times out; "column" -- the last
    row has an undeclared column; "trip" -- the supply's protection trips during the
    next-to-last point, after its checkpoint; "trip_last" -- the same during the last point.
    """

    name = "test_point_later"
    summary = "test-only"
    params = (base.Param("n", int, default=4),
              base.Param("fail", str, default="none",
                         choices=("none", "timeout", "abort", "analysis", "finish", "column",
                                  "trip", "trip_last")),
              base.Param("pipelined", bool, default=True))
    columns = (base.Column("rail_v", "V"), base.Column("value", ""))
    results = ("count",)

    def run(self, ctx, params):
        ctx.bench.supply.output(True)
        n, fail = params["n"], params["fail"]
        for i in range(n):
            def measure(i=i):
                ctx.bench.supply.set_voltage(1.0 + i)
                if i == n - 1 and fail in ("timeout", "finish"):
                    raise InstrumentTimeout("no reply", command="MEAS:VOLT?", timeout_s=0.1)
                if i == n - 1 and fail == "abort":
                    raise AbortRequested("SIGTERM received")
                if i == n - 1 and fail == "analysis":
                    raise MeasurementError("output still clipped")
                if params["pipelined"]:
                    ctx.idle()
                    ctx.checkpoint()
                if (fail, i) in (("trip", n - 2), ("trip_last", n - 1)):
                    ctx.bench.supply.trip()

                def finish():
                    if i == n - 2 and fail == "finish":
                        raise ValueError("cannot make this row")
                    row = {"rail_v": 1.0 + i, "value": 0.5 * i}
                    if i == n - 1 and fail == "column":
                        row["bogus"] = 1.0
                    return row
                return finish
            ctx.point_later(f"p{i:03d}", measure, lambda row, replayed: TAKEN.append((row["point"], replayed)))
        return [base.Result("count", float(n), "")]


def _later_plan(n=4, fail="none", pipelined=True):
    return parse_plan(f"""
[board]
name = "fake"
[limits]
max_rail_v = 6.0
current_limit_a = 0.05
ovp_v = 6.6
ramp_v_per_s = 5.0
[[steps]]
procedure = "test_point_later"
name = "later"
[steps.params]
n = {n}
fail = "{fail}"
pipelined = {str(pipelined).lower()}
""", file="plan.toml")


class _Recorder(Events):
    def __init__(self):
        self.points = []
        self.progress = []
        self.finished = []

    def point(self, step_name, row, replayed):
        self.points.append((row["point"], replayed))

    def step_progress(self, step_name, done, total, readings):
        self.progress.append((done, total, dict(readings or {})))

    def step_finished(self, step_name, results):
        self.finished.append(step_name)


def _run_later(tmp_path, **kw):
    TAKEN.clear()
    plan = _later_plan(**kw)
    bench = FakeBench()
    bench.supply = _TrippingSupply(bench.calls)
    folder = RunFolder.create(tmp_path / "run", plan_text=plan.text, bench_text="", meta={})
    events = _Recorder()
    out = execute(plan, open_bench=lambda: bench, folder=folder, events=events)
    disk = [r["point"] for r in RunFolder.open(folder.path).points(0, "later")]
    return out, bench, events, disk


def _keys(n):
    return [f"p{i:03d}" for i in range(n)]


@pytest.mark.parametrize("pipelined", [True, False], ids=["pipelined", "checked-after-measure"])
def test_the_engine_records_rows_left_pending_when_the_step_ends(tmp_path, pipelined):
    out, bench, events, disk = _run_later(tmp_path, n=4, pipelined=pipelined)
    assert out.exit_code == EXIT_PASS and out.status == "complete"
    keys = _keys(4)
    assert disk == keys and events.points == [(k, False) for k in keys]
    assert TAKEN == [(k, False) for k in keys]
    assert out.measured == 4 and events.finished == ["later"]
    # one bench check per point, and one after the last point's commands
    calls = bench.calls[bench.calls.index(("supply", "output", True)):]
    assert calls.count(("supply", "check_errors")) == 4
    last_set = calls.index(("supply", "set_voltage", 4.0))
    assert ("supply", "check_errors") in calls[last_set:]


@pytest.mark.parametrize(("fail", "status", "words"), [
    ("timeout", "failed", "no reply"),
    ("abort", "aborted", "SIGTERM"),
    ("analysis", "failed", "still clipped"),
])
def test_a_failing_step_still_records_its_pending_point_when_the_check_passes(tmp_path, fail, status, words):
    out, bench, events, disk = _run_later(tmp_path, n=4, fail=fail)
    assert out.exit_code == EXIT_FAULT and out.status == status and words in out.message
    assert disk == _keys(3)  # p002 was pending when p003 failed
    assert events.points == [(k, False) for k in _keys(3)]
    assert TAKEN == [(k, False) for k in _keys(2)]  # no then after the failure
    assert out.safe_state.verified and not bench.supply.on
    assert events.finished == []


def test_a_row_that_cannot_be_made_after_a_failure_is_logged_and_the_first_fault_reported(tmp_path, caplog):
    with caplog.at_level(logging.WARNING, logger="benchctl.runner"):
        out, bench, _, disk = _run_later(tmp_path, n=4, fail="finish")
    assert out.exit_code == EXIT_FAULT and "no reply" in out.message  # the timeout, not the row
    assert disk == _keys(2)
    assert any("p002" in r.getMessage().split() and r.levelno == logging.WARNING
               for r in caplog.records)
    assert out.safe_state.verified and not bench.supply.on


def test_an_undeclared_column_found_at_the_steps_flush_is_a_procedure_bug(tmp_path):
    out, bench, _, disk = _run_later(tmp_path, n=3, fail="column")
    assert out.exit_code == EXIT_FAULT and "ProcedureBug" in out.message and "bogus" in out.message
    assert disk == ["p000", "p001"]
    assert out.safe_state.verified and not bench.supply.on


@pytest.mark.parametrize(("fail", "tripped"), [("trip", 2), ("trip_last", 3)],
                         ids=["found-at-next-checkpoint", "found-at-steps-flush"])
def test_a_trip_after_a_points_checkpoint_keeps_that_point_out_of_the_data(tmp_path, caplog, fail, tripped):
    with caplog.at_level(logging.WARNING, logger="benchctl.runner"):
        out, bench, events, disk = _run_later(tmp_path, n=4, fail=fail)
    assert out.exit_code == EXIT_FAULT and out.status == "failed"
    assert "protection tripped" in out.message, out.message
    lost = f"p{tripped:03d}"
    assert disk == _keys(tripped) and lost not in disk
    assert events.points == [(k, False) for k in _keys(tripped)]
    assert (lost, False) not in TAKEN
    assert any(lost in r.getMessage().split() for r in caplog.records if r.levelno == logging.WARNING)
    if fail == "trip":  # the last point was never recorded either: its measure was cut short
        assert ("supply", "set_voltage", 4.0) in bench.calls and "p003" not in disk
    meta = RunFolder.open(tmp_path / "run").meta
    assert meta["status"] == "failed" and meta["points_measured"] == tripped
    assert out.safe_state.verified and not bench.supply.on


# --------------------------------------------------------------------------------------
# real stack: a short rail sweep on the simulated bench

SWEEP = dict(start_v=3.0, stop_v=5.0, step_v=0.5)
SWEEP_PLAN = f"""
[board]
name = "beacon"
revision = "B"
serial = "B0001"

[limits]
max_rail_v = 6.0
current_limit_a = 0.05
ovp_v = 6.5
ramp_v_per_s = 50.0

[[steps]]
procedure = "rail_sweep"
name = "sweep"
[steps.params]
start_v = {SWEEP["start_v"]}
stop_v = {SWEEP["stop_v"]}
step_v = {SWEEP["step_v"]}
down = false
records = 2
settle_timeout_s = 0.5
"""
RAILS = rail_grid(SWEEP["start_v"], SWEEP["stop_v"], SWEEP["step_v"])
KEYS = [point_key("up", f"{i:03d}", v) for i, v in enumerate(RAILS)]
HEADER = ["point", *(c.name for c in rail_sweep.RailSweep.columns)]


class _SupplyFaultBeforePoint(AbortFlag):
    """Arms a fault on the simulated supply as the sweep asks whether to stop before point
    ``index``: then rows 0..index-2 are on disk and point index-1 is acquired but pending."""

    def __init__(self, sim, events, folder, index, fault, kw):
        super().__init__()
        self.sim, self.events, self.folder = sim, events, folder
        self.index, self.fault, self.kw = index, fault, kw
        self.on_disk_at_fault = None

    def is_set(self):
        if self.on_disk_at_fault is None and len(self.events.points) == self.index - 1:
            self.on_disk_at_fault = [r["point"] for r in self.folder.points(0, "sweep")]
            self.sim.inject("supply", self.fault, **self.kw)
        return super().is_set()


class _TripDuringRecords:
    """Wraps the opened bench's ``scope.wait_complete`` and ``scope.wait_and_fetch`` (the
    waits for a record's completion): the ``nth`` wait after ``rows`` rows were reported trips
    the simulated supply's over-voltage protection -- while the scope acquires a record of
    point ``rows``, after that point's checkpoint. Notes what had been reported and the
    supply's state at that moment."""

    def __init__(self, sim, events, rows, nth):
        self.sim, self.events, self.rows, self.nth = sim, events, rows, nth
        self.calls = 0
        self.reported_at_trip = None
        self.supply_at_trip = None

    def _maybe_trip(self):
        if self.reported_at_trip is None and len(self.events.points) >= self.rows:
            self.calls += 1
            if self.calls == self.nth:
                self.reported_at_trip = [k for k, _ in self.events.points]
                self.supply_at_trip = self.sim.supply_state()
                self.sim.inject("supply", "trip_ovp")

    def __call__(self, bench):
        wait, wait_and_fetch = bench.scope.wait_complete, bench.scope.wait_and_fetch

        def wait_complete(**kw):
            self._maybe_trip()
            return wait(**kw)

        def wait_and_fetch_(*args, **kw):
            self._maybe_trip()
            return wait_and_fetch(*args, **kw)

        bench.scope.wait_complete = wait_complete
        bench.scope.wait_and_fetch = wait_and_fetch_
        return bench


def _sweep(sim, run_dir, *, resume=False, fault=None, wrap=None):
    plan = parse_plan(SWEEP_PLAN, file="plan.toml")
    if resume:
        folder = RunFolder.open(run_dir)
    else:
        folder = RunFolder.create(run_dir, plan_text=plan.text, bench_text="", meta={})
    cfg = load_bench_text(sim.bench_toml().replace("timeout_s = 5.0", "timeout_s = 1.0"))
    events = _Recorder()
    flag = _SupplyFaultBeforePoint(sim, events, folder, 3, *fault) if fault else AbortFlag()
    wrap = wrap(events) if wrap else (lambda bench: bench)
    out = execute(plan, open_bench=lambda: wrap(open_bench(cfg, max_voltage_v=plan.limits.max_rail_v)),
                  folder=folder, events=events, abort=flag, resume=resume)
    return out, events, flag


def _on_disk(run_dir):
    folder = RunFolder.open(run_dir)
    with folder.points_file(0, "sweep").open(newline="", encoding="utf-8") as fh:
        header = next(csv.reader(fh))
    rows = folder.points(0, "sweep")
    assert folder.damage == ()
    return header, rows


def _assert_safe(sim):
    supply, gen = sim.supply_state(), sim.generator_state()
    assert supply["output_on"] is False, supply
    assert gen["output_on"] is False, gen
    assert supply["setpoint_v"] <= 0.05, supply


def test_a_sweep_records_every_point_in_rail_order_with_the_sweep_columns(tmp_path):
    with SimulatedBench(board="beacon", seed=3) as sim:
        out, events, _ = _sweep(sim, tmp_path / "run")
        _assert_safe(sim)
    assert out.exit_code == EXIT_PASS and out.status == "complete", out.message
    header, rows = _on_disk(tmp_path / "run")
    assert header == HEADER
    assert [r["point"] for r in rows] == KEYS
    assert [r["rail_set_v"] for r in rows] == RAILS
    for r in rows:
        assert set(r) == set(HEADER)
        assert r["branch"] == "up" and r["round"] == 0
        assert r["rail_v"] == pytest.approx(r["rail_set_v"], abs=0.02)  # readback at the point
        assert r["records"] >= 1 and r["osc_evidence"]
    assert events.points == [(k, False) for k in KEYS]  # measured, in the order on disk
    # the sweep's then-callback reported each row, in order, with that row's readings
    assert [(done, total) for done, total, _ in events.progress] == [(i + 1, len(RAILS)) for i in range(len(RAILS))]
    assert [p["rail_v"] for _, _, p in events.progress] == RAILS
    assert [p["vpp_v"] for _, _, p in events.progress] == [r["vpp_v"] for r in rows]
    assert out.measured == len(RAILS) and out.replayed == 0


FAULT_CASES = [
    pytest.param(("drop_after", {"n": 0}), "ConnectionLost", id="supply-drop"),
    pytest.param(("trip_ovp", {}), "protection tripped", id="supply-trip_ovp"),
]


@pytest.mark.parametrize(("fault", "words"), FAULT_CASES)
def test_a_supply_fault_mid_sweep_loses_the_pending_point_and_keeps_the_ones_before(tmp_path, fault, words):
    with SimulatedBench(board="beacon", seed=3) as sim:
        out, events, flag = _sweep(sim, tmp_path / "run", fault=fault)
        sim.clear_faults()
        _assert_safe(sim)
    assert out.exit_code == EXIT_FAULT and out.status == "failed"
    assert words.lower() in out.message.lower(), out.message
    assert flag.on_disk_at_fault == KEYS[:2]  # when the fault struck, the third point was pending
    header, rows = _on_disk(tmp_path / "run")
    assert header == HEADER
    assert [r["point"] for r in rows] == KEYS[:2]  # the pending point cannot be told clean
    assert [r["rail_set_v"] for r in rows] == RAILS[:2]
    assert events.points == [(k, False) for k in KEYS[:2]]
    assert [(done, total) for done, total, _ in events.progress] == [(1, len(RAILS)), (2, len(RAILS))]
    meta = RunFolder.open(tmp_path / "run").meta
    assert meta["status"] == "failed" and meta["points_measured"] == 2
    if fault[0] == "trip_ovp":  # the supply still answers: the safe state is read back
        assert out.safe_state.verified


def test_resume_after_a_mid_sweep_fault_replays_the_kept_points_and_measures_the_rest(tmp_path):
    run_dir = tmp_path / "run"
    with SimulatedBench(board="beacon", seed=3) as sim:
        first, _, _ = _sweep(sim, run_dir, fault=("drop_after", {"n": 0}))
    assert first.exit_code == EXIT_FAULT
    _, kept = _on_disk(run_dir)
    assert [r["point"] for r in kept] == KEYS[:2]
    with SimulatedBench(board="beacon", seed=3) as sim:  # a fresh bench: new ports
        out, events, _ = _sweep(sim, run_dir, resume=True)
        _assert_safe(sim)
    assert out.exit_code == EXIT_PASS, out.message
    assert (out.replayed, out.measured) == (2, len(RAILS) - 2)  # the lost point is measured again
    assert events.points == [(k, True) for k in KEYS[:2]] + [(k, False) for k in KEYS[2:]]
    header, rows = _on_disk(run_dir)
    assert header == HEADER and [r["point"] for r in rows] == KEYS
    assert rows[:2] == kept  # replayed, not measured again
    assert [p["rail_v"] for _, _, p in events.progress] == RAILS


TRIP_CASES = [
    pytest.param(2, 1, id="third-point-first-record"),
    pytest.param(2, 2, id="third-point-second-record"),
    pytest.param(len(RAILS) - 1, 1, id="last-point-first-record"),
    pytest.param(len(RAILS) - 1, 2, id="last-point-second-record"),
]


@pytest.mark.parametrize(("index", "nth"), TRIP_CASES)
def test_an_ovp_trip_during_a_points_records_keeps_that_point_out_of_the_data(tmp_path, index, nth):
    """Regression: the point's own check ran before its records, and its row was recorded
    before the next check, so a trip during its records left it in the data."""
    trips = []

    def wrap(events):
        trips.append(_TripDuringRecords(sim, events, index, nth))
        return trips[-1]

    with SimulatedBench(board="beacon", seed=3) as sim:
        out, events, _ = _sweep(sim, tmp_path / "run", wrap=wrap)
        sim.clear_faults()
        _assert_safe(sim)
    trip, = trips
    # the trip struck while the point was at its rail, after the points before it were recorded
    assert trip.reported_at_trip == KEYS[:index]
    assert trip.supply_at_trip["output_on"] is True
    assert trip.supply_at_trip["setpoint_v"] == pytest.approx(RAILS[index])
    assert out.exit_code == EXIT_FAULT and out.status == "failed", out.message
    assert "protection tripped" in out.message, out.message
    assert out.safe_state.verified
    header, rows = _on_disk(tmp_path / "run")
    assert header == HEADER
    assert [r["point"] for r in rows] == KEYS[:index]
    assert RAILS[index] not in [r["rail_set_v"] for r in rows]
    assert events.points == [(k, False) for k in KEYS[:index]]
    assert len(events.progress) == index
    assert RunFolder.open(tmp_path / "run").meta["points_measured"] == index


def test_resume_after_a_trip_during_the_last_point_measures_that_point_again(tmp_path):
    run_dir = tmp_path / "run"
    last = len(RAILS) - 1
    with SimulatedBench(board="beacon", seed=3) as sim:
        first, _, _ = _sweep(sim, run_dir, wrap=lambda events: _TripDuringRecords(sim, events, last, 2))
    assert first.exit_code == EXIT_FAULT
    _, kept = _on_disk(run_dir)
    with SimulatedBench(board="beacon", seed=3) as sim:
        out, events, _ = _sweep(sim, run_dir, resume=True)
        _assert_safe(sim)
    assert out.exit_code == EXIT_PASS, out.message
    assert (out.replayed, out.measured) == (last, 1)
    assert events.points == [(k, True) for k in KEYS[:last]] + [(KEYS[last], False)]
    _, rows = _on_disk(run_dir)
    assert [r["point"] for r in rows] == KEYS and rows[:last] == kept
    assert rows[last]["rail_v"] == pytest.approx(RAILS[last], abs=0.02)
