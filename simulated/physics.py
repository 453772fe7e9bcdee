"""The shared physics of one simulated bench: supply -> rail -> board -> scope channels.

Everything here is pure Python/numpy and knows nothing of sockets. One :class:`BenchModel`
holds the supply's output trajectory, the generator settings, the board's running/stopped
history and the scope's acquisitions, all on one model clock.

Time
----
Model time is seconds since the bench started. In real-time mode it is the wall clock
(``time.monotonic``); in accelerated mode it is a counter that each command moves forward
(:data:`COMMAND_TIME_S`, and to "settled" after a supply change, to "complete" after an
acquisition), so a client sees the same physics without waiting.

Reproducibility
---------------
The random numbers of an acquisition (noise, carrier and generator phase) come from a
generator seeded by ``(seed, fingerprint, n)``: the fingerprint hashes every setting that
shapes the record (scope, supply setpoint and limits, generator, wiring, board) and ``n``
counts the earlier acquisitions with the same fingerprint since the supply's output target
last changed (a new rail setpoint starts a new "visit" and the counts start again). Supply
readbacks do the same per quantity. Wall-clock time and the global order of requests never
enter, so a run resumed on a fresh bench with the same seed gets the same records for the
same points, even when a sweep visits a setpoint twice (up and down) and the first visit
was replayed from the run folder rather than measured again.
"""

from __future__ import annotations

import bisect
import hashlib
import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from benchctl.simulated.models import AmplifierModel, BoardModel, OscillatorBase

COMMAND_TIME_S = 10e-6
"""Model time one command takes in accelerated mode, s."""


@dataclass(frozen=True)
class BenchPhysics:
    """Numbers of the simulated instruments (our own choices).

    Attributes
    ----------
    slew_v_per_s : float
        Supply output slew limit, V/s (20 V/ms: a fast programmable bench supply).
    settle_tau_s : float
        First-order settling of the supply output behind the slew, s (50 us: a 20 mV step
        is within 5 mV in 0.1 ms). Kept fast: the start-up transient test compares the
        board's growth after a rail step with the board's analytic truth for an ideal step.
    readback_noise_v, readback_noise_a : float
        RMS noise of the supply's voltage and current readback, V and A.
    readback_step_v, readback_step_a : float
        Readback resolution, V and A.
    rail_noise_v : float
        RMS noise on the rail seen by the scope, V.
    scope_noise_lsb : float
        Scope input noise, in ADC codes RMS.
    rearm_s : float
        Acquisition overhead added to the record window, s (10 ms: a bench scope's
        processing and re-arm time per single acquisition is of the order of 10 ms;
        common practice, no published source).
    pretrigger_fraction : float
        Share of the record before an edge trigger.
    auto_trigger_s : float
        Wall-clock wait for an edge trigger before the scope triggers by itself, s.
    """

    slew_v_per_s: float = 20e3
    settle_tau_s: float = 50e-6
    readback_noise_v: float = 0.5e-3
    readback_noise_a: float = 20e-6
    readback_step_v: float = 1e-3
    readback_step_a: float = 10e-6
    rail_noise_v: float = 0.5e-3
    scope_noise_lsb: float = 0.25
    rearm_s: float = 10e-3
    pretrigger_fraction: float = 0.1
    auto_trigger_s: float = 1.0

    def settle_time_s(self, step_v: float) -> float:
        """Time for a setpoint step of ``step_v`` to settle well inside readback noise, s."""
        return abs(step_v) / self.slew_v_per_s + 14.0 * self.settle_tau_s


FINE_WAIT_S = 3e-4
"""Real time: how long before a modelled completion the wait turns to short steps, s."""


class ModelClock:
    """Model time: the wall clock (real-time) or a counter moved by commands (accelerated)."""

    def __init__(self, *, realtime: bool, wall: Callable[[], float] = time.monotonic) -> None:
        self.realtime = realtime
        self._wall = wall
        self._t0 = wall()
        self._t = 0.0

    def now(self) -> float:
        """Current model time, s."""
        if self.realtime:
            return self._wall() - self._t0
        return self._t

    def advance(self, dt_s: float) -> None:
        """Accelerated mode: move model time forward by ``dt_s`` (no-op in real time)."""
        if not self.realtime:
            self._t += dt_s

    def advance_to(self, t_s: float) -> None:
        """Accelerated mode: move model time to at least ``t_s``."""
        if not self.realtime and t_s > self._t:
            self._t = t_s

    def wall_delay_until(self, t_s: float) -> float:
        """Real-time mode: seconds of wall clock until model time ``t_s`` (0 accelerated)."""
        return max(0.0, t_s - self.now()) if self.realtime else 0.0


def _rng(seed: int, *parts: object) -> np.random.Generator:
    digest = hashlib.blake2b(repr(parts).encode(), digest_size=16).digest()
    words = [int.from_bytes(digest[i:i + 4], "big") for i in range(0, 16, 4)]
    return np.random.default_rng([int(seed) & 0xFFFFFFFF, *words])


