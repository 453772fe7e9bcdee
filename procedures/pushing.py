"""Frequency pushing (Hz per rail volt) and supply current against the rail.

Works from the records of an earlier sweep (``source``: a linear_region or rail_sweep step;
by default the latest linear_region, else the latest rail_sweep) -- its rows are copied into
this step's table so the step stands alone in the run folder. Without an earlier sweep it
measures its own upward sweep. Fits are weighted least squares
(:func:`benchctl.analysis.linear_fit`) over the oscillating points inside the linear
region when an earlier linear_region step gives one (else over ``fit_lo_v``..``fit_hi_v``,
else all oscillating points).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from benchctl import analysis
from benchctl.errors import ConfigError, MeasurementError
from benchctl.procedures.base import (
    Column,
    Param,
    Procedure,
    Result,
    earlier_names,
    order_problem,
    register,
)
from benchctl.procedures.common import RailTracker, check_rail, point_key, rail_grid
from benchctl.procedures.measure import ScopeMemory
from benchctl.procedures.rail_sweep import (
    MEASURE_PARAMS,
    SWEEP_COLUMNS,
    at_nominal,
    measure_options,
    settling,
    sweep_points,
)

PUSHING_COLUMNS: tuple[Column, ...] = (
    Column("source", "", "step the row was copied from ('' when measured here)"),
    *SWEEP_COLUMNS,
)


def _find_source(ctx: Any, source: str) -> tuple[str, list[Mapping[str, Any]]] | None:
    names = [source] if source else ["linear_region", "rail_sweep"]
    for name in names:
        try:
            rows = ctx.earlier_points(name)
        except KeyError:
            continue
        if rows:
            return name, list(rows)
    if source:
        raise ConfigError("plan", "params", f"pushing: no earlier step {source!r} with points in this run")
    return None


def _fit_window(ctx: Any, params: Mapping[str, Any], source: str | None) -> tuple[float, float, str]:
    lo, hi = params["fit_lo_v"], params["fit_hi_v"]
    if lo is not None and hi is not None:
        return float(lo), float(hi), "the given fit window"
    for name in ([source] if source else []) + ["linear_region"]:
        try:
            got = ctx.earlier(name)
        except KeyError:
            continue
        a, b = got.get("linear_lo_v"), got.get("linear_hi_v")
        if a is not None and b is not None and a.value is not None and b.value is not None:
            return float(a.value), float(b.value), f"the linear region of step {name!r}"
    return -float("inf"), float("inf"), "all oscillating points"


def slope_result(name: str, rows: Sequence[Mapping[str, Any]], column: str, ucol: str | None,
                 *, unit: str, lo_v: float, hi_v: float, where: str) -> Result:
    pts = [r for r in rows if r["oscillating"] and r.get(column) is not None
           and lo_v - 1e-9 <= r["rail_set_v"] <= hi_v + 1e-9]
    if len(pts) < 3:
        return Result(name, None, unit, method="weighted least squares",
                      note=f"{len(pts)} usable points in {where}, need 3")
    x = [float(r["rail_set_v"]) for r in pts]
    y = [float(r[column]) for r in pts]
    w = None
    if ucol and all(r.get(ucol) for r in pts):
        w = [1.0 / float(r[ucol]) ** 2 for r in pts]
    try:
        fit = analysis.linear_fit(x, y, w)
    except MeasurementError as exc:
        return Result(name, None, unit, method="weighted least squares", note=exc.reason)
    kind = "weighted least squares (1/u^2)" if w else "least squares"
    return Result(name, float(fit.slope), unit, uncertainty=float(fit.u_slope),
                  method=f"{kind} over {len(pts)} points in {where}; R^2 = {fit.r2:.6f}",
                  low=float(fit.slope) - 1.96 * float(fit.u_slope),
                  high=float(fit.slope) + 1.96 * float(fit.u_slope))


@register
class Pushing(Procedure):
    name = "pushing"
    summary = "Frequency pushing (Hz/V) and supply current against the rail, from sweep records"
    params = (
        Param("source", str, "", "", "earlier sweep step to use (default: latest linear_region, "
              "else rail_sweep; none: measure a sweep here)"),
        Param("fit_lo_v", float, "V", None, "fit window bottom (default: the linear region)",
              minimum=0.0),
        Param("fit_hi_v", float, "V", None, "fit window top", minimum=0.0),
        Param("nominal_v", float, "V", 5.0, "rail for current_at_nominal_a", minimum=0.0,
              rail=True),
        Param("start_v", float, "V", 3.2, "own sweep (no source): lowest rail", minimum=0.0,
              rail=True),
        Param("stop_v", float, "V", 5.5, "own sweep: highest rail", minimum=0.0, rail=True),
        Param("step_v", float, "V", 0.25, "own sweep: step", minimum=1e-4),
        *MEASURE_PARAMS,
    )
    columns = PUSHING_COLUMNS
    results = ("pushing_hz_per_v", "current_slope_a_per_v", "current_at_nominal_a")

    @classmethod
    def check(cls, params, *, earlier, wiring=None):
        out = order_problem(params, "start_v", "stop_v") + order_problem(params, "fit_lo_v", "fit_hi_v")
        if params["source"] and params["source"] not in earlier_names(earlier):
            out.append(("source", f"no earlier step {params['source']!r} to take the points from"))
        return out

    def run(self, ctx: Any, params: Mapping[str, Any]) -> list[Result]:
        found = _find_source(ctx, params["source"])
        if found is not None:
            source, src_rows = found
            rows = []
            columns = {c.name for c in PUSHING_COLUMNS}
            for i, src in enumerate(src_rows):
                copied = {k: v for k, v in src.items() if k in columns}
                copied.update(source=source, branch=src.get("branch", "up"))
                ctx.check_abort()
                rows.append(ctx.point(point_key("src", i, src.get("point", "")),
                                      lambda copied=copied: copied))
            ctx.progress(len(rows), len(rows))
        else:
            source = None
            start_v, stop_v = float(params["start_v"]), float(params["stop_v"])
            check_rail(ctx, start_v, what="pushing start_v")
            check_rail(ctx, stop_v, what="pushing stop_v")
            grid = rail_grid(start_v, stop_v, float(params["step_v"]))
            tracker = RailTracker(ctx, settling(params))
            measured = sweep_points(ctx, tracker, measure_options(params), grid, branch="up",
                                    tag="", round_no=0, floor_v=start_v, top_v=stop_v,
                                    total=len(grid), memory=ScopeMemory())
            rows = [dict(r, source="") for r in measured]
        up_rows = [r for r in rows if r.get("branch", "up") == "up"] or rows
        lo, hi, where = _fit_window(ctx, params, source)
        return [
            slope_result("pushing_hz_per_v", up_rows, "freq_hz", "u_freq_hz", unit="Hz/V",
                         lo_v=lo, hi_v=hi, where=where),
            slope_result("current_slope_a_per_v", up_rows, "current_a", None, unit="A/V",
                         lo_v=lo, hi_v=hi, where=where),
            at_nominal(up_rows, "current_a", float(params["nominal_v"]), unit="A",
                       name="current_at_nominal_a"),
        ]
