"""Plan files: load and validate in full before any instrument is opened.

Every problem is collected, one :class:`~benchctl.errors.ConfigError` each (file, key,
reason), and raised together as :class:`~benchctl.errors.ConfigErrors`. A plan is data:
it is read with :mod:`tomllib` and never executed.
"""

from __future__ import annotations

import math
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchctl.errors import ConfigError, ConfigErrors
from benchctl.procedures import base

_STEP_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_-]{0,47}$")
_SECTIONS = {"board", "limits", "steps"}
_BOARD_KEYS = {"name": True, "revision": False, "serial": False}
_LIMIT_KEYS = {"max_rail_v", "current_limit_a", "ovp_v", "ramp_v_per_s"}
_STEP_KEYS = {"procedure", "name", "params", "spec"}
_SPEC_KEYS = {"min", "max"}
DEFAULT_RAMP_V_PER_S = 10.0


@dataclass(frozen=True)
class SpecLimit:
    """Pass/fail limits on one derived parameter; either bound may be None."""

    min: float | None = None
    max: float | None = None

    def verdict(self, value: float | None) -> str:
        """Return "pass" or "fail" for ``value`` (a missing or NaN value fails)."""
        if value is None or (isinstance(value, float) and math.isnan(value)):
            return "fail"
        if self.min is not None and value < self.min:
            return "fail"
        if self.max is not None and value > self.max:
            return "fail"
        return "pass"

    def as_dict(self) -> dict[str, float | None]:
        return {"min": self.min, "max": self.max}


@dataclass(frozen=True)
class Step:
    index: int
    name: str
    procedure: str
    params: Mapping[str, Any]
    spec: Mapping[str, SpecLimit] = field(default_factory=dict)


@dataclass(frozen=True)
class Plan:
    file: str
    text: str
    board: base.BoardInfo
    limits: base.Limits
    steps: tuple[Step, ...]


