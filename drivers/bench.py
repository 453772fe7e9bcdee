"""Bench file: which instrument plays which role, and opening the whole bench.

The bench file format is documented in DEVELOPERS.md ("Bench file"). It is read with
:mod:`tomllib` only and validated completely before any instrument is touched: every
problem becomes one :class:`~benchctl.errors.ConfigError` (file, key, reason), all reported
together in one :class:`~benchctl.errors.ConfigErrors`. Dialects are loaded during
validation, so a broken dialect file is reported there too.
"""

from __future__ import annotations

import logging
import math
import time
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchctl.errors import BenchError, ConfigError, ConfigErrors, ConnectionLost

from .base import DRIVERS, Instrument
from .dialect import ROLES, Dialect, Identity, load_dialect
from .generator import Generator
from .scope import Scope
from .supply import Supply
from .transport import Transport, open_resource, resource_shape_ok

__all__ = ["Bench", "BenchConfig", "RoleConfig", "Wiring", "load_bench_file", "load_bench_text", "open_bench"]

logger = logging.getLogger(__name__)

_BENCH_KEYS = {"name", "visa_library"}
_ROLE_KEYS = {"resource", "dialect", "timeout_s", "channel"}
_WIRING_KEYS = {"output_channel", "rail_channel", "generator"}
_GENERATOR_WIRING = ("rail", "input", "none")


@dataclass(frozen=True)
class RoleConfig:
    """One role of the bench: its resource, dialect and timeout."""

    role: str
    resource: str
    dialect: Dialect
    timeout_s: float = 2.0
    channel: int | None = None


@dataclass(frozen=True)
class Wiring:
    """How the board is connected.

    Attributes
    ----------
    output_channel : int
        Scope channel that sees the board output.
    rail_channel : int
        Scope channel that sees the rail (0 = none).
    generator : {"rail", "input", "none"}
        "rail": summed onto the supply rail (modulation fixture); "input": drives the board
        input; "none": not connected.
    """

    output_channel: int = 1
    rail_channel: int = 2
    generator: str = "rail"


@dataclass(frozen=True)
class BenchConfig:
    """A validated bench file."""

    name: str
    visa_library: str
    roles: Mapping[str, RoleConfig]
    wiring: Wiring = field(default_factory=Wiring)
    source: str = "<string>"


def load_bench_file(path: str | Path) -> BenchConfig:
    """Read and validate a bench file.

    Raises
    ------
    ConfigErrors
        Every problem found, each naming the file and key.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigErrors([ConfigError(str(path), "", f"cannot read: {exc.strerror or exc}")]) from None
    except UnicodeDecodeError:
        raise ConfigErrors([ConfigError(str(path), "", "not UTF-8 text")]) from None
    return load_bench_text(text, source=str(path), base_dir=path.parent)


def load_bench_text(text: str, *, source: str = "<string>", base_dir: str | Path | None = None) -> BenchConfig:
    """Validate a bench file given as text (relative dialect paths from ``base_dir``)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigErrors([ConfigError(source, "", f"not valid TOML: {exc}")]) from None
    errors: list[ConfigError] = []

    def err(key: str, reason: str) -> None:
        errors.append(ConfigError(source, key, reason))

    for key in data:
        if key not in ("bench", "roles", "wiring"):
            err(key, "unknown section (known: bench, roles, wiring)")
    head = _table(data, "bench", err, required=False)
    for key in head:
        if key not in _BENCH_KEYS:
            err(f"bench.{key}", f"unknown key (known: {', '.join(sorted(_BENCH_KEYS))})")
    name = head.get("name", "bench")
    if not isinstance(name, str):
        err("bench.name", f"must be a string, not {name!r}")
        name = "bench"
    visa_library = head.get("visa_library", "@py")
    if not isinstance(visa_library, str) or not visa_library:
        err("bench.visa_library", f"must be a non-empty string, not {visa_library!r}")
        visa_library = "@py"

    roles_table = _table(data, "roles", err, required=True)
    for key in roles_table:
        if key not in ROLES:
            err(f"roles.{key}", f"unknown role (known: {', '.join(ROLES)})")
    roles: dict[str, RoleConfig] = {}
    for role in ROLES:
        if role not in roles_table:
            if "roles" in data:
                err(f"roles.{role}", "missing: every bench needs a supply, a generator and a scope")
            continue
        rc = _role(role, roles_table[role], source, base_dir, err, errors)
        if rc is not None:
            roles[role] = rc

    wt = _table(data, "wiring", err, required=False)
    for key in wt:
        if key not in _WIRING_KEYS:
            err(f"wiring.{key}", f"unknown key (known: {', '.join(sorted(_WIRING_KEYS))})")
    output_channel = _int(wt, "output_channel", 1, "wiring", err, minimum=1)
    rail_channel = _int(wt, "rail_channel", 2, "wiring", err, minimum=0)
    if output_channel == rail_channel:
        err("wiring.rail_channel", f"{rail_channel} is also the output channel")
    gen = wt.get("generator", "rail")
    if gen not in _GENERATOR_WIRING:
        err("wiring.generator", f"{gen!r} is not one of {', '.join(_GENERATOR_WIRING)}")
        gen = "rail"
    if errors:
        raise ConfigErrors(errors)
    return BenchConfig(
        name=name,
        visa_library=visa_library,
        roles=roles,
        wiring=Wiring(output_channel=output_channel, rail_channel=rail_channel, generator=gen),
        source=source,
    )


