"""A read-only, forgiving view of one run folder, for reports, comparison and datasheets.

Reading never fails on a partial run (aborted, crashed, no parameters yet): what cannot
be read is listed in :attr:`RunView.problems` in one line each. Only a path that is not a
run folder at all raises :class:`benchctl.errors.ConfigError`.
"""

from __future__ import annotations

import json
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from benchctl.errors import ConfigError, shorten
from benchctl.store import RunFolder

X_CANDIDATES = ("rail_v", "rail_set_v", "set_v", "supply_v")
"""Columns taken as the rail axis, first found wins."""
DIRECTION_COLUMNS = ("direction", "branch")
"""Columns that tell a sweep going up from one coming down (values such as up / down)."""


def direction_column(columns) -> str | None:
    """The first of :data:`DIRECTION_COLUMNS` among ``columns``, or None."""
    return next((c for c in DIRECTION_COLUMNS if c in columns), None)


@dataclass(frozen=True)
class StepData:
    """The points of one step: ``index`` (the NN of the file), ``name`` and a DataFrame."""

    index: int
    name: str
    frame: pd.DataFrame

    @property
    def label(self) -> str:
        return f"{self.index:02d}-{self.name}"


@dataclass(frozen=True)
class RunView:
    """Everything a report needs from one run folder, read once."""

    path: Path
    folder: RunFolder
    meta: dict[str, Any]
    board: str
    revision: str
    serial: str
    status: str
    idn: dict[str, str]
    parameters: dict[str, dict[str, Any]]
    steps: tuple[StepData, ...]
    problems: tuple[str, ...] = field(default=())

    def step_parameters(self, step_name: str) -> dict[str, dict[str, Any]]:
        """Parameters whose ``step`` is ``step_name``, or that name no step."""
        return {
            name: p
            for name, p in self.parameters.items()
            if p.get("step") in (None, "", step_name) or _sanitised(p.get("step")) == step_name
        }


def load_run(run_dir: str | Path) -> RunView:
    """Read a run folder for reporting.

    Raises
    ------
    ConfigError
        ``run_dir`` is not a run folder (one line naming the path and why).
    """
    folder = RunFolder.open(run_dir)
    problems: list[str] = []
    meta = folder.meta
    plan_board = _plan_board(folder.path / "plan.toml", problems)
    board_meta = meta.get("board") if isinstance(meta.get("board"), Mapping) else {}
    board = _text(board_meta.get("name") or meta.get("board_name") or plan_board.get("name"))
    revision = _text(board_meta.get("revision") or meta.get("revision") or plan_board.get("revision"))
    serial = _text(board_meta.get("serial") or meta.get("serial") or plan_board.get("serial"))
    try:
        parameters = folder.parameters()
    except ConfigError as exc:
        problems.append(str(exc))
        parameters = {}
    steps = []
    for index, name in folder.steps():
        try:
            frame = folder.points_frame(index, name)
        except (ConfigError, OSError, UnicodeDecodeError) as exc:
            problems.append(f"points/{index:02d}-{name}.csv: unreadable: {shorten(str(exc))}")
            continue
        steps.append(StepData(index, name, frame))
    for damage in folder.damage:
        problems.append(f"skipped {damage}")
    status = _text(meta.get("status")) or "unknown"
    if status != "complete":
        problems.append(f"run status is {status!r}: results may be partial")
    if not steps:
        problems.append("no points tables in points/")
    if not parameters and not any("parameters" in p for p in problems):
        problems.append("no parameters.json: no derived parameters")
    return RunView(
        path=folder.path,
        folder=folder,
        meta=meta,
        board=board,
        revision=revision,
        serial=serial,
        status=status,
        idn=_idn(meta),
        parameters=parameters,
        steps=tuple(steps),
        problems=tuple(problems),
    )


ParamKey = tuple[str, str]
"""(step, name) of a parameter, independent of how the run keyed it in parameters.json."""


def keyed_parameters(run: RunView) -> dict[ParamKey, dict[str, Any]]:
    """Parameters by (step, base name).

    The runner keys a parameter by its name, or ``<step>.<name>`` when an earlier step
    already gave that name, so the same quantity can carry different keys in two runs.
    Matching on (step, name) makes runs comparable whatever the order of the steps.
    """
    out: dict[ParamKey, dict[str, Any]] = {}
    for key, entry in run.parameters.items():
        step = str(entry.get("step") or "")
        base = key[len(step) + 1:] if step and key.startswith(step + ".") else key
        out.setdefault((step, base), entry)
    return out


def display_names(keys) -> dict[ParamKey, str]:
    """Short labels: the bare name where it is unique, ``<step>.<name>`` where it is not."""
    keys = list(keys)
    count: dict[str, int] = {}
    for _, base in keys:
        count[base] = count.get(base, 0) + 1
    return {(step, base): base if count[base] == 1 or not step else f"{step}.{base}" for step, base in keys}


def as_float(value: Any) -> float | None:
    """Return ``value`` as a finite-or-not float, or None if it is not a number."""
    if value is None or isinstance(value, bool):
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x


def finite(value: Any) -> float | None:
    """Return ``value`` as a finite float, or None."""
    x = as_float(value)
    return x if x is not None and math.isfinite(x) else None


def _plan_board(path: Path, problems: list[str]) -> dict[str, Any]:
    if not path.is_file():
        problems.append("plan.toml missing")
        return {}
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError, OSError) as exc:
        problems.append(f"{path.name}: unreadable: {shorten(str(exc))}")
        return {}
    board = data.get("board")
    return dict(board) if isinstance(board, Mapping) else {}


def _idn(meta: Mapping[str, Any]) -> dict[str, str]:
    raw = meta.get("idn", meta.get("instruments"))
    if not isinstance(raw, Mapping):
        return {}
    out = {}
    for role, value in raw.items():
        if isinstance(value, Mapping):
            if "idn" in value and isinstance(value["idn"], str | Mapping):
                value = value["idn"]
        if isinstance(value, Mapping):
            order = ("model", "serial", "firmware")
            maker = value.get("maker", value.get("manufacturer"))
            if value.get("raw"):
                out[str(role)] = _text(value["raw"])
            elif maker is not None or any(k in value for k in order):
                out[str(role)] = ",".join(_text(v) for v in (maker, *(value.get(k) for k in order)))
            else:
                out[str(role)] = json.dumps(value, ensure_ascii=False, sort_keys=True)
        else:
            out[str(role)] = _text(value)
    return out


def _text(value: Any) -> str:
    return "" if value is None else str(value)


def _sanitised(name: Any) -> str:
    from benchctl.store import sanitise_name

    return sanitise_name(str(name)) if name not in (None, "") else ""
