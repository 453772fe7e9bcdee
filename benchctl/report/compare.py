"""Comparison of two runs (typically two board revisions): parameters and Vpp-vs-rail curves."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
from rich.markup import escape as esc
from rich.table import Table

from benchctl.report.formatting import DASH, fmt, json_safe, md_table
from benchctl.report.runview import (
    X_CANDIDATES,
    RunView,
    StepData,
    direction_column,
    display_names,
    finite,
    keyed_parameters,
    load_run,
)

Verdict = Literal["same", "shifted", "missing"]


@dataclass(frozen=True)
class ParameterDelta:
    """One parameter of run A against run B.

    Parameters are matched on (step, name), so ``thresholds.startup_v`` in one run meets
    ``startup_v`` of step ``thresholds`` in the other; ``name`` is the bare name where that
    is unique. ``difference`` is B - A in ``unit``; ``combined_uncertainty`` is sqrt(ua^2 + ub^2)
    (a missing uncertainty counts as 0); ``threshold`` is the size a difference must
    exceed to be called shifted (the larger of the two limits of the rule).
    """

    name: str
    unit: str
    value_a: float | None
    value_b: float | None
    uncertainty_a: float | None
    uncertainty_b: float | None
    difference: float | None
    combined_uncertainty: float | None
    threshold: float | None
    verdict: Verdict
    note: str = ""
    step: str = ""


@dataclass(frozen=True)
class CurveDelta:
    """Difference of one amplitude-vs-rail curve over the rail range both runs cover.

    Both curves are interpolated linearly onto the union of their rail points inside the
    overlap; ``max_abs_diff`` and ``rms_diff`` are of B - A, in the curve's unit (V).
    """

    step: str
    column: str
    overlap_lo_v: float | None
    overlap_hi_v: float | None
    n_points: int
    max_abs_diff: float | None
    rms_diff: float | None
    rail_at_max_v: float | None
    note: str = ""


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare_runs`."""

    run_a: str
    run_b: str
    label_a: str
    label_b: str
    tolerance: float
    coverage_k: float
    parameters: tuple[ParameterDelta, ...]
    curves: tuple[CurveDelta, ...]
    notes: tuple[str, ...] = ()

    @property
    def shifted(self) -> tuple[str, ...]:
        """Names of the parameters judged shifted."""
        return tuple(p.name for p in self.parameters if p.verdict == "shifted")

    @property
    def any_shifted(self) -> bool:
        return bool(self.shifted)

    def to_dict(self) -> dict[str, Any]:
        """Plain data for ``--json`` (NaN and infinities become None)."""
        return json_safe(asdict(self) | {"shifted": list(self.shifted)})

    def tables(self) -> list[Table]:
        """rich tables: parameters, then curves."""
        t = Table(title=esc(f"A = {self.label_a}   B = {self.label_b}"))
        t.add_column("Parameter", min_width=16)
        for col in ("A", "B"):
            t.add_column(col, justify="right", max_width=16)
        t.add_column("B - A", justify="right", no_wrap=True)  # the limit is in --json and --markdown
        t.add_column("Verdict", no_wrap=True, min_width=7)
        for p in self.parameters:
            style = {"shifted": "bold red", "missing": "yellow"}.get(p.verdict, "green")
            label = f"{p.name} ({p.unit})" if p.unit else p.name
            t.add_row(esc(label), _pm(p.value_a, p.uncertainty_a), _pm(p.value_b, p.uncertainty_b),
                      fmt(p.difference, 4), f"[{style}]{p.verdict}[/{style}]")
        notes = [f"{p.name}: {p.note}" for p in self.parameters if p.note and not p.note.startswith("uncertainty")]
        no_u = [p.name for p in self.parameters if p.note.startswith("uncertainty")]
        if no_u:
            notes.append("uncertainty missing, counted as 0: " + ", ".join(no_u))
        if notes:
            t.caption, t.caption_justify = esc("; ".join(notes)), "left"
        c = Table(title="Amplitude vs rail: B - A where both runs have the rail")
        for col in ("Step", "Curve", "Rail (V)", "Points", "Max |B-A| (V)", "RMS (V)", "Max at (V)"):
            c.add_column(col, justify="left" if col in ("Step", "Curve") else "right")
        for cd in self.curves:
            span = (f"{fmt(cd.overlap_lo_v, 4)} to {fmt(cd.overlap_hi_v, 4)}"
                    if cd.overlap_lo_v is not None else DASH)
            c.add_row(esc(cd.step), esc(cd.column), span, str(cd.n_points), fmt(cd.max_abs_diff, 4),
                      fmt(cd.rms_diff, 4), fmt(cd.rail_at_max_v, 4))
        curve_notes = [f"{cd.step} {cd.column}: {cd.note}" for cd in self.curves if cd.note]
        if curve_notes:
            c.caption, c.caption_justify = esc("; ".join(curve_notes)), "left"
        return [t, c] if self.curves else [t]

    def to_markdown(self) -> str:
        """The comparison as a Markdown document."""
        rows = [[p.name, p.unit, p.value_a, p.uncertainty_a, p.value_b, p.uncertainty_b, p.difference,
                 p.threshold, p.verdict, p.note] for p in self.parameters]
        out = [f"# Comparison: {self.label_a} (A) vs {self.label_b} (B)", "",
               f"Rule: {RULE.format(k=fmt(self.coverage_k), tol=fmt(self.tolerance))}", "",
               md_table(["Parameter", "Unit", "A", "u(A)", "B", "u(B)", "B - A", "Limit", "Verdict", "Note"], rows)]
        if self.curves:
            out += ["## Amplitude vs rail", "",
                    md_table(["Step", "Curve", "Rail from (V)", "to (V)", "Points", "Max |B - A| (V)",
                              "RMS (V)", "at rail (V)", "Note"],
                             [[c.step, c.column, c.overlap_lo_v, c.overlap_hi_v, c.n_points,
                               c.max_abs_diff, c.rms_diff, c.rail_at_max_v, c.note] for c in self.curves])]
        if self.notes:
            out += ["## Notes", ""] + [f"- {n}" for n in self.notes] + [""]
        return "\n".join(out)


