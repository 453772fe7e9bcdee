"""Dropout and start-up voltages by bisection, each with its interval.

Dropout: every probe brings the board up to ``running_v`` (above start-up), holds it there
and lowers the rail to the probe voltage -- continuing downward without going back up
when the previous probe was higher and still oscillating, which is the same state.
Start-up: every probe cycles the output off, sets the probe voltage and turns it on.

The output channel set-up is fixed once (from an earlier sweep's rows, or from one
measurement at ``running_v``: the ``setup`` point), so each decision costs exactly one
acquisition where detection is clear; near the threshold, where the detector's evidence is
close to its decision boundary, the same probe is repeated (a sequential majority vote,
:func:`benchctl.procedures.common.decide`), at most ``max_repeats`` extra times.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from benchctl.errors import ConfigError
from benchctl.procedures.base import (
    Column,
    Param,
    Procedure,
    Result,
    earlier_names,
    order_problem,
    register,
)
from benchctl.procedures.common import (
    RailTracker,
    ThresholdSearch,
    Vote,
    check_rail,
    finite_or_none,
    point_key,
    search_threshold,
)
from benchctl.procedures.measure import (
    OUTPUT_COLUMNS,
    SETUP_COLUMNS,
    dwell,
    measure_output,
    probe_oscillation,
    setup_as_row,
    setup_from_reading,
    setup_from_row,
    vote_from,
)
from benchctl.procedures.rail_sweep import MEASURE_PARAMS, measure_options, settling

THRESHOLD_COLUMNS: tuple[Column, ...] = (
    Column("search", "", "setup, dropout or startup"),
    Column("label", "", "which decision: hi, lo, bNN (bisection step)"),
    Column("repeat", "", "repeat of the decision, from 0"),
    Column("vote_clear", "", "evidence far from the detector's threshold: decides alone"),
    Column("vote_score", "dB", "signed evidence: SNR minus the detector's threshold"),
    *OUTPUT_COLUMNS,
    *SETUP_COLUMNS,
)


def _earlier_bracket(ctx: Any, name: str, source: str) -> tuple[float, float] | None:
    try:
        got = ctx.earlier(source)
    except KeyError:
        return None
    res = got.get(name)
    if res is None or res.low is None or res.high is None:
        return None
    return float(res.low), float(res.high)


def _earlier_setup_row(ctx: Any, source: str, running_v: float) -> Mapping[str, Any] | None:
    """The earlier sweep's oscillating row nearest to ``running_v`` (to set the scope up)."""
    try:
        rows = ctx.earlier_points(source)
    except KeyError:
        return None
    osc = [r for r in rows if r.get("oscillating") and finite_or_none(r.get("vpp_v"))
           and finite_or_none(r.get("freq_hz")) and r.get("rail_set_v") is not None
           and r["rail_set_v"] <= running_v + 1e-9]
    if not osc:
        return None
    return max(osc, key=lambda r: r["rail_set_v"])


def threshold_result(name: str, search: ThresholdSearch, *, what: str, resolution_v: float) -> Result:
    repeats = sum(len(d.votes) - 1 for d in search.decisions)
    method = (f"bisection to {resolution_v * 1e3:g} mV: {len(search.decisions)} decisions, "
              f"{search.acquisitions} acquisitions ({repeats} repeats where noisy); "
              "value = bracket midpoint, u = width/sqrt(12)")
    if search.value_v is None:
        return Result(name, None, "V", method=method, low=search.low_v, high=search.high_v,
                      note=f"{what}: {search.note}")
    return Result(name, search.value_v, "V", uncertainty=search.u_v, method=method,
                  low=search.low_v, high=search.high_v)


