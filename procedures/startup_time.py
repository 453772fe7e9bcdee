"""Start-up time: output off -> on at a given rail; rail step to 90 % of the final amplitude.

One static point at the rail (board running) sets the output channel's scale. Each shot then:
output off (``off_s``, so the board stops), setpoint = rail, scope armed with an edge
trigger on the rail channel (rising, at ``trigger_fraction`` of the rail), output on, record
fetched from both channels. The rail step time is the interpolated crossing of 50 % of the
rail on the rail channel; the 90 % point is the first time the output envelope (analytic
signal, smoothed over a few carrier cycles) reaches 90 % of its final value (median of the
last ``tail_fraction`` of the record). A record whose tail is still rising is taken again
with a 4x longer window (bounded). The result is the median of ``shots`` shots.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from benchctl import analysis
from benchctl.errors import ConfigError, MeasurementError
from benchctl.procedures.base import (
    Column,
    Param,
    Procedure,
    Result,
    register,
)
from benchctl.procedures.common import RailTracker, check_rail, finite_or_none, point_key
from benchctl.procedures.measure import OUTPUT_COLUMNS, dwell, measure_output
from benchctl.procedures.rail_sweep import MEASURE_PARAMS, measure_options, settling

STARTUP_COLUMNS: tuple[Column, ...] = (
    Column("kind", "", "static or shot"),
    Column("shot", "", "shot number"),
    Column("window_s", "s", "record window of the shot"),
    Column("t_step_s", "s", "rail crossing 50 % of its final value, record time"),
    Column("t90_s", "s", "output envelope first at 90 % of its final value, record time"),
    Column("startup_time_s", "s", "t90 - t_step"),
    Column("final_vpp_v", "V", "final output Vpp (2 x the envelope's tail median)"),
    Column("settled", "", "the envelope's tail was flat (final amplitude reached)"),
    Column("waveform", "", "stored record (output and rail), relative path"),
    *OUTPUT_COLUMNS,
)


def first_crossing(t: np.ndarray, y: np.ndarray, level: float) -> float | None:
    """First time ``y`` rises through ``level`` (linear interpolation), or None."""
    above = np.flatnonzero(y >= level)
    if above.size == 0:
        return None
    i = int(above[0])
    if i == 0:
        return float(t[0])
    y0, y1 = float(y[i - 1]), float(y[i])
    frac = (level - y0) / (y1 - y0) if y1 != y0 else 0.0
    return float(t[i - 1] + frac * (t[i] - t[i - 1]))


def analyse_shot(t_s: np.ndarray, out_v: np.ndarray, rail_v: np.ndarray, *, fs_hz: float,
                 carrier_hz: float, rail_target_v: float, tail_fraction: float = 0.15,
                 ) -> dict[str, Any]:
    """Times of one start-up record (pure): rail step, 90 % point, final amplitude.

    The envelope is |analytic signal| (scipy.signal.hilbert via benchctl.analysis.envelope)
    smoothed with a moving average over 4 carrier cycles, so the carrier ripple of the
    envelope does not trigger the 90 % crossing early.
    """
    env = analysis.envelope(out_v - np.median(out_v[-max(8, len(out_v) // 10):]), fs_hz=fs_hz,
                            carrier_hz=carrier_hz)
    n_avg = max(1, int(round(4 * fs_hz / carrier_hz)))
    if n_avg > 1:
        env = np.convolve(env, np.ones(n_avg) / n_avg, mode="same")
    n = len(env)
    tail = env[int(n * (1 - tail_fraction)): n - n_avg]
    if tail.size < 4:
        raise MeasurementError("start-up record too short for its tail")
    final = float(np.median(tail))
    # flat tail: the first and last thirds of the tail agree within 2 %
    k = max(1, tail.size // 3)
    settled = bool(final > 0 and abs(np.mean(tail[-k:]) - np.mean(tail[:k])) <= 0.02 * final)
    # The rail must start low in the record, or the step happened before it (a missed
    # trigger, or a rail that had not discharged): then no step time.
    t_step = (first_crossing(t_s, rail_v, 0.5 * rail_target_v)
              if float(np.median(rail_v[:8])) < 0.25 * rail_target_v else None)
    t90 = first_crossing(t_s[: n - n_avg], env[: n - n_avg], 0.9 * final) if final > 0 else None
    return {"t_step_s": t_step, "t90_s": t90,
            "startup_time_s": (t90 - t_step) if t90 is not None and t_step is not None else None,
            "final_vpp_v": 2 * final, "settled": settled}


@register
class StartupTime(Procedure):
    name = "startup_time"
    summary = "Start-up time: rail step (output off -> on) to 90 % of the final amplitude"
    params = (
        Param("rail_v", float, "V", 5.0, "rail the output is switched on at", minimum=0.0,
              rail=True),
        Param("window_s", float, "s", 0.004, "first record window", minimum=1e-7),
        Param("max_widen", int, "", 3, "4x window widenings allowed for an unsettled tail",
              minimum=0),
        Param("samples_per_cycle", float, "", 8.0, "samples per carrier cycle", minimum=2.5),
        Param("max_points", int, "", 200_000, "cap on record length (the rate drops to fit)",
              minimum=1000),
        Param("shots", int, "", 3, "power-ups measured (median reported)", minimum=1),
        Param("off_s", float, "s", 0.02, "output off this long before each shot", minimum=0.0),
        Param("save", bool, "", True, "store each shot's records"),
        *MEASURE_PARAMS,
    )
    columns = STARTUP_COLUMNS
    results = ("startup_time_s",)

    @classmethod
    def check(cls, params, *, earlier, wiring=None):
        if wiring is not None and int(getattr(wiring, "rail_channel", 0) or 0) <= 0:
            return [("wiring.rail_channel", "start-up time needs a scope channel on the rail "
                                            "(rail_channel > 0)")]
        return []

    def run(self, ctx: Any, params: Mapping[str, Any]) -> list[Result]:
        rail = float(params["rail_v"])
        check_rail(ctx, rail, what="startup_time rail_v")
        wiring = ctx.bench.wiring
        rail_ch = int(getattr(wiring, "rail_channel", 0) or 0)
        if rail_ch <= 0:
            raise ConfigError("bench", "wiring.rail_channel",
                              "start-up time needs a scope channel on the rail (rail_channel > 0)")
        out_ch = int(wiring.output_channel)
        opts = measure_options(params)
        tracker = RailTracker(ctx, settling(params))

        def measure_static() -> dict[str, Any]:
            tracker.from_below(rail, floor_v=rail)
            row = measure_output(ctx, opts, rail_set_v=rail)
            row.update(kind="static", shot=0)
            return row

        static = ctx.point(point_key("static", rail), measure_static)
        if not static["oscillating"] or not static.get("vpp_v") or not static.get("freq_hz"):
            raise MeasurementError(f"startup_time: the board does not run at {rail:g} V")
        vpp, carrier = float(static["vpp_v"]), float(static["freq_hz"])
        offset = finite_or_none(static.get("offset_v")) or 0.0
        shots = []
        for shot in range(int(params["shots"])):
            window = float(params["window_s"])
            row = None
            for widen in range(int(params["max_widen"]) + 1):
                key = point_key("shot", shot, f"w{widen}")

                def measure(window: float = window, shot: int = shot, key: str = key) -> dict[str, Any]:
                    return self._shot(ctx, tracker, params, rail=rail, out_ch=out_ch,
                                      rail_ch=rail_ch, vpp=vpp, offset=offset, carrier=carrier,
                                      window=window, shot=shot, key=key, timeout_s=opts.timeout_s)

                ctx.check_abort()
                row = ctx.point(key, measure)
                if row["settled"]:
                    break
                window *= 4
            ctx.progress(shot + 1, int(params["shots"]), {"startup_time_s": row["startup_time_s"]})
            if row is not None and row["settled"] and row["startup_time_s"] is not None:
                shots.append(float(row["startup_time_s"]))
        tracker.off()
        if not shots:
            return [Result("startup_time_s", None, "s", method="rail step to 90 % of final Vpp",
                           note="no shot reached a settled final amplitude")]
        value = float(np.median(shots))
        u = float(np.std(shots, ddof=1) / math.sqrt(len(shots))) if len(shots) > 1 else None
        return [Result("startup_time_s", value, "s", uncertainty=u,
                       method=(f"median of {len(shots)} power-ups at {rail:g} V: rail 50 % "
                               "crossing to the smoothed envelope's first 90 % crossing"),
                       low=min(shots), high=max(shots))]

    @staticmethod
    def _shot(ctx: Any, tracker: RailTracker, params: Mapping[str, Any], *, rail: float,
              out_ch: int, rail_ch: int, vpp: float, offset: float, carrier: float,
              window: float, shot: int, key: str, timeout_s: float) -> dict[str, Any]:
        scope, supply = ctx.bench.scope, ctx.bench.supply
        tracker.off()
        dwell(ctx, float(params["off_s"]))  # on the bench's time base: the rail really discharges
        supply.set_voltage(rail)
        rate = min(float(params["samples_per_cycle"]) * carrier, float(params["max_points"]) / window)
        scope.setup_channel(out_ch, scale_v_div=1.3 * vpp / 8, offset_v=offset)
        scope.setup_channel(rail_ch, scale_v_div=1.25 * rail / 8, offset_v=rail / 2)
        scope.set_timebase(window_s=window, sample_rate_hz=rate)
        scope.set_trigger(source=rail_ch, level_v=0.5 * rail, slope="rising")
        # Arm, switch on, then wait: the scope driver's acquire() arms and waits in one call,
        # so the two halves are sent through the instrument's generic operations.
        scope.command("arm")
        # The scope and the supply are separate connections: a reply from the scope after
        # the arm proves the arm took effect before the supply switches on (else the edge
        # could come first and be missed).
        scope.ask("identify")
        supply.output(True)
        tracker.branch, tracker.rail_v = "below", rail
        with scope.timeout(timeout_s + window):
            scope.ask("opc")
        out = scope.fetch(out_ch)
        rail_wf = scope.fetch(rail_ch)
        t = np.asarray(out.time_s, dtype=float)
        y = np.asarray(out.volts, dtype=float)
        r = np.asarray(rail_wf.volts, dtype=float)
        got = analyse_shot(t, y, r, fs_hz=1.0 / out.dt_s, carrier_hz=carrier, rail_target_v=rail)
        path = ctx.save_waveform(key, t_s=t, output_v=y, rail_v=r) if params["save"] else None
        got.update(kind="shot", shot=shot, window_s=window, waveform=path, rail_set_v=rail,
                   oscillating=got["final_vpp_v"] > 0.5 * vpp, records=1,
                   rail_v=finite_or_none(supply.measure_voltage()),
                   current_a=finite_or_none(supply.measure_current()))
        return got
