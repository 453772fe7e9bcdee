"""Procedures on a dict-backed test context: thresholds, sweep, replay without measuring.

The bench here is a small in-process physical model (hysteresis between a dropout and a
start-up voltage, Vpp linear in the rail, white noise), so the procedures' decisions can be
checked against known thresholds; the end-to-end checks through the simulated bench's
sockets live in test_procedures_e2e.py.
"""

from __future__ import annotations

import logging
import math
from types import SimpleNamespace

import numpy as np
import pytest

from benchctl.procedures import base
from benchctl.procedures.base import BoardInfo, Limits

DROPOUT_V, STARTUP_V = 2.6131, 3.0077
NOISE_V = 0.002


class FakeClock:
    def __init__(self):
        self.t = 0.0

    def monotonic(self):
        return self.t

    def sleep(self, seconds):
        self.t += max(0.0, seconds)


class Board:
    """Hysteresis oscillator: stops below DROPOUT_V, starts at or above STARTUP_V."""

    def __init__(self):
        self.rail_v = 0.0
        self.on = False
        self.osc = False

    def update(self):
        if not self.on or self.rail_v < DROPOUT_V:
            self.osc = False
        elif self.rail_v >= STARTUP_V:
            self.osc = True

    def vpp(self):
        return 0.6 * self.rail_v - 1.02 if self.osc else 0.0


class FakeSupply:
    def __init__(self, board):
        self.b = board
        self.setpoint_v = 0.0

    def set_voltage(self, v):
        self.setpoint_v = v
        if self.b.on:
            self.b.rail_v = v
            self.b.update()

    def ramp_to(self, v, *, rate_v_per_s):
        assert rate_v_per_s > 0
        self.set_voltage(v)

    def output(self, on):
        self.b.on = bool(on)
        self.b.rail_v = self.setpoint_v if on else 0.0
        self.b.update()

    def is_output_on(self):
        return self.b.on

    def wait_settled(self, target_v, *, tol_v, timeout_s):
        return self.b.rail_v

    def measure_voltage(self):
        return self.b.rail_v

    def measure_current(self):
        return (0.008 + 0.003 * self.b.rail_v) if self.b.osc else 0.002 * self.b.on


class FakeScope:
    def __init__(self, board):
        self.b = board
        self.acquisitions = 0
        self.window_s, self.rate_hz = 200e-6, 20e6
        self.rng = np.random.default_rng(3)
        self.last = None

    def autoscale(self, channel, **kw):
        self.window_s, self.rate_hz = 200e-6, 20e6

    def setup_channel(self, channel, **kw):
        pass

    def set_timebase(self, *, window_s, sample_rate_hz, check=True):
        self.window_s, self.rate_hz = window_s, sample_rate_hz

    def set_trigger(self, **kw):
        pass

    def acquire(self, *, timeout_s):
        self.acquisitions += 1
        n = int(round(self.window_s * self.rate_hz))
        t = np.arange(n) / self.rate_hz
        y = self.b.vpp() / 2 * np.sin(2 * np.pi * 1.0e6 * t + 0.3)
        self.last = y + self.rng.normal(0, NOISE_V, n)

    def fetch(self, channel):
        return SimpleNamespace(volts=self.last, dt_s=1 / self.rate_hz, t0_s=0.0, clipped_samples=0)


class Exploding:
    """Stands in for every instrument on replay: any use fails the test."""

    def __getattr__(self, name):
        raise AssertionError(f"instrument used on replay: {name}")


