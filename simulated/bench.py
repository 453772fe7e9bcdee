"""``SimulatedBench``: the three simulated instruments on loopback, as a context manager.

Example
-------
>>> from benchctl.simulated import SimulatedBench
>>> with SimulatedBench(board="beacon", seed=1) as sim:   # doctest: +SKIP
...     sim.resources["scope"]
'TCPIP::127.0.0.1::40123::SOCKET'
"""

from __future__ import annotations

import logging
import re
import subprocess
import sys
import time
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from benchctl.simulated.instruments import (
    GeneratorInstrument,
    ScopeInstrument,
    SupplyInstrument,
)
from benchctl.simulated.models import AmplifierModel, BoardModel, load_board
from benchctl.simulated.physics import BenchModel, BenchPhysics
from benchctl.simulated.server import InstrumentServer, check_fault

log = logging.getLogger(__name__)

ROLES = ("supply", "generator", "scope")
_CLASSES = {"supply": SupplyInstrument, "generator": GeneratorInstrument, "scope": ScopeInstrument}


def parse_fault(text: str) -> tuple[str, str, dict[str, str]]:
    """Parse ``role:kind[:k=v,...]`` (the ``--fault`` syntax) into (role, kind, options)."""
    parts = text.split(":", 2)
    if len(parts) < 2 or not parts[0] or not parts[1]:
        raise ValueError(f"fault {text!r}: expected role:kind[:key=value,...]")
    role, kind = parts[0].strip(), parts[1].strip()
    if role not in ROLES:
        raise ValueError(f"fault {text!r}: unknown role {role!r} (roles: {', '.join(ROLES)})")
    kw: dict[str, str] = {}
    if len(parts) == 3 and parts[2].strip():
        for item in parts[2].split(","):
            key, sep, value = item.partition("=")
            if not sep or not key.strip():
                raise ValueError(f"fault {text!r}: option {item!r} is not key=value")
            kw[key.strip()] = value.strip()
    check_fault(role, kind, kw)
    return role, kind, kw


