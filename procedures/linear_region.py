"""Linear region: a dense upward sweep over the operating range, then the linear-region search.

Reports the supply sensitivity (slope of output Vpp against rail, Vpp per V), the widest
contiguous rail range over which a straight line fits within the tolerance, its span,
the largest deviation from the line (integral nonlinearity) and R^2, from
:func:`benchctl.analysis.linear_region` on the oscillating points.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from benchctl import analysis
from benchctl.errors import ConfigError
from benchctl.procedures.base import Param, Procedure, Result, order_problem, register
from benchctl.procedures.common import RailTracker, check_rail, rail_grid
from benchctl.procedures.measure import ScopeMemory
from benchctl.procedures.rail_sweep import (
    MEASURE_PARAMS,
    SWEEP_COLUMNS,
    measure_options,
    settling,
    sweep_points,
)


def _half_width(ci: Any, value: float | None) -> float | None:
    """Standard uncertainty from a 95 % interval (tuple (lo, hi) or a half-width): hw / 1.96."""
    if ci is None:
        return None
    if isinstance(ci, tuple | list):
        lo, hi = float(ci[0]), float(ci[1])
        return (hi - lo) / 2.0 / 1.96
    return float(ci) / 1.96


def _interval(ci: Any, value: float) -> tuple[float | None, float | None]:
    if isinstance(ci, tuple | list):
        return float(ci[0]), float(ci[1])
    if ci is None:
        return None, None
    return value - float(ci), value + float(ci)


def region_results(rows: list[Mapping[str, Any]], params: Mapping[str, Any]) -> list[Result]:
    """Run the linear-region analysis on the oscillating rows; the six results."""
    pts = sorted((r for r in rows if r["oscillating"] and r.get("vpp_v") is not None),
                 key=lambda r: r["rail_set_v"])
    names = ("supply_sensitivity_vpp_per_v", "linear_lo_v", "linear_hi_v", "linear_span_v",
             "linearity_max_dev_v", "linearity_r2")
    units = ("V/V", "V", "V", "V", "V", "")
    if len(pts) < int(params["min_points"]):
        note = f"{len(pts)} oscillating points, need {int(params['min_points'])}"
        return [Result(n, None, u, method="linear-region search", note=note)
                for n, u in zip(names, units, strict=True)]
    rail = [r["rail_set_v"] for r in pts]
    vpp = [r["vpp_v"] for r in pts]
    u = [r.get("u_vpp_v") for r in pts]
    kw: dict[str, Any] = {"min_points": int(params["min_points"])}
    if params["tol_vpp"] is not None:
        kw["tol_v"] = float(params["tol_vpp"])
    else:
        kw["tol_fraction_fs"] = float(params["tol_fraction_fs"])
    reg = analysis.linear_region(rail, vpp, None if None in u else u, **kw)
    method = f"{reg.method}; {reg.n_points} points"
    lo_i = _interval(getattr(reg, "lo_ci95", None), reg.lo_v)
    hi_i = _interval(getattr(reg, "hi_ci95", None), reg.hi_v)
    s_i = _interval(reg.slope_ci95, reg.slope_vpp_per_v)
    return [
        Result("supply_sensitivity_vpp_per_v", reg.slope_vpp_per_v, "V/V",
               uncertainty=getattr(reg, "u_slope_vpp_per_v", None)
               or _half_width(reg.slope_ci95, reg.slope_vpp_per_v),
               method=method + "; interval = 95 % CI", low=s_i[0], high=s_i[1]),
        Result("linear_lo_v", reg.lo_v, "V", uncertainty=_half_width(getattr(reg, "lo_ci95", None),
               reg.lo_v), method=method, low=lo_i[0], high=lo_i[1]),
        Result("linear_hi_v", reg.hi_v, "V", uncertainty=_half_width(getattr(reg, "hi_ci95", None),
               reg.hi_v), method=method, low=hi_i[0], high=hi_i[1]),
        Result("linear_span_v", reg.hi_v - reg.lo_v, "V", method=method),
        Result("linearity_max_dev_v", reg.max_dev_v, "V",
               method=method + "; largest |Vpp - line| inside the region"),
        Result("linearity_r2", reg.r2, "", method=method),
    ]


@register
class LinearRegion(Procedure):
    name = "linear_region"
    summary = "Dense sweep over the operating range; supply sensitivity, linear region, linearity"
    params = (
        Param("start_v", float, "V", 3.1, "lowest rail", minimum=0.0, rail=True),
        Param("stop_v", float, "V", 5.9, "highest rail", minimum=0.0, rail=True),
        Param("step_v", float, "V", 0.05, "grid step", minimum=1e-4),
        Param("tol_vpp", float, "V", None, "linearity tolerance, Vpp (absolute); "
              "default: tol_fraction_fs", minimum=0.0),
        Param("tol_fraction_fs", float, "", 0.002,
              "linearity tolerance as a fraction of the largest Vpp", minimum=0.0),
        Param("min_points", int, "", 5, "fewest points a region may have", minimum=3),
        *MEASURE_PARAMS,
    )
    columns = SWEEP_COLUMNS
    results = ("supply_sensitivity_vpp_per_v", "linear_lo_v", "linear_hi_v", "linear_span_v",
               "linearity_max_dev_v", "linearity_r2")

    @classmethod
    def check(cls, params, *, earlier, wiring=None):
        return order_problem(params, "start_v", "stop_v")

    def run(self, ctx: Any, params: Mapping[str, Any]) -> list[Result]:
        start_v, stop_v = float(params["start_v"]), float(params["stop_v"])
        check_rail(ctx, start_v, what="linear_region start_v")
        check_rail(ctx, stop_v, what="linear_region stop_v")
        if not stop_v > start_v:
            raise ConfigError("plan", "params", f"linear_region: stop_v={stop_v!r} must be above start_v={start_v!r}")
        grid = rail_grid(start_v, stop_v, float(params["step_v"]))
        tracker = RailTracker(ctx, settling(params))
        rows = sweep_points(ctx, tracker, measure_options(params), grid, branch="up", tag="",
                            round_no=0, floor_v=start_v, top_v=stop_v, total=len(grid),
                            memory=ScopeMemory())
        return region_results(list(rows), params)
