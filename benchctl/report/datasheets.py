"""Datasheet tables: Min / Typ / Max of each parameter across units of a board revision."""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Iterable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
from rich.markup import escape as esc
from rich.table import Table

from benchctl.errors import ConfigError
from benchctl.report.formatting import fmt, json_safe, md_table
from benchctl.report.runview import (
    ParamKey,
    RunView,
    display_names,
    finite,
    keyed_parameters,
    load_run,
)

CSV_HEADER = ["board", "revision", "parameter", "unit", "n_units", "min", "typ", "max", "mean",
              "std", "k", "guard_low", "guard_high", "spec_min", "spec_max", "units", "note"]


@dataclass(frozen=True)
class DatasheetRow:
    """One parameter of one board revision across its units.

    ``typical`` is the **median** of the per-unit values; ``minimum``/``maximum`` their
    extremes. ``mean`` and ``std`` (sample standard deviation, ddof = 1) feed the
    guard-banded limits ``guard_low``/``guard_high`` = mean -/+ k * std when a coverage
    was asked for and at least 2 units have a value.
    """

    parameter: str
    unit: str
    n_units: int
    minimum: float | None
    typical: float | None
    maximum: float | None
    mean: float | None
    std: float | None
    k: float | None
    guard_low: float | None
    guard_high: float | None
    spec_min: float | None
    spec_max: float | None
    units: tuple[str, ...]
    note: str = ""


@dataclass(frozen=True)
class DatasheetGroup:
    """All rows of one board + revision, and the runs (one per unit) they come from."""

    board: str
    revision: str
    units: tuple[str, ...]
    runs: tuple[str, ...]
    rows: tuple[DatasheetRow, ...]


