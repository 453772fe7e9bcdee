"""Modulation through the rail: the generator summed onto the supply rail at a set of depths.

The rail sits at the centre of the linear region (``centre_v``, default: the middle of an
earlier linear_region step's region). Three static points (centre and centre +/- delta_v)
give the output Vpp at the centre and the static supply sensitivity S. Then, for each depth
(generator Vpp on the rail), one record of ``mod_cycles`` modulation periods is taken and the
modulation index is measured from the envelope (analytic signal) and from the sidebands,
with the envelope's THD. The quasi-static prediction for a depth d is

    m_pred = S * (d / 2) / Vpp(centre)

(a rail swing of +/- d/2 moves Vpp by +/- S d/2 about Vpp(centre)). Needs the bench wiring
``generator = "rail"``. The rail's peak, centre + d/2, is checked against max_rail_v for every
depth before anything is switched on; the generator is switched off when the step ends.
"""

from __future__ import annotations

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
    earlier_names,
    register,
)
from benchctl.procedures.common import RailTracker, check_rail, finite_or_none, point_key
from benchctl.procedures.measure import (
    OUTPUT_COLUMNS,
    ScopeSetup,
    acquire_output,
    measure_output,
)
from benchctl.procedures.rail_sweep import MEASURE_PARAMS, measure_options, settling

MOD_COLUMNS: tuple[Column, ...] = (
    Column("kind", "", "static (no modulation) or depth"),
    Column("depth_vpp", "V", "generator amplitude summed onto the rail (0 for static points)"),
    Column("m_envelope", "", "modulation index from the envelope"),
    Column("u_m_envelope", "", "standard uncertainty of m_envelope"),
    Column("m_spectrum", "", "index from the sideband phasors at fc +/- fm, with the FM "
           "sidebands of frequency pushing rejected (a cross-check of m_envelope)"),
    Column("m_predicted", "", "quasi-static prediction from the static sensitivity"),
    Column("envelope_thd_db", "dB", "THD of the recovered envelope (IEEE 1241)"),
    Column("carrier_vpp_v", "V", "carrier Vpp under modulation (2 x mean envelope)"),
    *OUTPUT_COLUMNS,
)