def load_plan(path: str | Path) -> Plan:
    """Read and validate a plan file; raise ConfigErrors listing every problem."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigErrors([ConfigError(str(path), "", f"cannot read: {exc.strerror or exc}")]) from None
    return parse_plan(text, file=str(path))


def parse_plan(text: str, *, file: str = "<plan>", wiring: Any = None, bench_file: str = "bench") -> Plan:
    """Validate plan TOML text; raise ConfigErrors listing every problem.

    With the bench file's ``wiring`` (and its name ``bench_file``), the steps' needs of the
    wiring are checked too (a modulation step needs the generator on the rail, ...).
    """
    errors: list[ConfigError] = []

    def err(key: str, reason: str, where: str = file) -> None:
        errors.append(ConfigError(where, key, reason))

    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigErrors([ConfigError(file, "", f"not valid TOML: {exc}")]) from None

    for key in doc:
        if key not in _SECTIONS:
            err(key, f"unknown section (expected one of {', '.join(sorted(_SECTIONS))})")

    board = _board(doc.get("board"), err)
    limits = _limits(doc.get("limits"), err)
    raw_limits = doc.get("limits")
    max_rail_v = _number(raw_limits.get("max_rail_v")) if isinstance(raw_limits, dict) else None
    steps = _steps(doc.get("steps"), max_rail_v, err, wiring, bench_file)
    if errors:
        raise ConfigErrors(errors)
    assert board is not None and limits is not None
    return Plan(file=file, text=text, board=board, limits=limits, steps=tuple(steps))


def _board(section: Any, err) -> base.BoardInfo | None:
    if section is None:
        err("board", "missing section [board] (name, revision, serial)")
        return None
    if not isinstance(section, dict):
        err("board", f"must be a table, got {type(section).__name__}")
        return None
    for key in section:
        if key not in _BOARD_KEYS:
            err(f"board.{key}", f"unknown key (expected {', '.join(_BOARD_KEYS)})")
    values: dict[str, str] = {}
    for key, required in _BOARD_KEYS.items():
        value = section.get(key)
        if value is None:
            if required:
                err(f"board.{key}", "missing")
            continue
        if not isinstance(value, str) or not value.strip():
            err(f"board.{key}", f"must be a non-empty string, got {value!r}")
            continue
        values[key] = value.strip()
    if "name" not in values:
        return None
    return base.BoardInfo(values["name"], values.get("revision", ""), values.get("serial", ""))


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _limits(section: Any, err) -> base.Limits | None:
    if section is None:
        err("limits", "missing section [limits] (max_rail_v, current_limit_a, ovp_v, ramp_v_per_s)")
        return None
    if not isinstance(section, dict):
        err("limits", f"must be a table, got {type(section).__name__}")
        return None
    for key in section:
        if key not in _LIMIT_KEYS:
            err(f"limits.{key}", f"unknown key (expected {', '.join(sorted(_LIMIT_KEYS))})")
    got: dict[str, float] = {}
    for key in ("max_rail_v", "current_limit_a"):
        if key not in section:
            err(f"limits.{key}", "missing: a safety limit must be stated")
            continue
        value = _number(section[key])
        if value is None or value <= 0:
            err(f"limits.{key}", f"must be a number > 0, got {section[key]!r}")
            continue
        got[key] = value
    ramp = section.get("ramp_v_per_s", DEFAULT_RAMP_V_PER_S)
    ramp_value = _number(ramp)
    if ramp_value is None or ramp_value <= 0:
        err("limits.ramp_v_per_s", f"must be a number > 0, got {ramp!r}")
    if "max_rail_v" not in got or "current_limit_a" not in got or ramp_value is None or ramp_value <= 0:
        return None
    max_rail_v = got["max_rail_v"]
    ovp = section.get("ovp_v", round(max_rail_v * 1.1, 3))
    ovp_value = _number(ovp)
    if ovp_value is None or ovp_value < max_rail_v:
        err("limits.ovp_v", f"must be a number >= max_rail_v ({max_rail_v:g}), got {ovp!r}")
        return None
    return base.Limits(max_rail_v, got["current_limit_a"], ovp_value, ramp_value)


def _steps(section: Any, max_rail_v: float | None, err, wiring: Any = None, bench_file: str = "bench") -> list[Step]:
    if section is None:
        err("steps", "missing: a plan needs at least one [[steps]] entry")
        return []
    if not isinstance(section, list) or not section:
        err("steps", "must be a non-empty array of tables ([[steps]])")
        return []
    base.load_builtin()
    steps: list[Step] = []
    seen: set[str] = set()
    earlier: list[tuple[str, str]] = []
    for i, raw in enumerate(section):
        where = f"steps[{i}]"
        if not isinstance(raw, dict):
            err(where, f"must be a table, got {type(raw).__name__}")
            continue
        for key in raw:
            if key not in _STEP_KEYS:
                err(f"{where}.{key}", f"unknown key (expected {', '.join(sorted(_STEP_KEYS))})")
        name_of = raw.get("procedure")
        if not isinstance(name_of, str):
            err(f"{where}.procedure", f"missing or not a string: {name_of!r}")
            continue
        proc = base.REGISTRY.get(name_of)
        if proc is None:
            err(f"{where}.procedure", f"unknown procedure {name_of!r}; known: {', '.join(sorted(base.REGISTRY))}")
            continue
        step_name = raw.get("name", name_of)
        if not isinstance(step_name, str) or not _STEP_NAME.match(step_name):
            err(f"{where}.name", f"must be a letter then letters, digits, '-' or '_' (<= 48), got {step_name!r}")
            continue
        if step_name in seen:
            err(f"{where}.name", f"step name {step_name!r} is used twice; give each step its own name")
        seen.add(step_name)
        params = _params(proc, raw.get("params", {}), f"{where}.params", max_rail_v, err)
        spec = _spec(proc, raw.get("spec", {}), f"{where}.spec", err)
        if params is not None:
            for key, reason in proc.check(params, earlier=tuple(earlier), wiring=wiring):
                if key.startswith("wiring."):
                    err(key, f"step {step_name!r}: {reason}", bench_file)
                else:
                    err(f"{where}.params.{key}", reason)
        earlier.append((step_name, name_of))
        if params is not None and spec is not None:
            steps.append(Step(i, step_name, name_of, params, spec))

    return steps


def _params(proc: type[base.Procedure], raw: Any, where: str, max_rail_v: float | None, err) -> dict | None:
    if not isinstance(raw, dict):
        err(where, f"must be a table, got {type(raw).__name__}")
        return None
    declared = {p.name: p for p in proc.params}
    ok = True
    for key in raw:
        if key not in declared:
            err(f"{where}.{key}", f"unknown parameter of {proc.name!r} (known: {', '.join(declared) or 'none'})")
            ok = False
    values: dict[str, Any] = {}
    for p in proc.params:
        if p.name not in raw:
            if p.required:
                err(f"{where}.{p.name}", f"missing (a {p.kind.__name__}{' in ' + p.unit if p.unit else ''})")
                ok = False
            else:
                values[p.name] = p.default
            continue
        reason, value = _check_value(p, raw[p.name], max_rail_v)
        if reason:
            err(f"{where}.{p.name}", reason)
            ok = False
        else:
            values[p.name] = value
    return values if ok else None


def _check_value(p: base.Param, value: Any, max_rail_v: float | None) -> tuple[str, Any]:
    unit = f" {p.unit}" if p.unit else ""
    if p.kind is bool:
        return ("", value) if isinstance(value, bool) else (f"must be true or false, got {value!r}", None)
    if p.kind is str:
        if not isinstance(value, str):
            return f"must be a string, got {value!r}", None
        if p.choices and value not in p.choices:
            return f"must be one of {', '.join(p.choices)}, got {value!r}", None
        return "", value
    if p.kind is list:
        if not isinstance(value, list) or not value:
            return f"must be a non-empty list of numbers, got {value!r}", None
        out = []
        for j, item in enumerate(value):
            reason = _check_number(p, item, max_rail_v, unit)
            if reason:
                return f"element {j}: {reason}", None
            out.append(float(item))
        return "", out
    if p.kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            return f"must be an integer, got {value!r}", None
    reason = _check_number(p, value, max_rail_v, unit)
    if reason:
        return reason, None
    return "", (int(value) if p.kind is int else float(value))


def _check_number(p: base.Param, value: Any, max_rail_v: float | None, unit: str) -> str:
    number = _number(value)
    if number is None:
        return f"must be a finite number{unit}, got {value!r}"
    if p.minimum is not None and number < p.minimum:
        return f"{number:g}{unit} is below the minimum {p.minimum:g}{unit}"
    if p.maximum is not None and number > p.maximum:
        return f"{number:g}{unit} is above the maximum {p.maximum:g}{unit}"
    if p.rail and max_rail_v is not None and number > max_rail_v:
        return f"rail setpoint {number:g} V is above limits.max_rail_v = {max_rail_v:g} V"
    if p.rail and number < 0:
        return f"rail setpoint {number:g} V must be >= 0"
    return ""


def _spec(proc: type[base.Procedure], raw: Any, where: str, err) -> dict[str, SpecLimit] | None:
    if not isinstance(raw, dict):
        err(where, f"must be a table of {{min = .., max = ..}}, got {type(raw).__name__}")
        return None
    out: dict[str, SpecLimit] = {}
    ok = True
    for name, limit in raw.items():
        key = f"{where}.{name}"
        if proc.results and name not in proc.results:
            err(key, f"{proc.name!r} gives no parameter {name!r} (it gives: {', '.join(proc.results)})")
            ok = False
            continue
        if not isinstance(limit, dict) or not limit:
            err(key, f"must be a table with min and/or max, got {limit!r}")
            ok = False
            continue
        bad = [k for k in limit if k not in _SPEC_KEYS]
        if bad:
            err(key, f"unknown key(s) {', '.join(bad)} (expected min, max)")
            ok = False
            continue
        lo = limit.get("min")
        hi = limit.get("max")
        lo_n = None if lo is None else _number(lo)
        hi_n = None if hi is None else _number(hi)
        if (lo is not None and lo_n is None) or (hi is not None and hi_n is None):
            err(key, f"min and max must be finite numbers, got {limit!r}")
            ok = False
            continue
        if lo_n is not None and hi_n is not None and lo_n > hi_n:
            err(key, f"min {lo_n:g} is above max {hi_n:g}")
            ok = False
            continue
        out[name] = SpecLimit(lo_n, hi_n)
    return out if ok else None