class DictContext:
    """A dict-backed StepContext: records rows by key, returns recorded ones on replay."""

    def __init__(self, bench, recorded=None, earlier=None):
        self.bench = bench
        self.limits = Limits(max_rail_v=6.0, current_limit_a=0.1, ovp_v=6.5, ramp_v_per_s=20.0)
        self.board = BoardInfo("fake")
        self.clock = FakeClock()
        self.log = logging.getLogger("test")
        self.step_name = "step"
        self.recorded = dict(recorded or {})
        self.rows = {}
        self.measured = 0
        self._earlier = earlier or {}

    def point(self, key, measure):
        assert key not in self.rows, f"key {key!r} used twice"
        assert "/" not in key
        if key in self.recorded:
            row = self.recorded[key]
        else:
            row = dict(measure())
            for v in row.values():
                assert v is None or isinstance(v, float | int | bool | str), (key, v)
            self.measured += 1
        self.rows[key] = row
        return row

    def point_later(self, key, measure, then=None):
        # the simplest contract-keeping version: the row is made at once
        replayed = key in self.recorded
        row = self.point(key, lambda: measure()())
        if then is not None:
            then(row, replayed)

    def idle(self):
        pass

    def checkpoint(self):
        pass

    def flush(self):
        pass

    def save_waveform(self, key, **arrays):
        return f"waveforms/{key}.npz"

    def progress(self, done, total, readings=None):
        pass

    def earlier(self, name):
        return self._earlier[name][0]

    def earlier_points(self, name):
        return self._earlier[name][1]

    def check_abort(self):
        pass


def _bench():
    board = Board()
    return SimpleNamespace(supply=FakeSupply(board), scope=FakeScope(board), generator=Exploding(),
                           wiring=SimpleNamespace(output_channel=1, rail_channel=2,
                                                  generator="rail"))


def _params(proc_name, **given):
    proc = base.get(proc_name)
    out = {p.name: p.default for p in proc.params}
    out.update(given)
    return proc(), out


def test_dropout_and_startup_found_within_resolution_and_acquisition_budget():
    bench = _bench()
    ctx = DictContext(bench)
    proc, params = _params("dropout_startup", lo_v=2.0, hi_v=4.0, running_v=4.0, source="",
                           search="dropout")
    d = {r.name: r for r in proc.run(ctx, params)}["dropout_v"]
    assert d.low <= DROPOUT_V <= d.high and d.high - d.low <= 0.005
    # One acquisition per clear decision: log2(range / resolution) + 4, the scope set-up
    # point aside (it autoscales and averages `records` records).
    setup_acq = params["records"]
    assert bench.scope.acquisitions - setup_acq <= math.log2(2.0 / 0.005) + 4
    assert all(r["repeat"] == 0 for k, r in ctx.rows.items() if k != "setup")

    ctx = DictContext(_bench())
    proc, params = _params("dropout_startup", lo_v=2.0, hi_v=4.0, running_v=4.0, source="")
    results = {r.name: r for r in proc.run(ctx, params)}
    d, s = results["dropout_v"], results["startup_v"]
    assert d.low <= DROPOUT_V <= d.high and d.high - d.low <= 0.005
    assert s.low <= STARTUP_V <= s.high and s.high - s.low <= 0.005
    h = results["hysteresis_v"]
    assert h.value == pytest.approx(s.value - d.value)
    assert h.low <= STARTUP_V - DROPOUT_V <= h.high


def test_replay_takes_the_same_path_without_touching_the_bench():
    ctx1 = DictContext(_bench())
    proc, params = _params("rail_sweep", start_v=2.0, stop_v=4.0, step_v=0.25, adaptive=True,
                           resolution_v=0.02, records=1)
    first = proc.run(ctx1, params)
    assert ctx1.measured == len(ctx1.rows) > 18
    # The sweep's coarse thresholds bracket the truth (hysteresis seen on the two branches).
    res = {r.name: r for r in first}
    assert res["startup_v"].low <= STARTUP_V <= res["startup_v"].high
    assert res["dropout_v"].low <= DROPOUT_V <= res["dropout_v"].high
    assert res["startup_v"].high - res["startup_v"].low <= 0.02

    replay_bench = SimpleNamespace(supply=Exploding(), scope=Exploding(), generator=Exploding(),
                                   wiring=SimpleNamespace(output_channel=1, rail_channel=2,
                                                          generator="rail"))
    ctx2 = DictContext(replay_bench, recorded=ctx1.rows)
    second = proc.run(ctx2, params)
    assert ctx2.measured == 0
    assert list(ctx2.rows) == list(ctx1.rows)
    assert second == first

    # and the threshold search replays too, using the sweep as its source
    earlier = {"rail_sweep": ({r.name: r for r in first}, list(ctx1.rows.values()))}
    ctx3 = DictContext(_bench(), earlier=earlier)
    proc3, params3 = _params("dropout_startup")
    got3 = proc3.run(ctx3, params3)
    d = {r.name: r for r in got3}["dropout_v"]
    assert d.low <= DROPOUT_V <= d.high
    ctx4 = DictContext(replay_bench, recorded=ctx3.rows, earlier=earlier)
    assert proc3.run(ctx4, params3) == got3 and ctx4.measured == 0


