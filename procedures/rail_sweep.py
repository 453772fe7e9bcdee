"""Rail sweep: step the rail up (and on request back down), measuring the output at each point.

At every point the rail is set (no faster than the plan's ramp rate), the supply settles,
the output channel is autoscaled and K records are taken (see
:func:`benchctl.procedures.measure.measure_output`). With ``down = true`` the sweep comes
back from the top, so the two branches show the hysteresis between start-up (upward) and
dropout (downward). With ``adaptive = true`` points are added in rounds where the
oscillating state flips or the Vpp curve bends, down to ``resolution_v``.

Point keys: ``up-NNN-<rail>`` / ``down-NNN-<rail>`` for the grid, ``up-rR-<rail>`` for
refinement round R -- all follow from the parameters and the earlier rows.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from benchctl.errors import ConfigError
from benchctl.procedures.base import (
    Column,
    Param,
    Procedure,
    Result,
    order_problem,
    register,
)
from benchctl.procedures.common import (
    RailTracker,
    Settling,
    check_rail,
    interpolate_at,
    point_key,
    rail_grid,
    refine_rails,
)
from benchctl.procedures.measure import (
    OUTPUT_COLUMNS,
    SETUP_COLUMNS,
    MeasureOptions,
    ScopeMemory,
    measure_output_deferred,
    setup_as_row,
    setup_from_row,
)

SWEEP_COLUMNS: tuple[Column, ...] = (
    Column("branch", "", "up (approached from below) or down (from above, after running)"),
    Column("round", "", "0 for the grid, R for refinement round R"),
    *OUTPUT_COLUMNS,
    *SETUP_COLUMNS,  # the set-up remembered after the point: a resumed sweep starts from it
)


def _remembered(memory: ScopeMemory | None) -> dict[str, Any]:
    """The memory's set-up as row cells (None when nothing is remembered)."""
    if memory is None or memory.setup is None:
        return {c.name: None for c in SETUP_COLUMNS}
    return setup_as_row(memory.setup)


def _recall(memory: ScopeMemory | None, row: Mapping[str, Any]) -> None:
    """After a point (measured or replayed), remember the set-up its row recorded."""
    if memory is not None and row.get("scope_scale_v_div") is not None:
        memory.setup = setup_from_row(row)
    elif memory is not None:
        memory.setup = None


MEASURE_PARAMS: tuple[Param, ...] = (
    Param("records", int, "", 2, "records acquired and averaged per point", minimum=1, maximum=64),
    Param("cycles", float, "", 200.0, "carrier cycles per record (autoscale)", minimum=4.0),
    Param("vpp_method", str, "", "fit", "Vpp estimator: IEEE 1057 sine fit or robust statistics",
          choices=("fit", "robust")),
    Param("max_rescales", int, "", 3, "re-autoscales allowed after a clipped record", minimum=0),
    Param("settle_tol_v", float, "V", 0.005, "rail settled when within this of the setpoint",
          minimum=1e-6),
    Param("settle_timeout_s", float, "s", 2.0, "longest wait for the rail to settle", minimum=0.0),
    Param("hold_s", float, "s", 0.002, "wait after the rail settles, for the board", minimum=0.0),
)
"""Parameters shared by every procedure that measures the output with measure_output()."""


def measure_options(params: Mapping[str, Any]) -> MeasureOptions:
    return MeasureOptions(records=int(params["records"]), cycles=float(params["cycles"]),
                          vpp_method=params["vpp_method"], max_rescales=int(params["max_rescales"]))


def settling(params: Mapping[str, Any]) -> Settling:
    return Settling(tol_v=float(params["settle_tol_v"]), timeout_s=float(params["settle_timeout_s"]),
                    hold_s=float(params["hold_s"]))


