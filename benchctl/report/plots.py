"""Plots of a step's points, drawn on :class:`matplotlib.figure.Figure` objects (Agg).

No pyplot: every figure is created here, saved and dropped, so no global state leaks
between calls. Plot kinds register with :func:`plot_kind`; each looks at the columns that
exist, draws what it can and claims the columns it used. Columns nobody claims get a plot
of their own against the rail (or the point order) by the generic kind, so nothing that
was measured is silently left out.

Column naming the plots understand (the procedures' units-in-names convention):
``rail_v`` on x; ``vpp*_v`` amplitude; ``freq*_hz`` frequency; ``*current*_a`` or ``i_*_a``
supply current; ``thd*`` distortion; ``direction`` or ``branch`` (up/down) for hysteresis;
``*depth*`` with ``*index*`` or ``m_*`` for modulation; uncertainty of ``X_v`` in ``X_u_v``, ``X_std_v``, ``X_unc_v``,
``X_sigma_v``, ``u_X_v`` or ``X_v_u``; cells ending in ``.npz`` reference waveforms.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from benchctl.errors import ConfigError
from benchctl.report.formatting import fmt
from benchctl.report.runview import X_CANDIDATES, RunView, StepData, direction_column, finite

MAX_GENERIC_PLOTS = 8  # panels in the one "other columns" figure of a step
MAX_WAVEFORMS = 4
_UNC_MARK = re.compile(r"(^u_)|(_(u|unc|std|sigma)(_|$))")


@dataclass
class Drawn:
    """One saved plot."""

    kind: str
    title: str
    file: str  # relative to the report folder


@dataclass
class StepPlots:
    """What was drawn for a step, and what was not, in words."""

    step: StepData
    drawn: list[Drawn] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


@dataclass
class _Ctx:
    run: RunView
    step: StepData
    x: str | None
    used: set[str]
    notes: list[str]


PlotFn = Callable[[_Ctx], list[tuple[str, Figure]]]
KINDS: dict[str, PlotFn] = {}


def plot_kind(name: str) -> Callable[[PlotFn], PlotFn]:
    """Register a plot kind; it returns ``[(title, figure), ...]`` (empty if not applicable)."""

    def deco(fn: PlotFn) -> PlotFn:
        if name in KINDS:
            raise ValueError(f"plot kind {name!r} registered twice")
        KINDS[name] = fn
        return fn

    return deco


def draw_step(run: RunView, step: StepData, out_dir: Path) -> StepPlots:
    """Draw every applicable plot of ``step`` into ``out_dir``; return what was done."""
    result = StepPlots(step)
    frame = step.frame
    if frame.empty:
        result.notes.append("no points recorded")
        return result
    x = next((c for c in X_CANDIDATES if c in frame.columns and _numeric(frame[c]) is not None), None)
    ctx = _Ctx(run, step, x, {"point", *X_CANDIDATES}, result.notes)
    for kind, fn in KINDS.items():
        with np.errstate(all="ignore"):  # extreme values (1e300) overflow in axis limits
            figures = fn(ctx)
        for n, (title, fig) in enumerate(figures):
            name = f"{step.label}-{kind}{'' if n == 0 else f'-{n + 1}'}.png"
            with np.errstate(all="ignore"):
                fig.savefig(out_dir / name, format="png", dpi=100)
            result.drawn.append(Drawn(kind, title, name))
    if not result.drawn and not result.notes:
        columns = [c for c in frame.columns if c != "point"]
        result.notes.append(f"nothing to plot: {', '.join(columns) or 'no columns'} "
                            "(only the rail, or no numbers)")
    return result


# ---------------------------------------------------------------- helpers
def _numeric(series: pd.Series) -> np.ndarray | None:
    """Column as float array (bools as 0/1), or None if it holds no finite number."""
    values = []
    for v in series.tolist():
        if isinstance(v, bool):
            values.append(float(v))
        else:
            x = finite(v) if not isinstance(v, str) else None
            values.append(math.nan if x is None else x)
    arr = np.asarray(values, dtype=float)
    return arr if np.isfinite(arr).any() else None


def _err(u: np.ndarray) -> np.ndarray:
    """Error-bar half lengths: |u| where finite, else 0 (matplotlib refuses negatives)."""
    return np.where(np.isfinite(u), np.abs(u), 0.0)


def _is_unc(name: str) -> bool:
    return bool(_UNC_MARK.search(name))


def _uncertainty_column(frame: pd.DataFrame, column: str) -> str | None:
    stem, _, unit = column.rpartition("_")
    candidates = [f"u_{column}", f"{column}_u", f"{column}_std"]
    if stem:
        candidates += [f"{stem}_{tag}_{unit}" for tag in ("u", "std", "unc", "sigma")]
    return next((c for c in candidates if c in frame.columns), None)


def _columns(ctx: _Ctx, test: Callable[[str], bool]) -> list[str]:
    return [
        c for c in ctx.step.frame.columns
        if c not in ctx.used and not _is_unc(c) and test(c) and _numeric(ctx.step.frame[c]) is not None
    ]


def _xy_axes(title: str, xlabel: str, ylabel: str) -> tuple[Figure, object]:
    fig = Figure(figsize=(6.4, 4.0), layout="constrained")
    ax = fig.add_subplot()
    ax.set_title(title)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.grid(True, alpha=0.3)
    return fig, ax


def _xvalues(ctx: _Ctx) -> tuple[np.ndarray, str]:
    if ctx.x is None:
        note = "no rail_v column: values plotted against point order"
        if note not in ctx.notes:
            ctx.notes.append(note)
        return np.arange(len(ctx.step.frame), dtype=float), "point (order recorded)"
    return _numeric(ctx.step.frame[ctx.x]), f"{ctx.x} (V)" if ctx.x.endswith("_v") else ctx.x


def _unit_label(column: str) -> str:
    unit = column.rpartition("_")[2]
    known = {"v": "V", "hz": "Hz", "a": "A", "db": "dB", "pct": "%", "s": "s", "w": "W", "dbc": "dBc"}
    return f"{column} ({known[unit]})" if unit in known and "_" in column else column


def _series_plot(ctx: _Ctx, columns: list[str], title: str, *, shade: bool = False) -> Figure:
    frame = ctx.step.frame
    x, xlabel = _xvalues(ctx)
    ylabel = _unit_label(columns[0]) if len(columns) == 1 else ", ".join(columns)
    fig, ax = _xy_axes(title, xlabel, ylabel)
    style = "o" if direction_column(frame.columns) else "o-"  # up and down: no joining line
    for column in columns:
        y = _numeric(frame[column])
        unc = _uncertainty_column(frame, column)
        yerr = _numeric(frame[unc]) if unc else None
        if yerr is not None:
            ax.errorbar(x, y, yerr=_err(yerr), fmt=style, ms=3, lw=1, capsize=2, label=column)
            ctx.used.add(unc)
        else:
            ax.plot(x, y, style, ms=3, lw=1, label=column)
        ctx.used.add(column)
    if shade:
        _shade_linear(ctx, ax)
    if len(columns) > 1 or shade:
        ax.legend(fontsize="small")
    return fig


def _panels(ctx: _Ctx, columns: list[str], title: str) -> Figure:
    """One small panel per column, two panels a row, sharing the x axis."""
    frame = ctx.step.frame
    x, xlabel = _xvalues(ctx)
    rows = (len(columns) + 1) // 2
    fig = Figure(figsize=(7.2, 1.9 * rows + 0.6), layout="constrained")
    axes = fig.subplots(rows, 2, sharex=True, squeeze=False).ravel()
    fig.suptitle(title)
    style = "o" if direction_column(frame.columns) else "o-"
    for ax, column in zip(axes, columns, strict=False):
        y = _numeric(frame[column])
        unc = _uncertainty_column(frame, column)
        yerr = _numeric(frame[unc]) if unc else None
        if yerr is not None:
            ax.errorbar(x, y, yerr=_err(yerr), fmt=style, ms=2, lw=0.8, capsize=1.5)
            ctx.used.add(unc)
        else:
            ax.plot(x, y, style, ms=2, lw=0.8)
        ax.set_title(_unit_label(column), fontsize="small")
        ax.tick_params(labelsize="x-small")
        ax.grid(True, alpha=0.3)
        ctx.used.add(column)
    for ax in axes[len(columns):]:
        ax.set_visible(False)
    last_row = [axes[i] for i in range(len(columns)) if i + 2 >= len(columns)]
    for ax in last_row:  # the lowest visible panel of each column carries the x axis
        ax.tick_params(labelbottom=True)
        ax.set_xlabel(xlabel, fontsize="small")
    return fig


def _shade_linear(ctx: _Ctx, ax) -> None:
    lo, hi = _run_value(ctx, "linear_lo_v"), _run_value(ctx, "linear_hi_v")
    if lo is not None and hi is not None and ctx.x is not None:
        ax.axvspan(min(lo, hi), max(lo, hi), color="tab:green", alpha=0.15,
                   label=f"linear region {lo:.3g}-{hi:.3g} V")


def _run_value(ctx: _Ctx, name: str) -> float | None:
    """A parameter's value: this step's first, else the run's (the linear region is often
    found by a step of its own; the runner names repeats ``<step>.<name>``)."""
    mine = ctx.run.step_parameters(ctx.step.name)
    for params in (mine, ctx.run.parameters):
        for key, p in params.items():
            if key == name or key.endswith(f".{name}"):
                value = finite(p.get("value"))
                if value is not None:
                    return value
    return None


# ---------------------------------------------------------------- kinds
@plot_kind("amplitude")
def _amplitude(ctx: _Ctx) -> list[tuple[str, Figure]]:
    cols = _columns(ctx, lambda c: c.startswith("vpp") and c.endswith("_v"))
    if not cols:
        return []
    return [("Output amplitude vs rail", _series_plot(ctx, cols, "Output amplitude vs rail", shade=True))]


@plot_kind("frequency")
def _frequency(ctx: _Ctx) -> list[tuple[str, Figure]]:
    cols = _columns(ctx, lambda c: c.startswith("freq") and c.endswith("_hz"))
    if not cols:
        return []
    return [("Frequency vs rail", _series_plot(ctx, cols, "Frequency vs rail"))]


@plot_kind("current")
def _current(ctx: _Ctx) -> list[tuple[str, Figure]]:
    cols = _columns(ctx, lambda c: c.endswith("_a") and ("current" in c or c.startswith("i_")))
    if not cols:
        return []
    return [("Supply current vs rail", _series_plot(ctx, cols, "Supply current vs rail"))]


@plot_kind("thd")
def _thd(ctx: _Ctx) -> list[tuple[str, Figure]]:
    cols = _columns(ctx, lambda c: c.startswith("thd"))
    if not cols:
        return []
    return [("Distortion (THD) vs rail", _series_plot(ctx, cols, "Distortion (THD) vs rail"))]


@plot_kind("hysteresis")
def _hysteresis(ctx: _Ctx) -> list[tuple[str, Figure]]:
    frame = ctx.step.frame
    dcol = direction_column(frame.columns)
    if dcol is None or ctx.x is None:
        return []
    ctx.used.add(dcol)
    candidates = [c for c in frame.columns if c.startswith("vpp") and c.endswith("_v") and not _is_unc(c)
                  and _numeric(frame[c]) is not None]
    if not candidates:
        candidates = [c for c in frame.columns if c not in ("point", dcol, *X_CANDIDATES)
                      and not _is_unc(c) and _numeric(frame[c]) is not None]
    if not candidates:
        ctx.notes.append("direction column present but no numeric column to show hysteresis")
        return []
    column = candidates[0]
    fig, ax = _xy_axes("Sweep up vs down (hysteresis)", f"{ctx.x} (V)", _unit_label(column))
    x = _numeric(frame[ctx.x])
    y = _numeric(frame[column])
    directions = ["" if v is None else str(v) for v in frame[dcol].tolist()]
    for label in dict.fromkeys(directions):
        mask = np.array([d == label for d in directions])
        order = np.argsort(x[mask], kind="stable")
        ax.plot(x[mask][order], y[mask][order], "o-", ms=3, lw=1, label=label.strip() or "(blank)")
    ax.legend(fontsize="small", title=dcol)
    ctx.used.add(column)
    return [("Sweep up vs down (hysteresis)", fig)]


@plot_kind("modulation")
def _modulation(ctx: _Ctx) -> list[tuple[str, Figure]]:
    frame = ctx.step.frame
    depth = next((c for c in frame.columns if "depth" in c and _numeric(frame[c]) is not None), None)
    if depth is None:
        return []
    cols = [c for c in frame.columns if ("index" in c or c.startswith("m_")) and not _is_unc(c)
            and _numeric(frame[c]) is not None]
    if not cols:
        ctx.notes.append(f"{depth} present but no modulation index column")
        return []
    fig, ax = _xy_axes("Modulation index: measured and predicted vs depth", depth, "modulation index")
    d = _numeric(frame[depth])
    order = np.argsort(d, kind="stable")
    for column in cols:
        y = _numeric(frame[column])
        style = "s--" if "pred" in column else "o-"
        unc = _uncertainty_column(frame, column)
        if unc and _numeric(frame[unc]) is not None:
            ax.errorbar(d[order], y[order], yerr=_err(_numeric(frame[unc])[order]),
                        fmt=style, ms=3, lw=1, capsize=2, label=column)
            ctx.used.add(unc)
        else:
            ax.plot(d[order], y[order], style, ms=3, lw=1, label=column)
        ctx.used.add(column)
    ax.legend(fontsize="small")
    ctx.used.add(depth)
    return [("Modulation index vs depth", fig)]


@plot_kind("waveform")
def _waveform(ctx: _Ctx) -> list[tuple[str, Figure]]:
    frame = ctx.step.frame
    ref_cols = [c for c in frame.columns
                if any(isinstance(v, str) and v.endswith(".npz") for v in frame[c].tolist())]
    out = []
    for column in ref_cols:
        ctx.used.add(column)
        refs = [(p, v) for p, v in zip(frame["point"].tolist(), frame[column].tolist(), strict=True)
                if isinstance(v, str) and v.endswith(".npz")]
        records = []
        for point, rel in refs[:MAX_WAVEFORMS]:
            try:
                records.append((str(point), ctx.run.folder.load_waveform(rel)))
            except ConfigError as exc:
                ctx.notes.append(f"waveform of point {point!r}: {exc}")
        if len(refs) > MAX_WAVEFORMS:
            ctx.notes.append(f"{column}: first {MAX_WAVEFORMS} of {len(refs)} waveforms shown")
        startup = "start" in ctx.step.name.lower()
        title = "Start-up envelope" if startup else f"Recorded waveforms ({column})"
        fig = _records_figure(title, records)
        if fig is not None:
            out.append((title, fig))
    return out


def _records_figure(title: str, records: list[tuple[str, dict[str, np.ndarray]]]) -> Figure | None:
    """Output envelope of each record (first record's raw output faint), rail above it."""
    series = [(point, _split_record(data)) for point, data in records]
    series = [(p, s) for p, s in series if s is not None]
    if not series:
        return None
    has_rail = any(s[2] is not None for _, s in series)
    fig = Figure(figsize=(6.4, 5.0 if has_rail else 4.0), layout="constrained")
    if has_rail:
        ax_rail, ax = fig.subplots(2, 1, sharex=True, height_ratios=(1, 3))
        ax_rail.set_ylabel("rail (V)")
        ax_rail.grid(True, alpha=0.3)
        ax_rail.set_title(title)
    else:
        ax = fig.add_subplot()
        ax.set_title(title)
    for n, (point, (t, name, y, rail)) in enumerate(series):
        colour = f"C{n % 10}"
        if n == 0:
            ax.plot(t, y, lw=0.5, alpha=0.35, color=colour, label=f"{point}: {name}")
        ax.plot(t, _envelope(y), lw=1.3, color=colour, label=f"{point}: envelope of {name}")
        if rail is not None and has_rail:
            ax_rail.plot(t, rail, lw=1.0, color=colour)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("V")
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize="x-small")
    return fig