@register
class Modulation(Procedure):
    name = "modulation"
    summary = "AM through the rail: index vs depth, envelope distortion, index vs prediction"
    params = (
        Param("centre_v", float, "V", None, "rail at the centre of the linear region "
              "(default: from an earlier linear_region step)", minimum=0.0, rail=True),
        Param("source", str, "", "linear_region", "earlier step giving the linear region"),
        Param("depths_vpp", list, "V", [0.1, 0.2, 0.4, 0.8, 1.6],
              "generator amplitudes on the rail, Vpp", minimum=1e-4),
        Param("mod_hz", float, "Hz", 2e3, "modulating frequency", minimum=1.0),
        Param("mod_cycles", float, "", 3.0, "modulation periods per record", minimum=1.0),
        Param("samples_per_cycle", float, "", 16.0, "samples per carrier cycle", minimum=4.0),
        Param("delta_v", float, "V", 0.1, "offset of the two static points around the centre",
              minimum=1e-3),
        Param("thd_limit_db", float, "dB", -30.0, "envelope THD limit for a clean depth"),
        Param("mod_settle_s", float, "s", 0.001, "wait after the generator is on", minimum=0.0),
        *MEASURE_PARAMS,
    )
    columns = MOD_COLUMNS
    results = ("modulation_ratio", "max_clean_depth_vpp", "envelope_thd_db")

    @classmethod
    def check(cls, params, *, earlier, wiring=None):
        out = []
        if params["centre_v"] is None and params["source"] not in earlier_names(earlier):
            out.append(("source", f"no earlier step {params['source']!r} to take the linear region's "
                                  "centre from; give centre_v or an earlier step's name"))
        if params["centre_v"] is not None:
            for d in params["depths_vpp"]:
                if params["centre_v"] - d / 2 < 0:
                    out.append(("depths_vpp", f"depth {d:g} Vpp swings the rail below 0 V"))
                    break
        if wiring is not None and getattr(wiring, "generator", "rail") != "rail":
            out.append(("wiring.generator", f"modulation needs the generator summed onto the rail, "
                                            f"got {wiring.generator!r}"))
        return out

    def _centre(self, ctx: Any, params: Mapping[str, Any]) -> float:
        if params["centre_v"] is not None:
            return float(params["centre_v"])
        try:
            got = ctx.earlier(params["source"])
        except KeyError:
            raise ConfigError("plan", "params", f"modulation: give centre_v (no earlier step {params['source']!r})") from None
        lo, hi = got.get("linear_lo_v"), got.get("linear_hi_v")
        if lo is None or hi is None or lo.value is None or hi.value is None:
            raise ConfigError("plan", "params", f"modulation: step {params['source']!r} found no linear region; "
                             "give centre_v")
        return round((lo.value + hi.value) / 2, 6)

    def run(self, ctx: Any, params: Mapping[str, Any]) -> list[Result]:
        wiring = getattr(ctx.bench.wiring, "generator", "rail")
        if wiring != "rail":
            raise ConfigError("bench", "wiring.generator",
                              f"modulation needs the generator summed onto the rail, got {wiring!r}")
        centre = self._centre(ctx, params)
        delta = float(params["delta_v"])
        depths = sorted(float(d) for d in params["depths_vpp"])
        check_rail(ctx, centre + delta, what="modulation static point")
        for d in depths:  # every peak checked before anything is switched on
            check_rail(ctx, centre + d / 2, what=f"modulation peak (centre + {d:g}/2 Vpp)")
            if centre - d / 2 < 0:
                raise ConfigError("plan", "params", f"modulation: depth {d:g} Vpp swings the rail below 0 V")
        opts = measure_options(params)
        tracker = RailTracker(ctx, settling(params))
        gen = ctx.bench.generator
        touched = [False]

        def gen_off() -> None:
            if touched[0]:
                gen.output(False)

        def static(rail_v: float) -> Mapping[str, Any]:
            def measure() -> dict[str, Any]:
                gen_off()
                tracker.from_above(rail_v, top_v=rail_v)
                row = measure_output(ctx, opts, rail_set_v=rail_v)
                row.update(kind="static", depth_vpp=0.0)
                return row

            ctx.check_abort()
            return ctx.point(point_key("static", rail_v), measure)

        try:
            # measured from the top down, so the running board is only ever lowered
            hi_row, c_row, lo_row = static(centre + delta), static(centre), static(centre - delta)
            rows = [lo_row, c_row, hi_row]
            if not all(r["oscillating"] and r.get("vpp_v") for r in rows):
                raise MeasurementError(f"modulation: the board is not oscillating around {centre:g} V")
            sens = (rows[2]["vpp_v"] - rows[0]["vpp_v"]) / (2 * delta)
            vpp_c = float(rows[1]["vpp_v"])
            carrier_hz = float(rows[1]["freq_hz"])
            mod_hz = float(params["mod_hz"])
            window_s = float(params["mod_cycles"]) / mod_hz
            rate_hz = float(params["samples_per_cycle"]) * carrier_hz
            offset = finite_or_none(rows[1].get("offset_v")) or 0.0
            out = []
            for i, depth in enumerate(depths):
                m_pred = sens * depth / 2 / vpp_c

                def measure(depth: float = depth, m_pred: float = m_pred) -> dict[str, Any]:
                    tracker.from_above(centre, top_v=centre)  # running: no power cycle
                    peak = vpp_c + abs(sens) * depth  # largest expected Vpp, with margin below
                    setup = ScopeSetup(scale_v_div=1.3 * peak / 8, offset_v=offset,
                                       window_s=window_s, sample_rate_hz=rate_hz)
                    setup.apply(ctx.bench.scope, ctx.bench.wiring.output_channel)
                    ctx.bench.scope.set_trigger(source="free")
                    gen.set_shape("sine")
                    gen.set_frequency(mod_hz)
                    gen.set_amplitude(depth)
                    gen.set_offset(0.0)
                    touched[0] = True
                    gen.output(True)
                    ctx.clock.sleep(float(params["mod_settle_s"]))
                    wf = acquire_output(ctx, timeout_s=opts.timeout_s + window_s)
                    gen.output(False)
                    if wf.clipped_samples:
                        raise MeasurementError(f"modulation record clipped at depth {depth:g} Vpp")
                    y = np.asarray(wf.volts, dtype=float)
                    fs = 1.0 / wf.dt_s
                    env = analysis.modulation_index_envelope(y, fs_hz=fs, carrier_hz=carrier_hz,
                                                             mod_hz=mod_hz)
                    spec = analysis.modulation_index_spectrum(y, fs_hz=fs, carrier_hz=carrier_hz,
                                                              mod_hz=mod_hz)
                    dist = analysis.envelope_distortion(y, fs_hz=fs, carrier_hz=carrier_hz,
                                                        mod_hz=mod_hz)
                    return {
                        "kind": "depth", "depth_vpp": depth, "m_envelope": env.m,
                        "u_m_envelope": env.u_m, "m_spectrum": spec.m, "m_predicted": m_pred,
                        "envelope_thd_db": finite_or_none(dist.thd_db),
                        "carrier_vpp_v": 2 * env.carrier_v, "rail_set_v": centre,
                        "oscillating": True, "freq_hz": carrier_hz, "records": 1,
                        "vpp_method": "envelope",
                        "rail_v": finite_or_none(ctx.bench.supply.measure_voltage()),
                        "current_a": finite_or_none(ctx.bench.supply.measure_current()),
                    }

                ctx.check_abort()
                row = ctx.point(point_key("depth", i, depth), measure)
                out.append(row)
                ctx.progress(i + 1, len(depths), {"depth_vpp": depth, "m": row["m_envelope"]})
        finally:
            gen_off()
        return self._results(out, float(params["thd_limit_db"]), sens)

    @staticmethod
    def _results(rows: list[Mapping[str, Any]], limit_db: float, sens: float) -> list[Result]:
        first = rows[0]
        ratio = first["m_envelope"] / first["m_predicted"] if first["m_predicted"] else None
        u_ratio = (first["u_m_envelope"] / first["m_predicted"]
                   if ratio is not None and first["u_m_envelope"] is not None else None)
        clean = None
        for r in rows:  # contiguous from the smallest depth
            thd = r["envelope_thd_db"]
            if thd is None or thd > limit_db:
                break
            clean = r
        results = [Result(
            "modulation_ratio", ratio, "",
            uncertainty=u_ratio,
            method=(f"envelope index / quasi-static prediction at {first['depth_vpp']:g} Vpp "
                    f"(static sensitivity {sens:.4g} Vpp/V)"))]
        if clean is None:
            results += [
                Result("max_clean_depth_vpp", None, "V", method=f"envelope THD <= {limit_db:g} dB",
                       note="even the smallest depth exceeds the distortion limit"),
                Result("envelope_thd_db", None, "dB", method="IEEE 1241 THD of the envelope",
                       note="no clean depth"),
            ]
        else:
            results += [
                Result("max_clean_depth_vpp", clean["depth_vpp"], "V",
                       method=f"largest depth (from the smallest up) with envelope THD <= {limit_db:g} dB"),
                Result("envelope_thd_db", clean["envelope_thd_db"], "dB",
                       method=f"IEEE 1241 THD of the envelope at {clean['depth_vpp']:g} Vpp"),
            ]
        return results