def _normal(seed: int, *parts: object) -> float:
    """One standard normal value that follows from ``seed`` and ``parts`` (Box-Muller on
    two uniforms from the same hash as :func:`_rng`; a generator per value costs ~30x more)."""
    digest = hashlib.blake2b(repr((int(seed) & 0xFFFFFFFF, parts)).encode(), digest_size=16).digest()
    u1 = (int.from_bytes(digest[:8], "big") + 1) / 2.0**64  # (0, 1]
    u2 = int.from_bytes(digest[8:], "big") / 2.0**64
    return math.sqrt(-2.0 * math.log(u1)) * math.cos(2.0 * math.pi * u2)


# --------------------------------------------------------------------------------------
# Supply output trajectory
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Segment:
    """From ``t0`` the command ramps from ``c0`` to ``target`` at the slew limit and the
    output follows it through a first-order lag, starting from ``v0``."""

    t0: float
    v0: float
    c0: float
    target: float

    def at(self, t: float, slew: float, tau: float) -> tuple[float, float]:
        """:meth:`eval` at one time, in floats (what a readback or a setpoint change needs)."""
        dt = t - self.t0
        if dt < 0.0:
            dt = 0.0
        span = self.target - self.c0
        k = math.copysign(slew, span) if span else 0.0
        t_r = abs(span) / slew
        m = dt if dt < t_r else t_r
        v_ramp = self.c0 + k * m - k * tau + (self.v0 - self.c0 + k * tau) * math.exp(-m / tau)
        c = self.c0 + k * m
        if dt <= t_r:
            return v_ramp, c
        return self.target + (v_ramp - self.target) * math.exp(-(dt - t_r) / tau), c

    def eval(self, t, slew: float, tau: float):
        dt = np.maximum(np.asarray(t, dtype=float) - self.t0, 0.0)
        span = self.target - self.c0
        k = math.copysign(slew, span) if span else 0.0
        t_r = abs(span) / slew
        e = np.exp(-np.minimum(dt, t_r) / tau)
        v_ramp = self.c0 + k * np.minimum(dt, t_r) - k * tau + (self.v0 - self.c0 + k * tau) * e
        c = self.c0 + k * np.minimum(dt, t_r)
        tail = np.exp(-np.maximum(dt - t_r, 0.0) / tau)
        v = np.where(dt <= t_r, v_ramp, self.target + (v_ramp - self.target) * tail)
        return v, c


class SupplyState:
    """Programmable DC supply: setpoint, current limit (CC), OVP latch, slewed output."""

    def __init__(self, physics: BenchPhysics) -> None:
        self.ph = physics
        self.reset()
        self.segments: list[_Segment] = [_Segment(0.0, 0.0, 0.0, 0.0)]
        self._starts: list[float] = [0.0]  # segment start times, kept with the list (sorted)
        self._starts_np: np.ndarray | None = None  # the same as an array, made when needed

    def reset(self) -> None:
        self.setpoint_v = 0.0
        self.current_limit_a = 0.1
        self.ovp_v = 33.0
        self.output_on = False
        self.tripped = False
        self.target_v = 0.0

    def output_v(self, t):
        """Output voltage at model time(s) ``t`` (scalar or array), V."""
        if isinstance(t, (float, int)):
            i = max(bisect.bisect_right(self._starts, t) - 1, 0)
            return self.segments[i].at(float(t), self.ph.slew_v_per_s, self.ph.settle_tau_s)[0]
        t_arr = np.asarray(t, dtype=float)
        if self._starts_np is None:
            self._starts_np = np.asarray(self._starts)
        idx = np.clip(np.searchsorted(self._starts_np, t_arr, side="right") - 1, 0, len(self.segments) - 1)
        if t_arr.ndim == 0:
            v, _ = self.segments[int(idx)].eval(t_arr, self.ph.slew_v_per_s, self.ph.settle_tau_s)
            return float(v)
        lo, hi = (int(idx.min()), int(idx.max())) if t_arr.size else (0, 0)
        if lo == hi:  # the usual record: one segment throughout
            seg = self.segments[lo]
            tau = self.ph.settle_tau_s
            if t_arr.size and float(t_arr.min()) - seg.t0 > abs(seg.target - seg.c0) / self.ph.slew_v_per_s + 50 * tau:
                # settled: what is left of the lag (< e^-50 of a step) is below float resolution
                return np.full_like(t_arr, seg.target)
            return seg.eval(t_arr, self.ph.slew_v_per_s, tau)[0]
        out = np.empty_like(t_arr)
        for i in np.unique(idx):
            sel = idx == i
            out[sel], _ = self.segments[int(i)].eval(t_arr[sel], self.ph.slew_v_per_s,
                                                     self.ph.settle_tau_s)
        return out

    def retarget(self, t: float, target_v: float) -> None:
        """Start a new trajectory segment toward ``target_v`` at model time ``t``."""
        last = self.segments[-1]
        if t < last.t0:
            t = last.t0
        v, c = last.at(float(t), self.ph.slew_v_per_s, self.ph.settle_tau_s)
        self.segments.append(_Segment(float(t), v, c, float(target_v)))
        self.target_v = float(target_v)
        self._starts_np = None
        if len(self.segments) > 4096:  # keep memory bounded; old history is settled anyway
            del self.segments[1:2048]
            self._starts = [s.t0 for s in self.segments]
        else:
            self._starts.append(float(t))

    def segments_since(self, t: float) -> list[_Segment]:
        """The segments in force at or after model time ``t`` (earlier ones were superseded)."""
        i = max(bisect.bisect_right(self._starts, t) - 1, 0)
        return self.segments[i:]

    def settled_at(self) -> float:
        """Model time at which the last segment has settled, s."""
        last = self.segments[-1]
        return last.t0 + abs(last.target - last.c0) / self.ph.slew_v_per_s + 20 * self.ph.settle_tau_s