class SimulatedBench:
    """A simulated bench (DC supply, function generator, scope) serving SCPI on sockets.

    Parameters
    ----------
    board : str or Path
        Built-in board (``"beacon"``, ``"buffer"``, ``"replay"``) or a board TOML file.
    revision, serial : str, optional
        Board revision and unit serial (the board file's defaults when omitted).
    seed : int
        Session seed: the same seed and the same settings give the same records.
    realtime : bool
        True: servers really wait for settling and acquisitions. False: accelerated.
    host : str
        Bind address; 127.0.0.1 unless told otherwise (SCPI has no authentication).
    ports : mapping or int, optional
        Role -> TCP port, or the first of three consecutive ports; ephemeral when None.
    faults : iterable, optional
        Faults armed at start: ``"role:kind[:k=v,...]"`` strings or ``(role, kind, kw)``.
    wiring_generator : {"rail", "input", "none"}, optional
        Where the generator goes; "rail" for oscillators and "input" for amplifiers by default.
    physics : BenchPhysics, optional
        Instrument numbers (slew, settling, noise, re-arm time...).
    process : bool
        Run the servers in a child process (``benchctl sim``) instead of threads of this
        one, so the client's interpreter lock is not shared (timing measurements). Then
        only ``resources``, ``truth`` and the bench file are available: the state, fault
        and log methods need the in-process bench.
    """

    def __init__(self, board: str | Path = "beacon", *, revision: str | None = None,
                 serial: str | None = None, seed: int = 1, realtime: bool = False,
                 host: str = "127.0.0.1", ports: Mapping[str, int] | int | None = None,
                 faults: Iterable[Any] | None = None, wiring_generator: str | None = None,
                 physics: BenchPhysics | None = None, process: bool = False) -> None:
        self.board_spec = board
        self.process = bool(process)
        self._proc: subprocess.Popen | None = None
        self._proc_resources: dict[str, str] = {}
        if process and (physics is not None or wiring_generator is not None):
            raise ValueError("process=True takes the default physics and wiring only")
        self.model: BoardModel = load_board(board, revision=revision, serial=serial)
        if wiring_generator is None:
            wiring_generator = "input" if isinstance(self.model, AmplifierModel) else "rail"
        if wiring_generator not in ("rail", "input", "none"):
            raise ValueError(f"{wiring_generator=} must be 'rail', 'input' or 'none'")
        self.wiring_generator = wiring_generator
        self.seed = int(seed)
        self.realtime = bool(realtime)
        self.host = host
        self._ports = self._port_map(ports)
        self._faults = [self._fault_tuple(f) for f in (faults or ())]
        self._physics = physics
        self.bench: BenchModel | None = None
        self.servers: dict[str, InstrumentServer] = {}

    @staticmethod
    def _port_map(ports) -> dict[str, int]:
        if ports is None:
            return dict.fromkeys(ROLES, 0)
        if isinstance(ports, int):
            return {role: ports + i for i, role in enumerate(ROLES)}
        unknown = set(ports) - set(ROLES)
        if unknown:
            raise ValueError(f"ports: unknown roles {sorted(unknown)}")
        return {role: int(ports.get(role, 0)) for role in ROLES}

    @staticmethod
    def _fault_tuple(f) -> tuple[str, str, dict]:
        if isinstance(f, str):
            return parse_fault(f)
        role, kind, *rest = f
        return role, kind, dict(rest[0]) if rest else {}

    # -- life cycle -------------------------------------------------------------------
    def start(self) -> SimulatedBench:
        """Start the three servers (idempotent)."""
        if self.servers or self._proc is not None:
            return self
        if self.process:
            return self._start_process()
        self.bench = BenchModel(self.model, seed=self.seed, realtime=self.realtime,
                                wiring_generator=self.wiring_generator, physics=self._physics)
        serial = self.model.serial
        try:
            for role in ROLES:
                inst = _CLASSES[role](self.bench, serial=f"SIM-{serial}-{role[:3].upper()}")
                self.servers[role] = InstrumentServer(inst, host=self.host,
                                                      port=self._ports[role]).start()
        except OSError:
            self.close()
            raise
        for role, kind, kw in self._faults:
            self.inject(role, kind, **kw)
        return self

    def _start_process(self) -> SimulatedBench:
        m = self.model
        argv = [sys.executable, "-m", "benchctl", "sim", "--board", str(self.board_spec),
                "--revision", m.revision, "--serial", m.serial, "--seed", str(self.seed),
                "--bind", self.host]
        if self.realtime:
            argv.append("--realtime")
        if len(set(self._ports.values())) == 3 and all(self._ports.values()):
            base = self._ports["supply"]
            if self._ports != {r: base + i for i, r in enumerate(ROLES)}:
                raise ValueError("process=True needs consecutive ports (or none)")
            argv += ["--port-base", str(base)]
        for role, kind, kw in self._faults:
            opts = ",".join(f"{k}={v}" for k, v in kw.items())
            argv += ["--fault", f"{role}:{kind}" + (f":{opts}" if opts else "")]
        proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                                text=True)
        pattern = re.compile(r"^(supply|generator|scope): (TCPIP::\S+)$")
        lines: list[str] = []
        deadline = time.monotonic() + 30.0
        while time.monotonic() < deadline and len(lines) < 50:
            line = proc.stdout.readline()
            if not line:
                break
            lines.append(line.rstrip("\n"))
            hit = pattern.match(lines[-1])
            if hit:
                self._proc_resources[hit.group(1)] = hit.group(2)
            if lines[-1].startswith("serving"):
                break
        if set(self._proc_resources) != set(ROLES):
            proc.kill()
            proc.communicate(timeout=5)
            raise RuntimeError("benchctl sim did not start: " + " | ".join(lines[-5:]))
        self._proc = proc
        return self

    def close(self) -> None:
        """Stop every server and close every connection."""
        for server in self.servers.values():
            server.close()
        self.servers = {}
        proc, self._proc = self._proc, None
        if proc is not None:
            proc.terminate()
            try:
                proc.communicate(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.communicate(timeout=5)

    def __enter__(self) -> SimulatedBench:
        return self.start()

    def __exit__(self, *exc) -> None:
        self.close()

    # -- what tests and the CLI see ---------------------------------------------------
    @property
    def resources(self) -> dict[str, str]:
        """Role -> VISA resource string."""
        if self._proc is not None:
            return dict(self._proc_resources)
        return {role: s.resource for role, s in self.servers.items()}

    @property
    def truth(self):
        """The board's analytic ground truth (OscillatorTruth or AmplifierTruth)."""
        return self.model.truth()

    def bench_toml(self, dialect: str = "scpi1999") -> str:
        """A ready bench file (format in DEVELOPERS.md) pointing at these servers."""
        lines = ["# Bench file written by `benchctl sim` for the simulated bench.",
                 "[bench]",
                 f'name = "sim-{self.model.name}-{self.model.revision}-{self.model.serial}"',
                 'visa_library = "@py"', ""]
        for role in ROLES:
            lines += [f"[roles.{role}]", f'resource = "{self.resources[role]}"',
                      f'dialect = "{dialect}"', "timeout_s = 5.0", ""]
        lines += ["[wiring]", "output_channel = 1", "rail_channel = 2",
                  f'generator = "{self.wiring_generator}"', ""]
        return "\n".join(lines)

    def write_bench(self, path: str | Path, dialect: str = "scpi1999") -> Path:
        """Write :meth:`bench_toml` to ``path`` and return the path."""
        path = Path(path)
        path.write_text(self.bench_toml(dialect), encoding="utf-8")
        return path

    def _need(self) -> BenchModel:
        if self._proc is not None:
            raise RuntimeError("not available when the simulated bench runs in a process")
        if self.bench is None or not self.servers:
            raise RuntimeError("SimulatedBench is not started")
        return self.bench

    def supply_state(self) -> dict[str, Any]:
        """The supply as the physics has it now (no noise)."""
        b = self._need()
        with b.cond:
            s = b.supply
            t = b.clock.now()
            return {"output_on": s.output_on, "setpoint_v": s.setpoint_v,
                    "output_v": float(s.output_v(t)), "current_limit_a": s.current_limit_a,
                    "ovp_v": s.ovp_v, "tripped": s.tripped, "current_a": b.board_current_a(t),
                    "mode": b.supply_mode()}

    def generator_state(self) -> dict[str, Any]:
        """The generator settings now."""
        b = self._need()
        with b.cond:
            g = b.generator
            return {"output_on": g.output_on, "shape": g.shape, "freq_hz": g.freq_hz,
                    "vpp_v": g.vpp_v, "offset_v": g.offset_v}

    def board_state(self) -> dict[str, Any]:
        """Whether the board runs now, and the model time, s."""
        b = self._need()
        with b.cond:
            return {"oscillating": b.oscillating(), "model_time_s": b.clock.now()}

    def inject(self, role: str, fault: str, **kw) -> None:
        """Arm a fault on one instrument (see the module docs of ``server``)."""
        if role not in ROLES:
            raise ValueError(f"unknown role {role!r} (roles: {', '.join(ROLES)})")
        self._need()
        self.servers[role].inject(fault, **kw)

    def clear_faults(self) -> None:
        """Disarm every fault of every instrument."""
        for s in self.servers.values():
            s.clear_faults()

    def command_log(self, role: str) -> list[str]:
        """Every program message the server of ``role`` received, in order."""
        self._need()
        return self.servers[role].command_log()