@register
class DropoutStartup(Procedure):
    name = "dropout_startup"
    summary = "Find the dropout and start-up voltages by bisection, with intervals"
    params = (
        Param("lo_v", float, "V", None, "bottom of the search range (default: from an earlier "
              "sweep's bracket, widened by margin_v)", minimum=0.0, rail=True),
        Param("hi_v", float, "V", None, "top of the search range (default: as lo_v)",
              minimum=0.0, rail=True),
        Param("margin_v", float, "V", 0.05, "widening of an earlier sweep's bracket", minimum=0.0),
        Param("running_v", float, "V", None, "rail where the board surely runs (default: the "
              "top of the start-up range)", minimum=0.0, rail=True),
        Param("resolution_v", float, "V", 0.005, "bracket width to stop at", minimum=1e-5),
        Param("max_repeats", int, "", 4, "extra acquisitions allowed per noisy decision",
              minimum=0, maximum=20),
        Param("clear_margin_db", float, "dB", 6.0,
              "evidence this far from the detector's threshold decides alone", minimum=0.0),
        Param("min_snr_db", float, "dB", 0.0, "detector: least SNR (total powers) for "
              "'oscillating'; low, so that the peak-prominence test (which gains from the "
              "record length) decides faint signals"),
        Param("min_prominence_db", float, "dB", 20.0, "detector: least spectral-peak "
              "prominence over the periodogram median", minimum=0.0),
        Param("off_s", float, "s", 0.01, "output off this long before each start-up probe",
              minimum=0.0),
        Param("startup_wait_s", float, "s", 0.02, "after each start-up probe's power-on, the "
              "output is watched this long before the decision record (slow growth near the "
              "threshold)", minimum=0.0),
        Param("start_hold_s", float, "s", 0.01, "hold at running_v before lowering the rail",
              minimum=0.0),
        Param("search", str, "", "both", "which thresholds to find",
              choices=("both", "dropout", "startup")),
        Param("source", str, "", "rail_sweep", "earlier step giving default ranges and the "
              "scope set-up ('' for none)"),
        Param("probe_cycles", float, "", 64.0, "carrier cycles per decision record", minimum=4.0),
        Param("samples_per_cycle", float, "", 16.0, "samples per carrier cycle", minimum=4.0),
        *MEASURE_PARAMS,
    )
    columns = THRESHOLD_COLUMNS
    results = ("dropout_v", "startup_v", "hysteresis_v")

    @classmethod
    def check(cls, params, *, earlier, wiring=None):
        out = order_problem(params, "lo_v", "hi_v")
        if (params["lo_v"] is None or params["hi_v"] is None) and (
                not params["source"] or params["source"] not in earlier_names(earlier)):
            out.append(("lo_v", f"give lo_v and hi_v, or name an earlier sweep in source "
                                f"(no earlier step {params['source']!r})"))
        return out

    def _ranges(self, ctx: Any, params: Mapping[str, Any]) -> dict[str, tuple[float, float]]:
        out = {}
        margin = float(params["margin_v"])
        for what in ("dropout", "startup"):
            lo, hi = params["lo_v"], params["hi_v"]
            if lo is None or hi is None:
                br = _earlier_bracket(ctx, f"{what}_v", params["source"]) if params["source"] else None
                if br is None:
                    raise ConfigError("plan", "params", f"dropout_startup: give lo_v and hi_v (no earlier step "
                                     f"{params['source']!r} bracketing {what}_v)")
                lo = br[0] - margin if lo is None else lo
                hi = br[1] + margin if hi is None else hi
            lo, hi = round(max(float(lo), 0.0), 6), round(float(hi), 6)
            check_rail(ctx, hi, what=f"dropout_startup {what} range top")
            if not hi > lo:
                raise ConfigError("plan", "params", f"dropout_startup: hi_v={hi!r} must be above lo_v={lo!r}")
            out[what] = (lo, hi)
        return out

    def run(self, ctx: Any, params: Mapping[str, Any]) -> list[Result]:
        ranges = self._ranges(ctx, params)
        running_v = params["running_v"]
        running_v = float(running_v) if running_v is not None else max(ranges["startup"][1],
                                                                       ranges["dropout"][1])
        check_rail(ctx, running_v, what="dropout_startup running_v")
        opts = measure_options(params)
        tracker = RailTracker(ctx, settling(params))
        resolution_v = float(params["resolution_v"])
        band: tuple[float, float] | None = None

        # -- the fixed scope set-up ------------------------------------------------------
        def measure_setup() -> dict[str, Any]:
            tracker.from_above(running_v, top_v=running_v, start_hold_s=float(params["start_hold_s"]))
            row = measure_output(ctx, opts, rail_set_v=running_v)
            setup = setup_from_reading(row, cycles=float(params["probe_cycles"]),
                                       samples_per_cycle=float(params["samples_per_cycle"]))
            row.update(setup_as_row(setup), search="setup", label="setup", repeat=0)
            return row

        earlier = _earlier_setup_row(ctx, params["source"], running_v) if params["source"] else None
        if earlier is not None:
            reading: Mapping[str, Any] = earlier
            setup = setup_from_reading(earlier, cycles=float(params["probe_cycles"]),
                                       samples_per_cycle=float(params["samples_per_cycle"]))
        else:
            reading = ctx.point("setup", measure_setup)
            setup = setup_from_row(reading)
        # The carrier must stay within an octave of the running board's: a line elsewhere
        # (a spur, mains pick-up) does not count as oscillating.
        freq = finite_or_none(reading.get("freq_hz"))
        if freq:
            band = (0.5 * freq, 2.0 * freq)
        clear_db = float(params["clear_margin_db"])
        thresholds = {"min_snr_db": float(params["min_snr_db"]),
                      "min_prominence_db": float(params["min_prominence_db"])}
        done = [0]

        def make_probe(what: str):
            def probe(rail_v: float, label: str, repeat: int) -> Vote:
                def measure() -> dict[str, Any]:
                    if what == "dropout":
                        tracker.from_above(rail_v, top_v=running_v,
                                           start_hold_s=float(params["start_hold_s"]))
                    else:
                        tracker.power_cycle_at(rail_v, off_s=float(params["off_s"]))
                        dwell(ctx, float(params["startup_wait_s"]), timeout_s=opts.timeout_s)
                    det, _wf = probe_oscillation(ctx, setup, band_hz=band, timeout_s=opts.timeout_s,
                                                 **thresholds)
                    vote = vote_from(det, clear_margin_db=clear_db, **thresholds)
                    return {
                        "search": what, "label": label, "repeat": repeat,
                        "vote_clear": vote.clear, "vote_score": vote.score,
                        "rail_set_v": rail_v, "oscillating": vote.oscillating,
                        "osc_snr_db": finite_or_none(getattr(det, "snr_db", None)),
                        "osc_evidence": str(getattr(det, "reason", "")), "records": 1,
                        "rail_v": finite_or_none(ctx.bench.supply.measure_voltage()),
                        "current_a": finite_or_none(ctx.bench.supply.measure_current()),
                        **setup_as_row(setup),
                    }

                ctx.check_abort()
                row = ctx.point(point_key(what, label, rail_v, f"r{repeat}"), measure)
                done[0] += 1
                ctx.progress(done[0], None, {"search": what, "rail_v": rail_v,
                                             "oscillating": row["oscillating"]})
                return Vote(bool(row["oscillating"]), bool(row["vote_clear"]),
                            float(row["vote_score"]))

            return probe

        results: list[Result] = []
        found: dict[str, Result] = {}
        for what in ("dropout", "startup"):
            if params["search"] not in ("both", what):
                continue
            lo, hi = ranges[what]
            search = search_threshold(make_probe(what), lo_v=lo, hi_v=hi,
                                      resolution_v=resolution_v,
                                      max_repeats=int(params["max_repeats"]))
            res = threshold_result(f"{what}_v", search, what=what, resolution_v=resolution_v)
            found[what] = res
            results.append(res)
        d, s = found.get("dropout"), found.get("startup")
        if d is not None and s is not None:
            if d.value is not None and s.value is not None:
                u = math.hypot(d.uncertainty or 0.0, s.uncertainty or 0.0)
                results.append(Result(
                    "hysteresis_v", s.value - d.value, "V", uncertainty=u,
                    method="start-up minus dropout; u root-sum-square; interval from the brackets",
                    low=(s.low - d.high) if s.low is not None and d.high is not None else None,
                    high=(s.high - d.low) if s.high is not None and d.low is not None else None))
            else:
                results.append(Result("hysteresis_v", None, "V",
                                      method="start-up minus dropout",
                                      note="dropout or start-up not found in its range"))
        return results