# --------------------------------------------------------------------------------------
# Generator
# --------------------------------------------------------------------------------------
SHAPES = ("SINusoid", "SQUare", "TRIangle", "DC")


@dataclass
class GeneratorState:
    """Function generator settings: shape, frequency, amplitude (Vpp into high-Z), offset."""

    shape: str = "SINusoid"
    freq_hz: float = 1.0e3
    vpp_v: float = 0.1
    offset_v: float = 0.0
    output_on: bool = False

    def reset(self) -> None:
        self.shape, self.freq_hz, self.vpp_v, self.offset_v, self.output_on = (
            "SINusoid", 1.0e3, 0.1, 0.0, False)

    def dc_v(self) -> float:
        """DC part of the output, V."""
        return self.offset_v if self.output_on else 0.0

    def ac_amplitude_v(self) -> float:
        """Peak of the AC part, V."""
        return self.vpp_v / 2.0 if self.output_on and self.shape != "DC" else 0.0

    def waveform(self, t, phase_rad: float, t_ref: float):
        """Output at times ``t``, with phase ``phase_rad`` at ``t_ref``, V."""
        t = np.asarray(t, dtype=float)
        if not self.output_on:
            return np.zeros_like(t)
        if self.shape == "DC":
            return np.full_like(t, self.offset_v)
        frac = np.mod(phase_rad / (2 * np.pi) + self.freq_hz * (t - t_ref), 1.0)
        a = self.vpp_v / 2.0
        if self.shape == "SINusoid":
            y = np.sin(2 * np.pi * frac)
        elif self.shape == "SQUare":
            y = np.where(frac < 0.5, 1.0, -1.0)
        else:
            y = 1.0 - 4.0 * np.abs(np.mod(frac + 0.25, 1.0) - 0.5)
        return self.offset_v + a * y

    def key(self) -> tuple:
        return (self.shape, self.freq_hz, self.vpp_v, self.offset_v, self.output_on)


# --------------------------------------------------------------------------------------
# Scope
# --------------------------------------------------------------------------------------
@dataclass
class ChannelSettings:
    """One scope channel: full-screen range, centre offset, coupling, probe factor, on."""

    range_v: float = 8.0
    offset_v: float = 0.0
    coupling: str = "DC"
    probe: float = 1.0
    enabled: bool = True

    def key(self) -> tuple:
        return (self.range_v, self.offset_v, self.coupling, self.probe, self.enabled)


@dataclass
class ScopeSettings:
    """Timebase, trigger and transfer format of the scope."""

    channels: dict[int, ChannelSettings] = field(
        default_factory=lambda: {1: ChannelSettings(), 2: ChannelSettings()})
    window_s: float = 1e-3
    points: int = 10_000
    trigger_source: str = "IMMediate"  # or "INTernal1", "INTernal2"
    trigger_level_v: float = 0.0
    trigger_slope: str = "POSitive"
    continuous: bool = False

    def key(self) -> tuple:
        return (tuple(c.key() for c in self.channels.values()), self.window_s, self.points,
                self.trigger_source, self.trigger_level_v, self.trigger_slope)

    @property
    def dt_s(self) -> float:
        return self.window_s / self.points


ADC_MIN, ADC_MAX = -128, 127


@dataclass
class Record:
    """One acquisition: 8-bit codes per channel with their scaling."""

    codes: dict[int, np.ndarray]
    dt_s: float
    t0_s: float
    dy_v: dict[int, float]
    y0_v: dict[int, float]
    t_trigger_s: float
    serial: int
    cache: dict[tuple, memoryview] = field(default_factory=dict)

    def volts(self, ch: int) -> np.ndarray:
        return self.codes[ch].astype(np.float64) * self.dy_v[ch] + self.y0_v[ch]

    def clipped(self, ch: int) -> int:
        c = self.codes[ch]
        return int(np.count_nonzero((c == ADC_MIN) | (c == ADC_MAX)))


@dataclass
class Acquisition:
    """An armed acquisition until it is resolved into a record."""

    t_arm: float
    wall_arm: float
    settings_key: tuple
    fingerprint: tuple
    rng: np.random.Generator
    t_trigger: float | None = None
    t_complete: float | None = None
    ref: tuple[float, float, float] | None = None  # (t_ref, carrier phase, generator phase)
    early: tuple | None = None  # (stamp, record, undo) of a record made before completion


@dataclass
class _Transition:
    t: float
    on: bool
    grow_rail_v: float