def _table(data: Mapping[str, Any], key: str, err: Callable[[str, str], None], *, required: bool) -> dict[str, Any]:
    value = data.get(key)
    if value is None:
        if required:
            err(key, "missing section")
        return {}
    if not isinstance(value, dict):
        err(key, "must be a table")
        return {}
    return value


def _int(table: Mapping[str, Any], key: str, default: int, where: str, err: Callable[[str, str], None], *, minimum: int) -> int:
    value = table.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        err(f"{where}.{key}", f"must be an integer >= {minimum}, not {value!r}")
        return default
    return value


def _role(
    role: str,
    table: Any,
    source: str,
    base_dir: str | Path | None,
    err: Callable[[str, str], None],
    errors: list[ConfigError],
) -> RoleConfig | None:
    where = f"roles.{role}"
    if not isinstance(table, dict):
        err(where, "must be a table")
        return None
    n_before = len(errors)
    for key in table:
        if key not in _ROLE_KEYS:
            err(f"{where}.{key}", f"unknown key (known: {', '.join(sorted(_ROLE_KEYS))})")
    resource = table.get("resource")
    if not isinstance(resource, str) or not resource.strip():
        err(f"{where}.resource", "missing VISA resource string, e.g. 'TCPIP::127.0.0.1::5025::SOCKET'")
    elif not resource_shape_ok(resource):
        err(f"{where}.resource", f"{resource!r} is not a VISA resource string (e.g. 'TCPIP::host::port::SOCKET')")
    timeout_s = table.get("timeout_s", 2.0)
    if isinstance(timeout_s, bool) or not isinstance(timeout_s, int | float) or not (math.isfinite(timeout_s) and timeout_s > 0):
        err(f"{where}.timeout_s", f"must be a number of seconds > 0, not {timeout_s!r}")
        timeout_s = 2.0
    channel = table.get("channel")
    if channel is not None and (isinstance(channel, bool) or not isinstance(channel, int) or channel < 1):
        err(f"{where}.channel", f"must be an integer >= 1, not {channel!r}")
        channel = None
    dialect_name = table.get("dialect", "scpi1999")
    dialect: Dialect | None = None
    if not isinstance(dialect_name, str) or not dialect_name:
        err(f"{where}.dialect", f"must be a dialect name or path, not {dialect_name!r}")
    else:
        try:
            dialect = load_dialect(dialect_name, role, relative_to=base_dir)
        except ConfigErrors as exc:
            # the dialect's own problems name the dialect file and key; this one names ours
            first = exc.errors[0].reason if len(exc.errors) == 1 and not exc.errors[0].key else ""
            err(f"{where}.dialect", f"dialect {dialect_name!r} cannot be used" + (f": {first}" if first else " (see below)"))
            if not first:
                errors.extend(exc.errors)
    if len(errors) > n_before or dialect is None:
        return None
    return RoleConfig(role=role, resource=resource.strip(), dialect=dialect, timeout_s=float(timeout_s), channel=channel)