def test_a_rail_above_the_limit_is_refused_before_anything_is_sent():
    from benchctl.errors import SafetyError

    replay_bench = SimpleNamespace(supply=Exploding(), scope=Exploding(), generator=Exploding(),
                                   wiring=SimpleNamespace(output_channel=1, rail_channel=2,
                                                          generator="rail"))
    ctx = DictContext(replay_bench)
    proc, params = _params("rail_sweep", stop_v=6.5)
    with pytest.raises(SafetyError, match="max_rail_v"):
        proc.run(ctx, params)


def test_linear_region_and_pushing_recover_the_fake_boards_laws():
    ctx = DictContext(_bench())
    proc, params = _params("linear_region", start_v=3.1, stop_v=5.9, step_v=0.2, records=1)
    res = {r.name: r for r in proc.run(ctx, params)}
    slope = res["supply_sensitivity_vpp_per_v"]
    # The fake board's law is exactly Vpp = 0.6 V/V * rail - 1.02 V: the slope must agree
    # within 4 standard uncertainties (noise 2 mV rms per sample, 4000-sample records).
    assert abs(slope.value - 0.6) <= 4 * slope.uncertainty + 1e-4
    assert res["linear_lo_v"].value <= 3.11 and res["linear_hi_v"].value >= 5.89
    earlier = {"linear_region": (res, list(ctx.rows.values()))}
    ctx2 = DictContext(_bench(), earlier=earlier)
    proc2, params2 = _params("pushing")
    got = {r.name: r for r in proc2.run(ctx2, params2)}
    assert ctx2.measured == len(ctx.rows)  # rows copied, nothing measured on the bench
    assert abs(got["pushing_hz_per_v"].value) <= 4 * got["pushing_hz_per_v"].uncertainty + 1e-3
    # fake current law: 8 mA + 3 mA/V while oscillating (exact, no noise)
    assert got["current_slope_a_per_v"].value == pytest.approx(0.003, rel=1e-9)
    assert got["current_at_nominal_a"].value == pytest.approx(0.008 + 0.003 * 5.0, rel=1e-9)


def test_startup_time_of_an_exponential_envelope_matches_the_closed_form():
    from benchctl.procedures.startup_time import analyse_shot

    fs, fc, tau, t0 = 8e6, 1e6, 100e-6, 50e-6
    t = np.arange(int(2e-3 * fs)) / fs
    grow = np.where(t >= t0, 1 - np.exp(-(t - t0) / tau), 0.0)
    out = 0.6 * grow * np.sin(2 * np.pi * fc * t) + np.random.default_rng(1).normal(0, 1e-3, t.size)
    rail = np.where(t >= t0, 5.0, 0.0)
    got = analyse_shot(t, out, rail, fs_hz=fs, carrier_hz=fc, rail_target_v=5.0)
    # 1 - exp(-t/tau) = 0.9 at t = tau ln 10 (closed form); the step sits between samples,
    # so allow one sample period, plus 2 % for the envelope smoothing.
    assert got["startup_time_s"] == pytest.approx(tau * math.log(10), rel=0.02, abs=1 / fs)
    assert got["settled"] and got["final_vpp_v"] == pytest.approx(1.2, rel=0.01)