# --------------------------------------------------------------------------------------
# The bench
# --------------------------------------------------------------------------------------
class BenchModel:
    """Shared state of one simulated bench.

    Parameters
    ----------
    board : BoardModel
        The board under test.
    seed : int
        Session seed; with the same seed the same settings give the same records.
    realtime : bool
        Real-time (wall clock) or accelerated model time.
    wiring_generator : {"rail", "input", "none"}
        Where the generator goes: summed onto the rail (modulation fixture) or the board input.
    physics : BenchPhysics
        Instrument numbers.
    wall : callable
        Wall clock (injected for tests).
    """

    def __init__(self, board: BoardModel, *, seed: int = 1, realtime: bool = False,
                 wiring_generator: str = "rail", physics: BenchPhysics | None = None,
                 wall: Callable[[], float] = time.monotonic) -> None:
        # imported with the bench, not with the package (so `benchctl --help` stays quick)
        # and not at the first record (so the first acquisition is not late by an import)
        from scipy.signal import lfilter

        self._lfilter = lfilter
        self.board = board
        self.seed = int(seed)
        self.ph = physics or BenchPhysics()
        self.clock = ModelClock(realtime=realtime, wall=wall)
        self.wall = wall
        self.wiring_generator = wiring_generator
        self.lock = threading.RLock()
        self.cond = threading.Condition(self.lock)
        self.supply = SupplyState(self.ph)
        self.generator = GeneratorState()
        self.scope = ScopeSettings()
        self.acq: Acquisition | None = None
        self._early_due: Acquisition | None = None  # armed; its record is made early (arm)
        self.record: Record | None = None
        self._record_serial = 0
        self._counts: dict[tuple, int] = {}
        self._counted_setpoint_v: float | None = None
        self._history: list[_Transition] = [_Transition(0.0, False, 0.0)]
        self._evolved_s = 0.0

    # -- rail -------------------------------------------------------------------------
    def _gen_on_rail(self) -> bool:
        return self.wiring_generator == "rail"

    def slow_rail_v(self, t):
        """Rail without the generator's AC part (supply output + generator DC), V."""
        v = self.supply.output_v(t)
        return v + (self.generator.dc_v() if self._gen_on_rail() else 0.0)

    def rail_v(self, t, gen_phase: float = 0.0, t_ref: float = 0.0):
        """Full rail at times ``t`` with the generator at ``gen_phase`` at ``t_ref``, V."""
        v = self.supply.output_v(t)
        if self._gen_on_rail():
            v = v + self.generator.waveform(t, gen_phase, t_ref)
        return v

    # -- board running/stopped history ------------------------------------------------
    def _osc(self) -> OscillatorBase | None:
        return self.board if isinstance(self.board, OscillatorBase) else None

    def _truncate_history(self, t: float) -> None:
        """Forget evolution past ``t``: a command at ``t`` changes the future."""
        while len(self._history) > 1 and self._history[-1].t > t:
            self._history.pop()
        self._evolved_s = min(self._evolved_s, t)

    def evolve(self, t_to: float) -> None:
        """Extend the running/stopped history of the board up to model time ``t_to``."""
        osc = self._osc()
        if osc is None or t_to <= self._evolved_s:
            return
        t_from = self._evolved_s
        if self._no_transition(osc, t_from):
            self._evolved_s = t_to
            return
        pieces = [t_from]
        for seg in self.supply.segments_since(t_from):
            end = seg.t0 + self.ph.settle_time_s(seg.target - seg.c0) + 14 * self.ph.settle_tau_s
            lo, hi = max(seg.t0, t_from), min(end, t_to)
            if hi > lo:
                pieces.extend(np.linspace(lo, hi, 1025).tolist())
        pieces.append(t_to)
        grid = np.unique(np.asarray(pieces))
        rail = self.slow_rail_v(grid)
        state = self._history[-1].on
        i = 0
        for _ in range(len(grid)):  # bounded: each pass finds one transition or stops
            # the first sample past the threshold of the present state (vectorised)
            hits = np.flatnonzero(rail[i:] < osc.dropout_v if state else rail[i:] >= osc.startup_v)
            if hits.size == 0:
                break
            i += int(hits[0])
            if state:
                tc = _cross_time(grid, rail, i, osc.dropout_v)
                self._history.append(_Transition(tc, False, 0.0))
            else:
                tc = _cross_time(grid, rail, i, osc.startup_v)
                self._history.append(_Transition(tc, True, self._grow_rail(tc)))
            state = not state
            i += 1
        self._evolved_s = t_to

    def _no_transition(self, osc: OscillatorBase, t_from: float) -> bool:
        """True when the rail cannot cross the threshold of the present state after ``t_from``.

        Each supply segment lags a ramp from ``c0`` to ``target`` starting at ``v0``, so
        its output stays between the least and the greatest of the three.
        """
        segs = self.supply.segments_since(t_from)
        dc = self.generator.dc_v() if self._gen_on_rail() else 0.0
        if self._history[-1].on:
            return min(min(g.v0, g.c0, g.target) for g in segs) + dc >= osc.dropout_v
        return max(max(g.v0, g.c0, g.target) for g in segs) + dc < osc.startup_v

    def _grow_rail(self, t: float) -> float:
        seg = self.supply.segments[-1]
        for s in reversed(self.supply.segments):
            if s.t0 <= t:
                seg = s
                break
        return seg.target + (self.generator.dc_v() if self._gen_on_rail() else 0.0)

    def state_at(self, t: float) -> _Transition:
        """Last running/stopped transition at or before ``t``."""
        self.evolve(t)
        for tr in reversed(self._history):
            if tr.t <= t:
                return tr
        return self._history[0]

    def envelope_estimate(self, t: np.ndarray) -> np.ndarray:
        """Oscillator amplitude (Vpp) along the slow rail at times ``t``, from the history."""
        osc = self._osc()
        t = np.asarray(t, dtype=float)
        self.evolve(float(t.max()))
        ts = np.fromiter((tr.t for tr in self._history), float)
        ons = np.fromiter((tr.on for tr in self._history), bool)
        grow = np.fromiter((tr.grow_rail_v for tr in self._history), float)
        k = np.clip(np.searchsorted(ts, t, side="right") - 1, 0, len(ts) - 1)
        on = ons[k]
        env = np.where(on, osc.vpp_at(self.slow_rail_v(t)), 0.0)
        for kk in np.unique(k[on]):
            sel = k == kk
            env[sel] *= osc.growth_factor(t[sel] - ts[kk], grow[kk])
        return env

    def oscillating(self, t: float | None = None) -> bool:
        """Whether the board runs at model time ``t`` (now when omitted)."""
        if self._osc() is None:
            return False
        return self.state_at(self.clock.now() if t is None else t).on

    # -- supply API used by the server ------------------------------------------------
    def supply_changed(self) -> None:
        """Recompute the supply's target after any setting changed; trip OVP if needed."""
        s = self.supply
        t = self.clock.now()
        target = self._cc_target() if (s.output_on and not s.tripped) else 0.0
        if s.output_on and not s.tripped and target > s.ovp_v:
            s.tripped = True
            s.output_on = False
            target = 0.0
        if target != s.target_v or s.segments[-1].target != target:
            self._truncate_history(t)
            s.retarget(t, target)
            if s.setpoint_v != self._counted_setpoint_v:
                # A new rail setpoint: counts start again (so a resumed run reproduces the
                # point). Switching the output off and on at the same setpoint keeps
                # counting, so repeated power-ups there see independent noise.
                self._counts.clear()
                self._counted_setpoint_v = s.setpoint_v
            self.clock.advance_to(self._settled_at(t))
        self.cond.notify_all()

    def _settled_at(self, t: float) -> float:
        """When the supply and a board starting on the way have both settled, s."""
        done = self.supply.settled_at()
        osc = self._osc()
        if osc is not None:
            self.evolve(done)
            for tr in self._history:
                if tr.on and tr.t >= t:
                    done = max(done, tr.t + osc.startup_time_s(tr.grow_rail_v, 1 - 1e-6))
        return done

    def trip(self) -> None:
        """Trip the over-voltage protection now (fault injection or OVP below output)."""
        self.supply.tripped = True
        self.supply.output_on = False
        self.supply_changed()

    def _cc_target(self) -> float:
        """Output target: the setpoint, or lower where the board draws the current limit."""
        s = self.supply
        gen_dc = self.generator.dc_v() if self._gen_on_rail() else 0.0
        running = self.oscillating()

        def current(v: float) -> float:
            r = v + gen_dc
            osc = self._osc()
            on = bool(osc) and (r >= osc.startup_v or (running and r >= osc.dropout_v))
            return float(self.board.current_at(r, on))

        if current(s.setpoint_v) <= s.current_limit_a:
            return s.setpoint_v
        lo, hi = 0.0, s.setpoint_v
        for _ in range(50):
            mid = 0.5 * (lo + hi)
            if current(mid) <= s.current_limit_a:
                lo = mid
            else:
                hi = mid
        return lo

    def supply_mode(self) -> str:
        s = self.supply
        if not s.output_on:
            return "off"
        return "cc" if s.target_v < s.setpoint_v - 1e-9 else "cv"

    def board_current_a(self, t: float | None = None) -> float:
        t = self.clock.now() if t is None else t
        v = self.supply.output_v(t)
        if v <= 0:
            return 0.0
        rail = float(self.slow_rail_v(t))
        on = self.oscillating(t)
        return float(self.board.current_at(rail, on))

    def readback(self, quantity: str) -> float:
        """Supply readback with noise and resolution; ``quantity`` is "voltage" or "current"."""
        s = self.supply
        t = self.clock.now()
        key = ("readback", quantity, s.setpoint_v, s.current_limit_a, s.output_on, s.tripped,
               self.generator.key())
        n = self._counts.get(key, 0)
        self._counts[key] = n + 1
        z = _normal(self.seed, key, n)
        if quantity == "voltage":
            x = float(s.output_v(t)) + self.ph.readback_noise_v * z
            step = self.ph.readback_step_v
        else:
            x = self.board_current_a(t) + self.ph.readback_noise_a * z
            step = self.ph.readback_step_a
        return round(x / step) * step

    # -- scope ------------------------------------------------------------------------
    def fingerprint(self) -> tuple:
        s = self.supply
        b = self.board
        return (self.scope.key(), (s.setpoint_v, s.current_limit_a, s.ovp_v, s.output_on,
                                   s.tripped), self.generator.key(), self.wiring_generator,
                b.name, b.revision, b.serial)

    def arm(self) -> None:
        """Arm one acquisition (INITiate)."""
        fp = self.fingerprint()
        n = self._counts.get(fp, 0)
        self._counts[fp] = n + 1
        self.acq = Acquisition(t_arm=self.clock.now(), wall_arm=self.wall(),
                               settings_key=self.scope.key(), fingerprint=fp,
                               rng=_rng(self.seed, "acq", fp, n))
        if self.clock.realtime and self.scope.trigger_source == "IMMediate":
            # the record's time span is known now: it is made while the modelled time runs
            # (make_early_record, after the server has answered the message that armed it)
            self._try_trigger(final=False)
            self._early_due = self.acq
        self.cond.notify_all()

    @property
    def early_record_due(self) -> bool:
        """True while an armed acquisition waits for :meth:`make_early_record`."""
        return self._early_due is not None

    def make_early_record(self) -> Record | None:
        """Make the record of the acquisition the last message armed, if it is still armed.

        Real time only; returns the record made (None if there was nothing to make). An
        acquisition waited for before this runs is made by the wait instead.
        """
        a, self._early_due = self._early_due, None
        if a is None or a is not self.acq or a.early is not None:
            return None
        self._synthesise_early(a)
        return a.early[1] if a.early is not None else None

    def abort(self) -> None:
        self.acq = None
        self.scope.continuous = False
        self.cond.notify_all()

    def measuring(self) -> bool:
        """True while an armed acquisition is not yet complete (at model time now)."""
        self._try_trigger(final=False)
        a = self.acq
        return a is not None and (a.t_complete is None or a.t_complete > self.clock.now())

    def _try_trigger(self, *, final: bool) -> None:
        a = self.acq
        if a is None or a.t_trigger is not None:
            return
        sc = self.scope
        if sc.trigger_source == "IMMediate":
            t_trig = a.t_arm
        else:
            ch = 1 if sc.trigger_source.endswith("1") else 2
            horizon = self.clock.now() + (0.0 if self.clock.realtime else 1.0)
            t_trig = self._find_edge(a, ch, a.t_arm, horizon)
            if t_trig is None:
                waited = self.wall() - a.wall_arm
                if not (final and waited >= self.ph.auto_trigger_s):
                    return
                t_trig = max(self.clock.now(), a.t_arm)  # auto trigger
                a.ref = None
        t0 = self._t0_s()
        a.t_trigger = t_trig
        a.t_complete = max(t_trig + t0 + sc.window_s, a.t_arm) + self.ph.rearm_s

    def _t0_s(self) -> float:
        sc = self.scope
        return 0.0 if sc.trigger_source == "IMMediate" else -self.ph.pretrigger_fraction * sc.window_s

    def wait_complete(self, *, stop: threading.Event | None = None) -> bool:
        """Block (releasing the lock) until the armed acquisition completes.

        Returns False if nothing was armed. In accelerated mode model time jumps to the
        completion; in real-time mode the wall clock is waited for.
        """
        if self.acq is None:
            return False
        while True:
            self._try_trigger(final=True)
            a = self.acq
            if a is None:
                return False
            if a.t_complete is not None:
                delay = self.clock.wall_delay_until(a.t_complete)
                if delay > 0 and a.early is None:
                    self._synthesise_early(a)
                    delay = self.clock.wall_delay_until(a.t_complete)
                if delay <= 0:
                    self.clock.advance_to(a.t_complete)
                    self._finish()
                    return True
                # the last stretch in short waits: one long timed wait was seen to
                # overshoot by 0.1-0.2 ms, which a client would take as the scope's time
                self.cond.wait(min(delay - FINE_WAIT_S, 0.05) if delay > 2 * FINE_WAIT_S else 2e-5)
            else:
                self.cond.wait(0.05)
            if stop is not None and stop.is_set():
                return False

    def advance_continuous(self) -> None:
        """Continuous mode: take the next record now (re-arm and complete)."""
        if self.acq is None:
            self.arm()
        self.wait_complete()

    def latest_record(self) -> Record | None:
        """The last complete record, finishing the armed one if its time has come."""
        a = self.acq
        if a is not None:
            self._try_trigger(final=False)
            if a.t_complete is not None and a.t_complete <= self.clock.now():
                self._finish()
            elif not self.clock.realtime and a.t_complete is not None:
                self.clock.advance_to(a.t_complete)
                self._finish()
        return self.record

    def _stamp(self) -> tuple:
        """Everything a record depends on besides the acquisition itself."""
        seg = self.supply.segments
        return (self.fingerprint(), len(seg), seg[-1])

    def _synthesise_early(self, a: Acquisition) -> None:
        """Real time: make the record as soon as its time span is known (at the trigger).

        The record's samples follow from the settings and the supply trajectory, all known
        once the acquisition has triggered, so the synthesis overlaps the modelled wait
        instead of following it. If anything changes before completion (a command during
        the acquisition), the record is made again at completion from the same random
        state, so the result does not depend on when it was made.
        """
        undo = (a.rng.bit_generator.state, a.t_trigger, a.ref, self._record_serial)
        stamp = self._stamp()
        a.early = (stamp, self._synthesise(a), undo)

    def _finish(self) -> None:
        a = self.acq
        if a is None:
            return
        if a.early is not None and a.early[0] == self._stamp():
            self.record = a.early[1]
        else:
            if a.early is not None:  # stale: start again from the same state
                state, a.t_trigger, a.ref, self._record_serial = a.early[2]
                a.rng.bit_generator.state = state
            self.record = self._synthesise(a)
        a.early = None
        self.acq = None
        if self.scope.continuous:
            self.arm()
        self.cond.notify_all()

    # -- trigger search ---------------------------------------------------------------
    def _reach(self, ch: int, t: np.ndarray):
        """(slow part, AC peak bound) of channel ``ch`` at times ``t``."""
        cs = self.scope.channels[ch]
        gen = self.generator
        if ch == 2:
            slow = self.slow_rail_v(t)
            ac = np.full_like(t, gen.ac_amplitude_v() if self._gen_on_rail() else 0.0)
        elif isinstance(self.board, AmplifierModel):
            slow = np.zeros_like(t)
            vin = gen.ac_amplitude_v() if self.wiring_generator == "input" else 0.0
            rail = self.slow_rail_v(t)
            ac = np.minimum(self.board.gain_at(rail) * vin, self.board.swing_vpp_at(rail) / 2)
        else:
            osc = self._osc()
            slow = np.zeros_like(t)
            rail = self.slow_rail_v(t)
            env = self.envelope_estimate(t)
            h2, h3 = osc.harmonics_at(rail)
            ac = env / 2 * (1 + h2 + h3)
        if cs.coupling == "AC":
            slow = np.zeros_like(t)
        return slow, ac

    def _find_edge(self, a: Acquisition, ch: int, t_from: float, t_to: float) -> float | None:
        """First edge of channel ``ch`` at the trigger level after ``t_from``; None if none."""
        sc = self.scope
        level = sc.trigger_level_v
        rising = sc.trigger_slope == "POSitive"
        if t_to < t_from:
            t_to = t_from
        pts = [t_from, t_to]
        for seg in self.supply.segments_since(t_from):
            end = seg.t0 + self.ph.settle_time_s(seg.target - seg.c0) + 14 * self.ph.settle_tau_s
            lo, hi = max(seg.t0, t_from), min(end, t_to)
            if hi > lo:
                pts.extend(np.linspace(lo, hi, 257).tolist())
        for tr in self._history:
            if t_from <= tr.t <= t_to:
                pts.extend((tr.t + np.geomspace(1e-7, 5e-2, 64)).tolist())
        grid = np.unique(np.clip(np.asarray(pts), t_from, t_to))
        slow, ac = self._reach(ch, grid)
        d = slow - level
        reach = (np.abs(d) < ac)
        cross = np.zeros_like(reach)
        if rising:
            cross[1:] = (d[:-1] < 0) & (d[1:] >= 0)
        else:
            cross[1:] = (d[:-1] > 0) & (d[1:] <= 0)
        hit = np.flatnonzero(reach | cross)
        if hit.size == 0:
            return None
        i = int(hit[0])
        t_c = float(grid[i])
        if cross[i] and not reach[i] and i > 0:  # a slow crossing: refine by bisection
            lo, hi = float(grid[i - 1]), float(grid[i])
            for _ in range(60):
                mid = 0.5 * (lo + hi)
                dm = float(self._reach(ch, np.array([mid]))[0][0]) - level
                if (dm >= 0) == rising:
                    hi = mid
                else:
                    lo = mid
            t_c = hi
        # fine search on the synthesised (noise-free) channel around t_c
        phases = (float(a.rng.uniform(0, 2 * np.pi)), float(a.rng.uniform(0, 2 * np.pi)))
        a.ref = (t_c, *phases)
        period = self._ac_period(ch)
        span = 2.5 * period if period else 4 * sc.dt_s
        n = 512
        tt = t_c - 2 * span / n + np.linspace(0, span, n + 1)
        y = self._channel_clean(ch, tt, a.ref)
        dy = y - level
        if rising:
            idx = np.flatnonzero((dy[:-1] < 0) & (dy[1:] >= 0))
        else:
            idx = np.flatnonzero((dy[:-1] > 0) & (dy[1:] <= 0))
        if idx.size == 0:
            return t_c
        k = int(idx[0])
        frac = dy[k] / (dy[k] - dy[k + 1]) if dy[k] != dy[k + 1] else 0.0
        return float(tt[k] + frac * (tt[k + 1] - tt[k]))

    def _ac_period(self, ch: int) -> float:
        gen = self.generator
        if ch == 2 or isinstance(self.board, AmplifierModel):
            return 1.0 / gen.freq_hz if gen.ac_amplitude_v() > 0 else 0.0
        osc = self._osc()
        return 1.0 / osc.freq_nominal_hz

    # -- synthesis --------------------------------------------------------------------
    def _channel_clean(self, ch: int, t: np.ndarray, ref: tuple[float, float, float]) -> np.ndarray:
        out = self._signals(t, ref)
        y = out[ch]
        if self.scope.channels[ch].coupling == "AC":
            y = y - y.mean()
        return y

    def _signals(self, t: np.ndarray, ref: tuple[float, float, float]) -> dict[int, np.ndarray]:
        """Noise-free board output (ch1) and rail (ch2) at times ``t``."""
        t_ref, phi_c, phi_g = ref
        rail = self.rail_v(t, phi_g, t_ref)
        board = self.board
        if isinstance(board, AmplifierModel):
            vin = (self.generator.waveform(t, phi_g, t_ref) - self.generator.dc_v()
                   if self.wiring_generator == "input" else np.zeros_like(t))
            return {1: board.output(vin, rail), 2: rail}
        osc = self._osc()
        dt = float(t[1] - t[0]) if len(t) > 1 else 1e-9
        env = self._envelope(t, rail, dt)
        f = osc.freq_at(rail)
        cum = np.concatenate(([0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * dt)))
        # integral of f from t_ref to t[0]
        if t_ref != t[0]:
            tq = np.linspace(t_ref, t[0], 65)
            fq = osc.freq_at(self.rail_v(tq, phi_g, t_ref))
            head = float(np.trapezoid(fq, tq))
        else:
            head = 0.0
        phase = phi_c + 2 * np.pi * (cum + head)
        h2, h3 = osc.harmonics_at(rail)
        y = env / 2 * (np.sin(phase) + h2 * np.sin(2 * phase + 0.4) + h3 * np.sin(3 * phase + 1.1))
        return {1: y, 2: rail}

    def _envelope(self, t: np.ndarray, rail: np.ndarray, dt: float) -> np.ndarray:
        """Amplitude (Vpp of the fundamental) of the oscillator along a record."""
        osc = self._osc()
        start = self.state_at(float(t[0]))
        mark = np.where(rail >= osc.startup_v, 1, np.where(rail < osc.dropout_v, -1, 0))
        mark[0] = mark[0] or (1 if start.on else -1)
        idx = np.where(mark != 0, np.arange(len(t)), 0)
        np.maximum.accumulate(idx, out=idx)
        on = mark[idx] > 0
        target = np.where(on, osc.vpp_at(rail), 0.0)
        alpha = -math.expm1(-dt / osc.tau_env_s)
        filt, _ = self._lfilter([alpha], [1.0, alpha - 1.0], target, zi=[(1.0 - alpha) * target[0]])
        growth = np.ones_like(t)
        edges = np.flatnonzero(np.diff(on.astype(np.int8)) > 0) + 1
        runs = [(0, start.t, start.grow_rail_v)] if on[0] else []
        runs += [(int(e), float(t[e]), float(self._grow_rail(float(t[e])))) for e in edges]
        ends = np.flatnonzero(np.diff(on.astype(np.int8)) < 0) + 1
        for i0, t_start, grow_v in runs[:4096]:
            later = ends[ends > i0]
            i1 = int(later[0]) if later.size else len(t)
            growth[i0:i1] = osc.growth_factor(t[i0:i1] - t_start, grow_v)
        # first samples of a run that started long ago: growth is 1 already
        return np.where(on, filt * growth, 0.0)

    def _synthesise(self, a: Acquisition) -> Record:
        sc = self.scope
        n, dt = sc.points, sc.dt_s
        t0 = self._t0_s()
        if a.t_trigger is None:
            a.t_trigger = a.t_arm
        if a.ref is None:
            a.ref = (a.t_trigger, float(a.rng.uniform(0, 2 * np.pi)),
                     float(a.rng.uniform(0, 2 * np.pi)))
        t = a.t_trigger + t0 + np.arange(n) * dt
        self.evolve(float(t[-1]))
        sig = self._signals(t, a.ref)
        noise_board = getattr(self.board, "noise_v_rms", 0.0)
        codes, dy, y0 = {}, {}, {}
        for ch, cs in sc.channels.items():
            if not cs.enabled:
                codes[ch], dy[ch], y0[ch] = np.zeros(0, np.int8), cs.range_v / 256.0, cs.offset_v
                continue
            y = sig[ch].copy()
            extra = noise_board if ch == 1 else self.ph.rail_noise_v
            lsb = cs.range_v / 256.0
            sigma = math.hypot(extra, self.ph.scope_noise_lsb * lsb)
            y += sigma * a.rng.standard_normal(n)
            if cs.coupling == "AC":
                y -= y.mean()
            code = np.rint((y - cs.offset_v) / lsb)
            np.clip(code, ADC_MIN, ADC_MAX, out=code)
            codes[ch] = code.astype(np.int8)
            dy[ch], y0[ch] = lsb, cs.offset_v
        self._record_serial += 1
        return Record(codes=codes, dt_s=dt, t0_s=t0, dy_v=dy, y0_v=y0,
                      t_trigger_s=a.t_trigger, serial=self._record_serial)


def _cross_time(grid: np.ndarray, y: np.ndarray, i: int, level: float) -> float:
    if i == 0 or y[i] == y[i - 1]:
        return float(grid[i])
    frac = (level - y[i - 1]) / (y[i] - y[i - 1])
    return float(grid[i - 1] + np.clip(frac, 0.0, 1.0) * (grid[i] - grid[i - 1]))