@dataclass(frozen=True)
class Datasheet:
    """Result of :func:`datasheet`."""

    groups: tuple[DatasheetGroup, ...]
    coverage: float | None
    confidence: float
    factor_source: str
    skipped: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        """Plain data for ``--json`` (NaN and infinities become None)."""
        return json_safe(asdict(self))

    def csv_text(self) -> str:
        """One CSV row per group and parameter; floats written with ``repr`` (full precision)."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(CSV_HEADER)
        for g in self.groups:
            for r in g.rows:
                w.writerow([g.board, g.revision, r.parameter, r.unit, r.n_units] + [
                    _csv(v) for v in (r.minimum, r.typical, r.maximum, r.mean, r.std, r.k,
                                      r.guard_low, r.guard_high, r.spec_min, r.spec_max)
                ] + [" ".join(r.units), r.note])
        return buf.getvalue()

    def to_markdown(self) -> str:
        """The datasheet as Markdown: one table per board revision."""
        out = ["# Datasheet tables", "", DEFINITION, ""]
        if self.coverage is not None:
            out += [_guard_text(self), ""]
        for g in self.groups:
            out += [f"## {g.board} rev {g.revision or '?'}", "",
                    f"{len(g.units)} unit{'s' if len(g.units) != 1 else ''}: {', '.join(g.units)}", ""]
            header = ["Parameter", "Unit", "Min", "Typ", "Max", "n"]
            if self.coverage is not None:
                header += ["Guard low", "Guard high"]
            header += ["Spec min", "Spec max", "Note"]
            rows = []
            for r in g.rows:
                row: list[Any] = [r.parameter, r.unit, r.minimum, r.typical, r.maximum, r.n_units]
                if self.coverage is not None:
                    row += [r.guard_low, r.guard_high]
                rows.append(row + [r.spec_min, r.spec_max, r.note])
            out.append(md_table(header, rows))
        if self.skipped:
            out += ["## Runs not used", ""] + [f"- {s}" for s in self.skipped] + [""]
        return "\n".join(out)

    def tables(self) -> list[Table]:
        """rich tables, one per board revision (spec columns only when a spec exists)."""
        tables = []
        for g in self.groups:
            n = len(g.units)
            title = f"{g.board} rev {g.revision or '?'}: {n} unit{'s' if n != 1 else ''} (Typ = median)"
            t = Table(title=esc(title))
            has_spec = any(r.spec_min is not None or r.spec_max is not None for r in g.rows)
            cols = ["Parameter (unit)", "Min", "Typ", "Max", "n"]
            if self.coverage is not None:
                cols += ["Guard lo", "Guard hi"]
            if has_spec:
                cols.append("Spec")
            for c in cols:
                if c == "Parameter (unit)":
                    t.add_column(c, min_width=16)
                elif c == "Spec":
                    t.add_column(c, justify="right")
                else:
                    t.add_column(c, justify="right", no_wrap=True)
            for r in g.rows:
                label = f"{r.parameter} ({r.unit})" if r.unit else r.parameter
                cells = [esc(label), fmt(r.minimum, 4), fmt(r.typical, 4), fmt(r.maximum, 4), str(r.n_units)]
                if self.coverage is not None:
                    cells += [fmt(r.guard_low, 4), fmt(r.guard_high, 4)]
                if has_spec:
                    cells.append(_spec_text(r.spec_min, r.spec_max))
                t.add_row(*cells)
            notes = [f"{r.parameter}: {r.note}" for r in g.rows if r.note]
            if notes:
                t.caption = esc("; ".join(notes))
                t.caption_justify = "left"
            tables.append(t)
        return tables

    def write(self, out_dir: str | Path) -> tuple[Path, Path]:
        """Write ``datasheet.md`` and ``datasheet.csv`` into ``out_dir``; return both paths."""
        from benchctl.store.atomic import write_text_atomic

        folder = Path(out_dir)
        folder.mkdir(parents=True, exist_ok=True)
        md_path, csv_path = folder / "datasheet.md", folder / "datasheet.csv"
        write_text_atomic(md_path, self.to_markdown())
        write_text_atomic(csv_path, self.csv_text())
        return md_path, csv_path


DEFINITION = ("Min and Max are the lowest and highest value among the units measured; Typ is the "
              "median of the units' values; n is the number of units with a value.")


def datasheet(
    run_dirs: Iterable[str | Path],
    *,
    coverage: float | None = None,
    confidence: float = 0.95,
    include_incomplete: bool = False,
    factor: Literal["exact", "howe"] = "exact",
) -> Datasheet:
    """Build datasheet tables from runs of several units, grouped by board and revision.

    Parameters
    ----------
    run_dirs : iterable of path-like
        Run folders. One run counts per unit (serial): of several runs of the same serial
        the latest (by ``started`` in ``run.json``) is used, the others are listed as
        skipped. A run without a serial counts as its own unit, named by its folder.
    coverage : float, optional
        If given (0 < coverage < 1), add guard-banded limits mean -/+ k * s where k is the
        two-sided normal tolerance-interval factor covering ``coverage`` of the population
        with ``confidence``.
    confidence : float
        Confidence level of the tolerance interval, 0.95 by default.
    include_incomplete : bool
        Use runs whose status is not ``complete`` (aborted, failed) too. Off by default.
    factor : {"exact", "howe"}
        How k is computed: the exact two-sided factor (default) or Howe's approximation.

    Returns
    -------
    Datasheet
        One group per (board, revision), one row per parameter: Min, Typ (the median), Max,
        n units, unit, and the guard-banded limits when asked.

    Raises
    ------
    ConfigError
        A path is not a run folder, or no usable run is left.
    ValueError
        ``coverage`` or ``confidence`` outside (0, 1).

    Notes
    -----
    Parameters are matched across units on (step, name), like :func:`compare_runs` does.
    k comes from ``benchctl.analysis.tolerance_factor`` (exact, or Howe's approximation
    [1]_ with ``factor="howe"``); without that module, from :func:`howe_factor`.
    :attr:`Datasheet.factor_source` says which. Typ is always the median.

    References
    ----------
    .. [1] W. G. Howe, "Two-sided tolerance limits for normal populations - some
       improvements", J. Amer. Statist. Assoc. 64 (1969) 610-620.
    """
    if coverage is not None and not 0 < coverage < 1:
        raise ValueError(f"{coverage=} must be in (0, 1)")
    if not 0 < confidence < 1:
        raise ValueError(f"{confidence=} must be in (0, 1)")
    if factor not in ("exact", "howe"):
        raise ValueError(f"{factor=} must be 'exact' or 'howe'")
    runs = [load_run(p) for p in run_dirs]
    skipped: list[str] = []
    usable = []
    for run in runs:
        if run.status != "complete" and not include_incomplete:
            skipped.append(f"{run.path}: status {run.status!r} (use include_incomplete to count it)")
        elif not run.parameters:
            skipped.append(f"{run.path}: no parameters")
        else:
            usable.append(run)
    if not usable:
        where = ", ".join(str(r.path) for r in runs) or "<no runs given>"
        raise ConfigError(where, "", "no complete run with parameters to tabulate")
    chosen: dict[tuple[str, str, str], RunView] = {}
    for run in usable:
        unit = run.serial or f"({run.path.name})"
        key = (run.board or "?", run.revision, unit)
        other = chosen.get(key)
        if other is None or _started(run) >= _started(other):
            if other is not None:
                skipped.append(f"{other.path}: older run of unit {unit}, replaced by {run.path}")
            chosen[key] = run
        else:
            skipped.append(f"{run.path}: older run of unit {unit}, replaced by {other.path}")
    k_of, source = _factor_function(factor)
    groups: dict[tuple[str, str], list[tuple[str, RunView]]] = {}
    for (board, revision, unit), run in sorted(chosen.items()):
        groups.setdefault((board, revision), []).append((unit, run))
    built = []
    for (board, revision), members in groups.items():
        keyed = [(unit, keyed_parameters(run)) for unit, run in members]
        keys = list(dict.fromkeys(k for _, params in keyed for k in params))
        labels = display_names(keys)
        rows = tuple(_row(labels[key], key, keyed, coverage, confidence, k_of) for key in keys)
        built.append(DatasheetGroup(board, revision, tuple(u for u, _ in members),
                                    tuple(str(r.path) for _, r in members), rows))
    return Datasheet(tuple(built), coverage, confidence, source, tuple(skipped))


def howe_factor(n: int, *, coverage: float, confidence: float) -> float:
    """Two-sided normal tolerance factor k by Howe's approximation.

    k = sqrt( nu * (1 + 1/n) * z^2 / chi2 ), with nu = n - 1, z the (1 + coverage)/2
    quantile of the standard normal and chi2 the (1 - confidence) quantile of the
    chi-square distribution with nu degrees of freedom.

    Raises
    ------
    ValueError
        ``n`` < 2.

    References
    ----------
    W. G. Howe, J. Amer. Statist. Assoc. 64 (1969) 610-620; also NIST/SEMATECH
    e-Handbook of Statistical Methods, section 7.2.6.3.
    """
    from scipy import stats

    if n < 2:
        raise ValueError(f"{n=} must be >= 2 for a tolerance factor")
    nu = n - 1
    z = stats.norm.ppf((1 + coverage) / 2)
    chi2 = stats.chi2.ppf(1 - confidence, nu)
    return float(math.sqrt(nu * (1 + 1 / n) * z * z / chi2))


def _factor_function(method: str):
    """Return ``(k(n, coverage=, confidence=), description)``."""
    try:
        from benchctl.analysis import tolerance_factor  # the analysis layer's estimator
    except ImportError:
        return howe_factor, "Howe (1969) approximation, benchctl.report.datasheets.howe_factor"

    def k(n: int, *, coverage: float, confidence: float) -> float:
        return tolerance_factor(n, coverage=coverage, confidence=confidence, sided="two", method=method)

    words = "exact (Odeh-Owen integral)" if method == "exact" else "Howe (1969) approximation"
    return k, f"two-sided normal tolerance factor, {words}, benchctl.analysis.tolerance_factor"


def _min_typ_max(values: list[float]) -> tuple[float, float, float]:
    """Min, median, max; from ``benchctl.analysis.min_typ_max`` when that exists."""
    try:
        from benchctl.analysis import min_typ_max
    except ImportError:
        arr = np.asarray(values, dtype=float)
        return float(arr.min()), float(np.median(arr)), float(arr.max())
    r = min_typ_max(values, typ="median")
    return float(r.min_value), float(r.typ_value), float(r.max_value)


def _row(name: str, key: ParamKey, members: list[tuple[str, dict[ParamKey, dict[str, Any]]]],
         coverage: float | None, confidence: float, factor) -> DatasheetRow:
    values, units_with, unit_names, notes = [], [], set(), []
    spec_min, spec_max = set(), set()
    for unit, params in members:
        p = params.get(key)
        if p is None:
            continue
        unit_names.add(str(p.get("unit") or ""))
        spec = p.get("spec") if isinstance(p.get("spec"), dict) else {}
        spec_min.add(finite(spec.get("min")))
        spec_max.add(finite(spec.get("max")))
        v = finite(p.get("value"))
        if v is not None:
            values.append(v)
            units_with.append(unit)
    missing = len(members) - len(values)
    if missing:
        notes.append(f"{missing} unit{'s' if missing > 1 else ''} without a value")
    if len(unit_names) > 1:
        notes.append(f"units differ between runs: {sorted(unit_names)}")
    if len(spec_min) > 1 or len(spec_max) > 1:
        notes.append("spec limits differ between runs")
    lo = typ = hi = mean = std = k = g_lo = g_hi = None
    if values:
        lo, typ, hi = _min_typ_max(values)
        mean = float(np.mean(values))
        if len(values) >= 2:
            std = float(np.std(values, ddof=1))
            if coverage is not None:
                k = float(factor(len(values), coverage=coverage, confidence=confidence))
                g_lo, g_hi = mean - k * std, mean + k * std
        elif coverage is not None:
            notes.append("one unit: no guard band")
    return DatasheetRow(
        parameter=name, unit=sorted(unit_names)[0] if unit_names else "", n_units=len(values),
        minimum=lo, typical=typ, maximum=hi, mean=mean, std=std, k=k, guard_low=g_lo, guard_high=g_hi,
        spec_min=next(iter(spec_min)) if len(spec_min) == 1 else None,
        spec_max=next(iter(spec_max)) if len(spec_max) == 1 else None,
        units=tuple(units_with), note="; ".join(notes),
    )


def _spec_text(lo: float | None, hi: float | None) -> str:
    if lo is None and hi is None:
        return ""
    if lo is None:
        return f"<= {fmt(hi, 4)}"
    if hi is None:
        return f">= {fmt(lo, 4)}"
    return f"{fmt(lo, 4)} to {fmt(hi, 4)}"


def _guard_text(sheet: Datasheet) -> str:
    return (f"Guard-banded limits: mean -/+ k * s (s: sample standard deviation), k the two-sided "
            f"normal tolerance factor for {fmt(sheet.coverage)} coverage at {fmt(sheet.confidence)} "
            f"confidence ({sheet.factor_source}).")


def _started(run: RunView) -> tuple[str, str]:
    return (str(run.meta.get("started", "")), run.path.name)


def _csv(value: float | None) -> str:
    return "" if value is None else float.__repr__(float(value))


