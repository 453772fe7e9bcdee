"""The one small interface between the runner and the procedures.

A procedure is a class registered by name with :func:`register`. It declares its
parameters (:class:`Param`: type, unit, default) and the columns it records
(:class:`Column`), and its ``run(ctx, params)`` measures points through
``ctx.point(key, measure)`` (or ``ctx.point_later``, whose analysis overlaps the next
point's acquisition) and returns derived parameters (:class:`Result`).

Resume rule: ``ctx.point`` returns the recorded row when a point with that key was
already taken in an interrupted run, without calling ``measure``. So keys must follow
deterministically from the parameters and from earlier rows, and each ``measure``
callable must establish the bench state it needs itself (never rely on the state a
previous point left behind).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar, Protocol

REQUIRED: Any = object()
"""Marker default: the plan must give this parameter."""

_KINDS = (float, int, bool, str, list)


@dataclass(frozen=True)
class Param:
    """One parameter a procedure takes from the plan.

    ``kind`` is float, int, bool, str or list (a list of floats). ``unit`` is the
    physical unit ("V", "Hz", "s", "" for none); ``minimum``/``maximum`` bound numbers
    (and every element of a list); ``choices`` restricts strings.
    """

    name: str
    kind: type
    unit: str = ""
    default: Any = REQUIRED
    doc: str = ""
    minimum: float | None = None
    maximum: float | None = None
    choices: tuple[str, ...] | None = None
    rail: bool = False
    """True for a rail setpoint: the runner checks it against the plan's max_rail_v."""

    @property
    def required(self) -> bool:
        return self.default is REQUIRED


@dataclass(frozen=True)
class Column:
    """One column of a procedure's points table."""

    name: str
    unit: str = ""
    doc: str = ""


@dataclass(frozen=True)
class Result:
    """A derived parameter: value with unit, standard uncertainty and the method used.

    ``low``/``high`` carry an interval where the method gives one (a bracket or a 95%
    confidence interval, as ``method`` says). ``value`` is None when the quantity could
    not be determined; ``note`` then says why.
    """

    name: str
    value: float | None
    unit: str
    uncertainty: float | None = None
    method: str = ""
    low: float | None = None
    high: float | None = None
    note: str = ""


@dataclass(frozen=True)
class Limits:
    """Safety limits from the plan; the runner programs them before any output is on."""

    max_rail_v: float
    current_limit_a: float
    ovp_v: float
    ramp_v_per_s: float


@dataclass(frozen=True)
class BoardInfo:
    name: str
    revision: str = ""
    serial: str = ""


class Clock(Protocol):
    def monotonic(self) -> float: ...

    def sleep(self, seconds: float) -> None: ...


class StepContext(Protocol):
    """What a procedure gets from the runner for one step."""

    bench: Any  # benchctl.drivers.Bench: .supply, .generator, .scope, .wiring
    limits: Limits
    board: BoardInfo
    clock: Clock
    log: logging.Logger
    step_name: str

    def point(self, key: str, measure: Callable[[], Mapping[str, Any]]) -> Mapping[str, Any]:
        """Record one point (a row of the declared columns), or return it if recorded."""
        ...

    def point_later(self, key: str, measure: Callable[[], Callable[[], Mapping[str, Any]]],
                    then: Callable[[Mapping[str, Any], bool], None] | None = None) -> None:
        """Take a point in two parts, so its analysis overlaps the next point's acquisition.

        ``measure()`` does all the instrument work and returns ``finish``, which makes the
        row from what was acquired without touching an instrument. The runner makes the
        row at the next :meth:`idle`, records it after the instrument check that follows
        the point (the next point's :meth:`checkpoint`, or :meth:`flush`; at the latest
        when the step ends) and then calls ``then(row, replayed)``; a recorded point
        (resume) calls ``then(row, True)`` at once. Rows are recorded in the order the
        points were taken.
        """
        ...

    def idle(self) -> None:
        """Called by measuring code while it waits on an instrument: earlier rows are made."""
        ...

    def checkpoint(self) -> None:
        """Inside a ``point_later`` measure, once its supply and generator commands are sent:
        check the instruments and record the points taken earlier (else a no-op)."""
        ...

    def flush(self) -> None:
        """Check the instruments and record every point ``point_later`` has not recorded."""
        ...

    def save_waveform(self, key: str, **arrays: Any) -> str:
        """Store arrays for a point; returns the path relative to the run folder."""
        ...

    def progress(self, done: int, total: int | None, readings: Mapping[str, Any] | None = None) -> None:
        """Report progress within the step (``total`` may be an estimate or None)."""
        ...

    def earlier(self, name: str) -> Mapping[str, Result]:
        """Results of an earlier step, by step name (or procedure name); KeyError if none."""
        ...

    def earlier_points(self, name: str) -> list[Mapping[str, Any]]:
        """Points recorded by an earlier step, by step name (or procedure name)."""
        ...

    def check_abort(self) -> None:
        """Raise AbortRequested if the operator or the system asked the run to stop."""
        ...