def _pm(value: float | None, u: float | None) -> str:
    return fmt(value, 4) if u is None or value is None else f"{fmt(value, 4)} ± {fmt(u, 2)}"


RULE = ("shifted when |B - A| > {k} * sqrt(u(A)^2 + u(B)^2) and |B - A| > {tol} * max(|A|, |B|); "
        "missing when either value is absent; same otherwise")


def compare_runs(
    run_a: str | Path,
    run_b: str | Path,
    *,
    tolerance: float = 0.01,
    coverage_k: float = 2.0,
) -> Comparison:
    """Compare the derived parameters and the amplitude curves of two runs.

    Parameters
    ----------
    run_a, run_b : path-like
        Run folders; A is the reference (e.g. revision B), B the candidate (revision C).
    tolerance : float
        Relative tolerance: a difference smaller than ``tolerance * max(|A|, |B|)`` is
        never called shifted, however small the uncertainties. 0.01 (1 %) by default.
    coverage_k : float
        Coverage factor applied to the combined standard uncertainty (2: about 95 % for
        normal errors).

    Returns
    -------
    Comparison
        Per-parameter verdicts and per-curve differences.

    Raises
    ------
    ConfigError
        Either path is not a run folder.
    ValueError
        ``tolerance`` < 0 or ``coverage_k`` <= 0.

    Notes
    -----
    Rule, for each parameter present in either run, with d = B - A and
    uc = sqrt(u(A)^2 + u(B)^2) (standard uncertainties; a missing one counts as 0):

    - ``missing`` if the parameter is absent, or has no finite value, in either run;
    - ``shifted`` if |d| > k * uc **and** |d| > tolerance * max(|A|, |B|);
    - ``same`` otherwise.

    The combined standard uncertainty of a difference of independent estimates is the
    root sum of squares (JCGM 100:2008, GUM, section 5.1); k = 2 follows GUM 6.2.
    """
    if not tolerance >= 0:
        raise ValueError(f"{tolerance=} must be >= 0")
    if not coverage_k > 0:
        raise ValueError(f"{coverage_k=} must be > 0")
    a = load_run(run_a)
    b = load_run(run_b)
    pa, pb = keyed_parameters(a), keyed_parameters(b)
    keys = list(dict.fromkeys([*pa, *pb]))
    labels = display_names(keys)
    deltas = [_delta(labels[k], k[0], pa.get(k), pb.get(k), tolerance, coverage_k) for k in keys]
    notes = [f"A: {p}" for p in a.problems] + [f"B: {p}" for p in b.problems]
    return Comparison(
        run_a=str(a.path), run_b=str(b.path), label_a=_label(a), label_b=_label(b),
        tolerance=float(tolerance), coverage_k=float(coverage_k),
        parameters=tuple(deltas), curves=tuple(_curves(a, b)), notes=tuple(notes),
    )


def judge(a: float, b: float, ua: float | None, ub: float | None, *, tolerance: float,
          coverage_k: float) -> tuple[Verdict, float, float, float]:
    """Apply the rule of :func:`compare_runs` to one pair: (verdict, d, uc, threshold)."""
    d = b - a
    uc = math.hypot(ua or 0.0, ub or 0.0)
    threshold = max(coverage_k * uc, tolerance * max(abs(a), abs(b)))
    shifted = abs(d) > coverage_k * uc and abs(d) > tolerance * max(abs(a), abs(b))
    return ("shifted" if shifted else "same"), d, uc, threshold