def sweep_points(
    ctx: Any,
    tracker: RailTracker,
    opts: MeasureOptions,
    rails: Sequence[float],
    *,
    branch: str,
    tag: str,
    round_no: int,
    floor_v: float,
    top_v: float,
    done: int = 0,
    total: int | None = None,
    memory: ScopeMemory | None = None,
) -> list[Mapping[str, Any]]:
    """Measure ``rails`` in the given order on one branch; returns the rows.

    Each point's analysis is made while the next point is acquired (``ctx.point_later``);
    all rows are in when this returns.
    """
    rows: list[Mapping[str, Any]] = []
    side = "below" if branch == "up" else "above"

    def taken(row: Mapping[str, Any], replayed: bool) -> None:
        if replayed:
            _recall(memory, row)  # a measured point left the memory as its row says already
        rows.append(row)
        ctx.progress(done + len(rows), total, {"rail_v": row.get("rail_set_v"),
                                               "vpp_v": row.get("vpp_v"),
                                               "oscillating": row.get("oscillating")})

    for i, rail_v in enumerate(rails):
        ctx.check_abort()
        key = point_key(branch, tag if round_no else f"{i:03d}", rail_v)

        def measure(rail_v: float = rail_v) -> Callable[[], dict[str, Any]]:
            tracker.at(rail_v, branch=side, floor_v=floor_v, top_v=top_v)  # type: ignore[arg-type]
            finish = measure_output_deferred(ctx, opts, rail_set_v=rail_v, memory=memory)
            remembered = _remembered(memory)  # as this point leaves it

            def row() -> dict[str, Any]:
                out = finish()
                out.update(branch=branch, round=round_no, **remembered)
                return out
            return row

        ctx.point_later(key, measure, taken)
    ctx.flush()
    return rows


def run_branch(
    ctx: Any,
    tracker: RailTracker,
    opts: MeasureOptions,
    params: Mapping[str, Any],
    *,
    branch: str,
    start_v: float,
    stop_v: float,
    done: int = 0,
    total: int | None = None,
    memory: ScopeMemory | None = None,
) -> list[Mapping[str, Any]]:
    """The grid of one branch, then (``params["adaptive"]``) refinement rounds."""
    lo, hi = min(start_v, stop_v), max(start_v, stop_v)
    grid = rail_grid(lo, hi, float(params["step_v"]))
    if branch == "down":
        grid = grid[::-1]
    rows = list(sweep_points(ctx, tracker, opts, grid, branch=branch, tag="", round_no=0,
                             floor_v=lo, top_v=hi, done=done, total=total, memory=memory))
    if not params.get("adaptive", False):
        return rows
    max_points = int(params["max_points"])
    for round_no in range(1, 32):  # bounded: each round halves the intervals it touches
        new = refine_rails([r["rail_set_v"] for r in rows], [r["vpp_v"] for r in rows],
                           [bool(r["oscillating"]) for r in rows],
                           resolution_v=float(params["resolution_v"]),
                           bend_tol_vpp=float(params["bend_tol_vpp"]))
        room = max_points - len(rows)
        if not new or room <= 0:
            break
        new = new[:room]
        if branch == "down":
            new = new[::-1]
        rows += sweep_points(ctx, tracker, opts, new, branch=branch, tag=f"r{round_no}",
                             round_no=round_no, floor_v=lo, top_v=hi, done=done + len(rows),
                             total=total, memory=memory)
    return sorted(rows, key=lambda r: r["rail_set_v"])


def flip_bracket(rows: Sequence[Mapping[str, Any]], *, branch: str) -> tuple[float, float] | None:
    """The rails around the state flip of one branch: (last off, first on) going up.

    For the up branch: the lowest oscillating rail and the highest non-oscillating rail
    below it (start-up). For the down branch: the lowest rail still oscillating, reached
    from above, and the highest non-oscillating rail below it (dropout). None if the
    branch never flips.
    """
    pts = sorted((r["rail_set_v"], bool(r["oscillating"])) for r in rows if r["branch"] == branch)
    if branch == "up":
        on = [v for v, s in pts if s]
        if not on:
            return None
        first_on = on[0]
        off = [v for v, s in pts if not s and v < first_on]
        return (off[-1], first_on) if off else None
    # down: walk from the top down to the first non-oscillating rail
    lowest_on = None
    for v, s in reversed(pts):
        if s:
            lowest_on = v
        else:
            return (v, lowest_on) if lowest_on is not None else None
    return None


def bracket_result(name: str, bracket: tuple[float, float] | None, *, what: str,
                   method: str) -> Result:
    if bracket is None:
        return Result(name, None, "V", method=method, note=f"no {what} flip inside the sweep")
    lo, hi = bracket
    return Result(name, (lo + hi) / 2, "V", uncertainty=(hi - lo) / math.sqrt(12.0),
                  method=method, low=lo, high=hi)