def _split_record(data: dict[str, np.ndarray]):
    """(t_s, output name, output, rail or None) from a stored record, or None."""
    arrays = {k: np.asarray(v, dtype=float) for k, v in data.items()
              if v.ndim == 1 and v.size > 1 and v.dtype.kind in "fiu"}
    time = arrays.pop("t_s", None)
    rail_key = next((k for k in arrays if "rail" in k), None)
    rest = [k for k in arrays if k != rail_key and "envelope" not in k]
    if not rest:
        return None
    name = next((k for k in rest if "out" in k), rest[0])
    y = arrays[name]
    if time is None or time.size != y.size:
        dt = float(data["dt_s"]) if "dt_s" in data and np.asarray(data["dt_s"]).size == 1 else None
        t0 = float(data["t0_s"]) if "t0_s" in data and np.asarray(data["t0_s"]).size == 1 else 0.0
        time = t0 + np.arange(y.size) * dt if dt else np.arange(y.size, dtype=float)
    rail = arrays.get(rail_key) if rail_key else None
    return time, name, y, (rail if rail is not None and rail.size == y.size else None)


def _envelope(y: np.ndarray) -> np.ndarray:
    """Amplitude envelope: magnitude of the analytic signal (Hilbert transform) of y minus
    its median, smoothed over 1/200 of the record."""
    from scipy.signal import hilbert

    finite_y = np.nan_to_num(y - np.nanmedian(y))
    env = np.abs(hilbert(finite_y))
    width = max(1, y.size // 200)
    kernel = np.ones(width) / width
    # divide by the kernel's overlap so that the ends are not pulled down
    return np.convolve(env, kernel, mode="same") / np.convolve(np.ones_like(env), kernel, mode="same")


@plot_kind("other")
def _other(ctx: _Ctx) -> list[tuple[str, Figure]]:
    frame = ctx.step.frame
    rest = [c for c in frame.columns if c not in ctx.used and not _is_unc(c)]
    numeric = [c for c in rest if _numeric(frame[c]) is not None]
    text = [c for c in rest if c not in numeric]
    constant = [c for c in numeric if len(frame) > 1 and len(set(np.unique(_numeric(frame[c])).tolist())) == 1]
    if constant:
        ctx.notes.append("not plotted (the same in every point): "
                         + ", ".join(f"{c} = {fmt(_numeric(frame[c])[0])}" for c in constant))
        numeric = [c for c in numeric if c not in constant]
    out = []
    shown = numeric[:MAX_GENERIC_PLOTS]
    if shown:
        title = "Other columns vs rail" if ctx.x else "Other columns by point"
        out.append((f"{title}: {', '.join(shown)}", _panels(ctx, shown, title)))
    if len(numeric) > MAX_GENERIC_PLOTS:
        ctx.notes.append(f"not plotted (more than {MAX_GENERIC_PLOTS} other columns): "
                         + ", ".join(numeric[MAX_GENERIC_PLOTS:]))
    if text:
        ctx.notes.append("not plotted (no numbers): " + ", ".join(text))
    return out