class Bench:
    """The three opened instruments and the wiring (see :func:`open_bench`)."""

    def __init__(self, supply: Supply, generator: Generator, scope: Scope, wiring: Wiring, idn: dict[str, Identity], *, config: BenchConfig | None = None, reopen: Callable[[str], Instrument] | None = None) -> None:
        self.supply = supply
        self.generator = generator
        self.scope = scope
        self.wiring = wiring
        self.idn = dict(idn)
        self.config = config
        self._reopen = reopen

    def reopen(self, role: str) -> Instrument:
        """Close the session of ``role`` and open (and identify) a fresh one in its place.

        Used to reach an instrument again after its connection dropped, e.g. to put the
        bench in its safe state. Raises what opening raises (ConnectionLost, ...).
        """
        if self._reopen is None:
            raise ConnectionLost(f"cannot reopen role {role!r}: bench opened without its configuration")
        old = self.instruments[role]
        try:
            old.close()
        except (BenchError, OSError):
            pass  # the old session is gone anyway
        inst = self._reopen(role)
        setattr(self, role, inst)
        return inst

    @property
    def instruments(self) -> dict[str, Instrument]:
        """role -> driver."""
        return {"supply": self.supply, "generator": self.generator, "scope": self.scope}

    def close(self) -> None:
        """Close every session (does not change any output: see the runner's safe state)."""
        for inst in self.instruments.values():
            inst.close()

    def __enter__(self) -> Bench:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Bench({', '.join(f'{r}={i.resource!r}' for r, i in self.instruments.items())})"


def open_bench(
    config: BenchConfig,
    *,
    max_voltage_v: float,
    strict: bool = False,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], None] = time.sleep,
    opener: Callable[..., Transport] = open_resource,
) -> Bench:
    """Open, identify (``*IDN?``) and return the bench's three instruments.

    Errors an instrument had queued before this session are read out and logged (not
    raised), so they are not blamed on the first command of the run.

    Parameters
    ----------
    config : BenchConfig
        From :func:`load_bench_file`.
    max_voltage_v : float
        The supply refuses any setpoint above this, V.
    strict : bool
        Error-queue policy of every driver (see :mod:`benchctl.drivers.base`).
    clock, sleep
        Injected time functions, s.
    opener
        Transport factory (:func:`~.transport.open_resource`).

    Raises
    ------
    ConnectionLost, InstrumentTimeout, ProtocolError
        A role could not be opened or did not identify; the roles already opened are
        closed first.
    """
    opened: dict[str, Instrument] = {}
    idn: dict[str, Identity] = {}

    def open_role(role: str) -> Instrument:
        rc = config.roles[role]
        transport = opener(
            rc.resource,
            visa_library=config.visa_library,
            timeout_s=rc.timeout_s,
            read_termination=rc.dialect.read_termination,
            write_termination=rc.dialect.write_termination,
        )
        kwargs: dict[str, Any] = {"strict": strict, "clock": clock, "sleep": sleep}
        if role == "supply":
            kwargs.update(max_voltage_v=max_voltage_v, channel=rc.channel)
        elif role == "generator" and rc.channel is not None:
            kwargs["channel"] = rc.channel
        try:
            inst = DRIVERS[role](transport, rc.dialect, **kwargs)
        except BaseException:
            transport.close()
            raise
        try:
            idn[role] = inst.identify()  # the probe: a refused SOCKET fails here
            stale = inst.drain_errors()  # queued before this session: logged, not ours to raise
            if stale:
                logger.info("%s: %d error(s) queued before this session: %s", rc.resource, len(stale), stale)
        except BaseException:
            inst.close()
            raise
        return inst

    try:
        for role in ROLES:
            opened[role] = open_role(role)
    except BaseException as exc:
        for inst in opened.values():
            inst.close()
        if isinstance(exc, BenchError) and not isinstance(exc, ConfigErrors):
            exc.add_note(f"while opening role {role!r} of bench {config.name!r}")
        raise
    return Bench(opened["supply"], opened["generator"], opened["scope"], config.wiring, idn, config=config, reopen=open_role)  # type: ignore[arg-type]