def _delta(name: str, step: str, pa: dict | None, pb: dict | None, tolerance: float,
           k: float) -> ParameterDelta:
    unit = str((pa or pb or {}).get("unit") or "")
    va, vb = finite((pa or {}).get("value")), finite((pb or {}).get("value"))
    ua, ub = finite((pa or {}).get("uncertainty")), finite((pb or {}).get("uncertainty"))
    if pa is None or pb is None:
        return ParameterDelta(name, unit, va, vb, ua, ub, None, None, None, "missing",
                              f"not in run {'A' if pa is None else 'B'}", step)
    if va is None or vb is None:
        return ParameterDelta(name, unit, va, vb, ua, ub, None, None, None, "missing",
                              f"no value in run {'A' if va is None else 'B'}", step)
    unit_b = str(pb.get("unit") or "")
    if unit != unit_b:
        return ParameterDelta(name, unit, va, vb, ua, ub, None, None, None, "missing",
                              f"units differ: {unit!r} vs {unit_b!r}", step)
    verdict, d, uc, threshold = judge(va, vb, ua, ub, tolerance=tolerance, coverage_k=k)
    note = "" if ua is not None and ub is not None else "uncertainty missing, counted as 0"
    return ParameterDelta(name, unit, va, vb, ua, ub, d, uc, threshold, verdict, note, step)


def _label(run: RunView) -> str:
    parts = [run.board, run.revision and f"rev {run.revision}", run.serial and f"#{run.serial}"]
    return " ".join(p for p in parts if p) or run.path.name


def _amplitude_columns(step: StepData) -> list[str]:
    return [c for c in step.frame.columns
            if c.startswith("vpp") and c.endswith("_v") and not any(t in c for t in ("_u_", "_std", "_unc", "_sigma"))
            and not c.startswith("u_")]


def _x_column(step: StepData) -> str | None:
    return next((c for c in X_CANDIDATES if c in step.frame.columns), None)


def _curve(step: StepData, x_col: str, y_col: str, direction: str | None,
           dcol: str | None) -> tuple[np.ndarray, np.ndarray]:
    xs, ys = [], []
    dirs = step.frame[dcol].tolist() if direction is not None and dcol else None
    for i, (x, y) in enumerate(zip(step.frame[x_col].tolist(), step.frame[y_col].tolist(), strict=True)):
        if dirs is not None and str(dirs[i]) != direction:
            continue
        fx, fy = finite(x), finite(y)
        if fx is not None and fy is not None:
            xs.append(fx)
            ys.append(fy)
    if not xs:
        return np.empty(0), np.empty(0)
    x_arr, y_arr = np.asarray(xs), np.asarray(ys)
    ux, inverse = np.unique(x_arr, return_inverse=True)  # repeated rail points: their mean
    means = np.bincount(inverse, weights=y_arr) / np.bincount(inverse)
    return ux, means


def _curves(a: RunView, b: RunView) -> list[CurveDelta]:
    steps_b = {s.name: s for s in b.steps}
    out = []
    for sa in a.steps:
        sb = steps_b.get(sa.name)
        if sb is None:
            continue
        xa, xb = _x_column(sa), _x_column(sb)
        if xa is None or xb is None:
            continue
        for column in _amplitude_columns(sa):
            if column not in sb.frame.columns:
                out.append(CurveDelta(sa.name, column, None, None, 0, None, None, None, "not in run B"))
                continue
            directions: list[str | None] = [None]
            dcol_a, dcol_b = direction_column(sa.frame.columns), direction_column(sb.frame.columns)
            if dcol_a and dcol_a == dcol_b:
                da = dict.fromkeys(str(d) for d in sa.frame[dcol_a].tolist())
                db = {str(d) for d in sb.frame[dcol_b].tolist()}
                directions = [d for d in da if d in db] or [None]
            for direction in directions:
                label = column if direction is None else f"{column} ({direction})"
                out.append(_curve_delta(sa.name, label, _curve(sa, xa, column, direction, dcol_a),
                                        _curve(sb, xb, column, direction, dcol_b)))
    return out


def _curve_delta(step: str, label: str, ca: tuple[np.ndarray, np.ndarray],
                 cb: tuple[np.ndarray, np.ndarray]) -> CurveDelta:
    (xa, ya), (xb, yb) = ca, cb
    if xa.size < 2 or xb.size < 2:
        return CurveDelta(step, label, None, None, 0, None, None, None, "fewer than 2 points in a run")
    lo, hi = max(xa[0], xb[0]), min(xa[-1], xb[-1])
    if not lo < hi:
        return CurveDelta(step, label, None, None, 0, None, None, None, "rail ranges do not overlap")
    grid = np.union1d(xa[(xa >= lo) & (xa <= hi)], xb[(xb >= lo) & (xb <= hi)])
    diff = np.interp(grid, xb, yb) - np.interp(grid, xa, ya)
    i = int(np.argmax(np.abs(diff)))
    return CurveDelta(step, label, float(lo), float(hi), int(grid.size), float(abs(diff[i])),
                      float(np.sqrt(np.mean(diff**2))), float(grid[i]))