def at_nominal(rows: Sequence[Mapping[str, Any]], column: str, nominal_v: float, *,
               unit: str, name: str, ucol: str | None = None) -> Result:
    """Interpolate a column of the oscillating up-branch rows at ``nominal_v``."""
    pts = [r for r in rows if r["oscillating"] and r.get(column) is not None
           and r.get("branch", "up") == "up"]
    x = [r["rail_set_v"] for r in pts]
    y = [r[column] for r in pts]
    u = [r.get(ucol) for r in pts] if ucol else None
    if u is not None and any(v is None for v in u):
        u = None
    val, unc = interpolate_at(x, y, nominal_v, u)
    if val is None:
        return Result(name, None, unit, method="linear interpolation between sweep points",
                      note=f"{nominal_v:g} V is outside the oscillating points of the sweep")
    return Result(name, val, unit, uncertainty=unc,
                  method=f"linear interpolation at {nominal_v:g} V between sweep points")


@register
class RailSweep(Procedure):
    name = "rail_sweep"
    summary = "Step the rail up (and back down), measuring Vpp, frequency, THD, current, state"
    params = (
        Param("start_v", float, "V", 2.0, "lowest rail of the sweep", minimum=0.0, rail=True),
        Param("stop_v", float, "V", 5.5, "highest rail of the sweep", minimum=0.0, rail=True),
        Param("step_v", float, "V", 0.1, "grid step", minimum=1e-4),
        Param("down", bool, "", True, "also sweep back down from stop_v (hysteresis)"),
        Param("adaptive", bool, "", False, "add points where the state flips or the curve bends"),
        Param("resolution_v", float, "V", 0.02, "finest spacing the refinement goes to",
              minimum=1e-4),
        Param("bend_tol_vpp", float, "V", 0.02,
              "refine where a point leaves its neighbours' chord by more than this (Vpp)",
              minimum=0.0),
        Param("max_points", int, "", 200, "cap on points per branch with refinement", minimum=2),
        Param("nominal_v", float, "V", 5.0, "nominal rail for vpp/current at nominal",
              minimum=0.0, rail=True),
        *MEASURE_PARAMS,
    )
    columns = SWEEP_COLUMNS
    results = ("dropout_v", "startup_v", "vpp_at_nominal_v", "current_at_nominal_a")

    @classmethod
    def check(cls, params, *, earlier, wiring=None):
        return order_problem(params, "start_v", "stop_v")

    def run(self, ctx: Any, params: Mapping[str, Any]) -> list[Result]:
        start_v, stop_v = float(params["start_v"]), float(params["stop_v"])
        for v, what in ((start_v, "start_v"), (stop_v, "stop_v")):
            check_rail(ctx, v, what=f"rail_sweep {what}")
        if not stop_v > start_v:
            raise ConfigError("plan", "params", f"rail_sweep: stop_v={stop_v!r} must be above start_v={start_v!r}")
        opts = measure_options(params)
        tracker = RailTracker(ctx, settling(params))
        n_grid = len(rail_grid(start_v, stop_v, float(params["step_v"])))
        total = n_grid * (2 if params["down"] else 1)
        memory = ScopeMemory()
        rows = list(run_branch(ctx, tracker, opts, params, branch="up", start_v=start_v,
                               stop_v=stop_v, total=total, memory=memory))
        if params["down"]:
            rows += run_branch(ctx, tracker, opts, params, branch="down", start_v=start_v,
                               stop_v=stop_v, done=len(rows), total=total, memory=memory)
        ctx.log.info("rail_sweep: %d autoscales, %d points measured with the previous set-up "
                     "(%d retuned it)", memory.autoscales, memory.reused, memory.retunes)
        step = "adaptive sweep" if params["adaptive"] else "sweep"
        results = [
            bracket_result("startup_v", flip_bracket(rows, branch="up"), what="start-up",
                           method=f"bracket from the upward {step} (midpoint, width/sqrt(12))"),
        ]
        if params["down"]:
            results.append(bracket_result(
                "dropout_v", flip_bracket(rows, branch="down"), what="dropout",
                method=f"bracket from the downward {step} (midpoint, width/sqrt(12))"))
        else:
            results.append(Result("dropout_v", None, "V", method="needs the downward sweep",
                                   note="down = false: no downward branch was measured"))
        nominal_v = float(params["nominal_v"])
        results.append(at_nominal(rows, "vpp_v", nominal_v, unit="V", name="vpp_at_nominal_v",
                                  ucol="u_vpp_v"))
        results.append(at_nominal(rows, "current_a", nominal_v, unit="A",
                                  name="current_at_nominal_a"))
        return results