class Procedure:
    """Base class; subclasses set the class attributes and implement :meth:`run`."""

    name: ClassVar[str]
    summary: ClassVar[str]
    params: ClassVar[tuple[Param, ...]]
    columns: ClassVar[tuple[Column, ...]]
    results: ClassVar[tuple[str, ...]] = ()
    """Names of the derived parameters run() returns; spec limits may name only these."""

    def run(self, ctx: StepContext, params: Mapping[str, Any]) -> list[Result]:  # pragma: no cover
        raise NotImplementedError

    @classmethod
    def check(cls, params: Mapping[str, Any], *, earlier: Sequence[tuple[str, str]],
              wiring: Any = None) -> list[tuple[str, str]]:
        """Problems the plan validator can see before any instrument is opened.

        ``params`` are the step's parameters (types and bounds already checked),
        ``earlier`` the (step name, procedure name) of the steps before it, ``wiring`` the
        bench file's wiring (None when the bench file is not known). Returns
        ``(parameter or key, reason)`` pairs; the key "wiring.<name>" names the bench file.
        """
        return []


def earlier_names(earlier: Sequence[tuple[str, str]]) -> set[str]:
    """Step names and procedure names of the earlier steps (what ``ctx.earlier`` accepts)."""
    return {n for pair in earlier for n in pair}


def order_problem(params: Mapping[str, Any], lo: str, hi: str) -> list[tuple[str, str]]:
    """``hi`` must be above ``lo`` when both are given."""
    a, b = params.get(lo), params.get(hi)
    if a is not None and b is not None and not float(b) > float(a):
        return [(hi, f"{hi}={b!r} must be above {lo}={a!r}")]
    return []


REGISTRY: dict[str, type[Procedure]] = {}


def register(cls: type[Procedure]) -> type[Procedure]:
    """Class decorator: add a procedure to :data:`REGISTRY`, failing loudly if it is incomplete."""
    for attr in ("name", "summary", "params", "columns"):
        if not hasattr(cls, attr):
            raise TypeError(f"procedure {cls.__qualname__} lacks the class attribute {attr!r}")
    if not cls.name.isidentifier():
        raise TypeError(f"procedure name {cls.name!r} must be an identifier")
    if cls.name in REGISTRY and REGISTRY[cls.name] is not cls:
        raise TypeError(f"procedure name {cls.name!r} is registered twice")
    if cls.run is Procedure.run:
        raise TypeError(f"procedure {cls.name!r} does not implement run()")
    names = [p.name for p in cls.params]
    if len(set(names)) != len(names):
        raise TypeError(f"procedure {cls.name!r} declares a parameter twice: {names}")
    for p in cls.params:
        if p.kind not in _KINDS:
            raise TypeError(f"procedure {cls.name!r}: parameter {p.name!r} has unsupported kind {p.kind!r}")
    cols = [c.name for c in cls.columns]
    if len(set(cols)) != len(cols) or "point" in cols:
        raise TypeError(f"procedure {cls.name!r}: columns must be unique and not 'point': {cols}")
    REGISTRY[cls.name] = cls
    return cls


def get(name: str) -> type[Procedure]:
    """Return the registered procedure ``name`` (KeyError lists the known ones)."""
    load_builtin()
    try:
        return REGISTRY[name]
    except KeyError:
        raise KeyError(f"unknown procedure {name!r}; known: {', '.join(sorted(REGISTRY))}") from None


def load_builtin() -> None:
    """Import the shipped procedure modules so that they register."""
    import importlib

    for module in BUILTIN_MODULES:
        importlib.import_module(module)


BUILTIN_MODULES: Sequence[str] = (
    "benchctl.procedures.rail_sweep",
    "benchctl.procedures.thresholds",
    "benchctl.procedures.linear_region",
    "benchctl.procedures.modulation",
    "benchctl.procedures.pushing",
    "benchctl.procedures.startup_time",
)
