"""SCPI socket servers: one per simulated instrument, with IEEE 488.2 status and faults.

Framing is one program message per line (``"\\n"``, a trailing ``"\\r"`` is dropped) in
both directions. Each accepted client gets its own thread and ``TCP_NODELAY``; all three
instruments of a bench share one lock (the bench's), so the physics stays consistent.
A client that disconnects only ends its own thread.

Binary blocks are cached per record and sent with ``sendall`` on a memoryview; the
command tree only carries a short placeholder for them (:data:`BLOCK_MARK`).
"""

from __future__ import annotations

import logging
import socket
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

from benchctl import __version__
from benchctl.scpi import CommandTree, ErrorQueue, ScpiError, format_nr1
from benchctl.simulated.physics import COMMAND_TIME_S, BenchModel

log = logging.getLogger(__name__)

BLOCK_MARK = "\x00B\x00"
"""Placeholder a query handler returns for a binary block; the server sends the bytes."""

MAX_MESSAGE_BYTES = 1 << 20
"""A message longer than this without a terminator is discarded with -223."""

LOG_LIMIT = 1_000_000
"""Program messages kept per server for :meth:`InstrumentServer.command_log`."""

# ESR bits (IEEE 488.2-1992 §11.5.1, from memory)
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME, ESR_PON = 1, 4, 8, 16, 32, 128


class _StatusQueue(ErrorQueue):
    """Error queue that also sets the event status register bit of each error class."""

    def __init__(self, owner: Instrument) -> None:
        super().__init__(capacity=16)
        self.owner = owner

    def push(self, code: int, info: str = "") -> None:
        super().push(code, info)
        code = int(code)
        if -199 <= code <= -100:
            self.owner.esr |= ESR_CME
        elif -299 <= code <= -200:
            self.owner.esr |= ESR_EXE
        elif -399 <= code <= -300 or code > 0:
            self.owner.esr |= ESR_DDE
        elif -499 <= code <= -400:
            self.owner.esr |= ESR_QYE


class Instrument:
    """Base of the simulated instruments: common commands and the status model.

    Subclasses set ``role`` and ``model_name`` and add their commands in :meth:`build`.
    """

    role = ""
    model_name = ""

    def __init__(self, bench: BenchModel, *, serial: str = "SIM0001") -> None:
        self.bench = bench
        self.serial = serial
        self.errors = _StatusQueue(self)
        self.esr = ESR_PON
        self.ese = 0
        self.sre = 0
        self.opc_armed = False
        self.stop = threading.Event()
        self._tls = threading.local()
        self.tree = CommandTree()
        self._common(self.tree)
        self.build(self.tree)

    # -- to override ------------------------------------------------------------------
    def build(self, tree: CommandTree) -> None:
        """Add the instrument's own commands."""

    def reset(self) -> None:
        """``*RST``: settings to their defaults."""

    def pending(self) -> bool:
        """True while an overlapped operation (an acquisition) is in progress."""
        return False

    def wait_pending(self) -> None:
        """Block until no operation is pending (``*OPC?``, ``*WAI``)."""

    def after_message(self) -> None:
        """Work left for after a message has been answered (the server calls it)."""

    def questionable(self) -> int:
        return 0

    def operation(self) -> int:
        return 0

    # -- running a message ------------------------------------------------------------
    def execute(self, message: str) -> tuple[str | None, list[memoryview]]:
        """Run one program message; return the response text and blocks to splice in."""
        tls = self._tls
        tls.blocks = blocks = []
        bench = self.bench
        with bench.lock:  # the RLock under bench.cond (handlers may cond.wait on it)
            bench.clock.advance(COMMAND_TIME_S)
            out = self.tree.execute(message, context=self, errors=self.errors)
        return out, blocks

    def send_block(self, data: memoryview) -> str:
        """Return the placeholder for a block and queue the bytes for the server."""
        self._tls.blocks.append(data)
        return BLOCK_MARK

    # -- common commands --------------------------------------------------------------
    def idn(self) -> str:
        return f"benchctl,{self.model_name},{self.serial},{__version__}"

    def stb(self) -> int:
        s = 0
        if len(self.errors):
            s |= 4
        if self.questionable():
            s |= 8
        if self.esr & self.ese:
            s |= 32
        if self.operation():
            s |= 128
        if s & self.sre & ~64:  # IEEE 488.2 §11.3.2: bit 6 of the enable register is ignored
            s |= 64
        return s

    def _common(self, t: CommandTree) -> None:
        def noparam(fn: Callable[[], object]) -> Callable:
            def handler(call):
                call.expect(0)
                return fn()
            return handler

        def integer_reg(name: str):
            def setter(call):
                call.expect(1)
                setattr(self, name, call.integer(0, minimum=0, maximum=255))

            def getter(call):
                call.expect(0)
                return format_nr1(getattr(self, name))
            return setter, getter

        t.add("*IDN", query=noparam(self.idn))
        t.add("*RST", set=noparam(self._rst))
        t.add("*CLS", set=noparam(self._cls))
        t.add("*OPC", set=noparam(self._opc), query=noparam(self._opc_query))
        t.add("*WAI", set=noparam(self.wait_pending))
        t.add("*ESR", query=noparam(self._esr_query))
        s, g = integer_reg("ese")
        t.add("*ESE", set=s, query=g)
        s, g = integer_reg("sre")
        t.add("*SRE", set=s, query=g)
        t.add("*STB", query=noparam(lambda: format_nr1(self.stb())))
        t.add("*TST", query=noparam(lambda: "0"))
        t.add("SYSTem:ERRor[:NEXT]", query=noparam(self.errors.format_next))
        t.add("SYSTem:VERSion", query=noparam(lambda: "1999.0"))
        t.add("STATus:QUEStionable[:EVENt]", query=noparam(lambda: format_nr1(self.questionable())))
        t.add("STATus:QUEStionable:CONDition", query=noparam(lambda: format_nr1(self.questionable())))
        t.add("STATus:OPERation[:EVENt]", query=noparam(lambda: format_nr1(self.operation())))
        t.add("STATus:OPERation:CONDition", query=noparam(lambda: format_nr1(self.operation())))

    def _rst(self) -> None:
        self.reset()
        self.opc_armed = False

    def _cls(self) -> None:
        self.errors.clear()
        self.esr = 0
        self.opc_armed = False

    def _opc(self) -> None:
        if self.pending():
            self.opc_armed = True
        else:
            self.esr |= ESR_OPC

    def _opc_query(self) -> str:
        self.wait_pending()
        return "1"

    def _esr_query(self) -> str:
        if self.opc_armed and not self.pending():
            self.esr |= ESR_OPC
            self.opc_armed = False
        value, self.esr = self.esr, 0
        return format_nr1(value)


def suffix_in(call, allowed: tuple[int, ...] = (1,), index: int = 0) -> int:
    """The header suffix, checked against ``allowed`` (-114 otherwise)."""
    n = call.suffixes[index] if call.suffixes else 1
    if n not in allowed:
        raise ScpiError(-114, f"{call.header}: suffix {n} (allowed {allowed})")
    return n


# --------------------------------------------------------------------------------------
# Faults
# --------------------------------------------------------------------------------------
FAULT_KINDS = {
    "drop_after": {"n"},
    "delay": {"seconds", "count"},
    "truncate": {"count"},
    "corrupt_block": {"count", "mode"},
    "push_error": {"code", "message"},
    "trip_ovp": set(),
    "stall": set(),
}


@dataclass
class Faults:
    """Armed faults of one server."""

    drop_after: int | None = None
    delay_s: float = 0.0
    delay_count: int = 0
    truncate_count: int = 0
    corrupt_count: int = 0
    corrupt_mode: str = "length"
    stall: bool = False


def check_fault(role: str, kind: str, kw: dict) -> dict:
    """Validate one fault request; return its keywords with defaults and types applied."""
    if kind not in FAULT_KINDS:
        raise ValueError(f"unknown fault {kind!r} (known: {', '.join(FAULT_KINDS)})")
    extra = set(kw) - FAULT_KINDS[kind]
    if extra:
        raise ValueError(f"fault {kind!r} takes {sorted(FAULT_KINDS[kind]) or 'no options'}, "
                         f"got {sorted(extra)}")
    if kind == "trip_ovp" and role != "supply":
        raise ValueError(f"fault 'trip_ovp' is for the supply only, not {role!r}")
    out = dict(kw)
    try:
        if kind == "drop_after":
            out["n"] = int(kw.get("n", 0))
        if kind == "delay":
            out["seconds"] = float(kw.get("seconds", 5.0))
        if kind in ("delay", "truncate", "corrupt_block"):
            out["count"] = int(kw.get("count", 1))
        if kind == "push_error":
            out["code"] = int(kw.get("code", -300))
            out["message"] = str(kw.get("message", ""))
    except (TypeError, ValueError):
        raise ValueError(f"fault {kind!r}: bad option value in {kw!r}") from None
    if kind == "corrupt_block":
        out["mode"] = str(kw.get("mode", "length"))
        if out["mode"] not in ("length", "garbage"):
            raise ValueError(f"fault 'corrupt_block': mode must be 'length' or 'garbage', "
                             f"got {out['mode']!r}")
    for key in ("n", "count"):
        if key in out and out[key] < 0:
            raise ValueError(f"fault {kind!r}: {key}={out[key]} must be >= 0")
    if out.get("seconds", 0) < 0:
        raise ValueError(f"fault {kind!r}: seconds={out['seconds']} must be >= 0")
    return out


# --------------------------------------------------------------------------------------
# Server
# --------------------------------------------------------------------------------------
class InstrumentServer:
    """TCP server for one instrument.

    Parameters
    ----------
    instrument : Instrument
        What answers the messages.
    host : str
        Address to bind (127.0.0.1 by default: SCPI has no authentication).
    port : int
        TCP port; 0 picks a free (ephemeral) one.
    """

    def __init__(self, instrument: Instrument, *, host: str = "127.0.0.1", port: int = 0) -> None:
        self.instrument = instrument
        self.faults = Faults()
        self._armed = False  # any fault armed: the fast path skips the fault checks
        self._log: deque[str] = deque(maxlen=LOG_LIMIT)
        self._flock = threading.Lock()
        self._stop = instrument.stop
        self._clients: set[socket.socket] = set()
        self._threads: list[threading.Thread] = []
        self.sock = socket.create_server((host, port), reuse_port=False)
        self.sock.settimeout(0.5)
        self.host, self.port = self.sock.getsockname()[:2]
        self._accept_thread = threading.Thread(target=self._accept_loop, daemon=True,
                                               name=f"sim-{instrument.role}-accept")

    @property
    def resource(self) -> str:
        """VISA resource string of this server."""
        return f"TCPIP::{self.host}::{self.port}::SOCKET"

    def start(self) -> InstrumentServer:
        self._accept_thread.start()
        return self

    def close(self) -> None:
        """Stop accepting, close every client, join the threads."""
        self._stop.set()
        with self.instrument.bench.cond:
            self.instrument.bench.cond.notify_all()
        _shutdown(self.sock)  # wakes the blocked accept() at once
        for c in list(self._clients):
            _shutdown(c)
        if self._accept_thread.is_alive():
            self._accept_thread.join(timeout=2.0)
        for th in list(self._threads):
            th.join(timeout=2.0)

    # -- faults -----------------------------------------------------------------------
    def inject(self, kind: str, **kw) -> None:
        """Arm a fault (see :data:`FAULT_KINDS`)."""
        kw = check_fault(self.instrument.role, kind, kw)
        f = self.faults
        with self._flock:
            self._armed = kind not in ("push_error", "trip_ovp") or self._armed
            if kind == "drop_after":
                f.drop_after = kw["n"]
            elif kind == "delay":
                f.delay_s, f.delay_count = kw["seconds"], kw["count"]
            elif kind == "truncate":
                f.truncate_count = kw["count"]
            elif kind == "corrupt_block":
                f.corrupt_count, f.corrupt_mode = kw["count"], kw["mode"]
            elif kind == "stall":
                f.stall = True
        if kind == "push_error":
            with self.instrument.bench.cond:
                self.instrument.errors.push(kw["code"], kw["message"])
        elif kind == "trip_ovp":
            with self.instrument.bench.cond:
                self.instrument.bench.trip()

    def clear_faults(self) -> None:
        with self._flock:
            self.faults = Faults()
            self._armed = False

    def command_log(self) -> list[str]:
        return list(self._log)

    # -- threads ----------------------------------------------------------------------
    def _accept_loop(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.sock.accept()
            except TimeoutError:
                continue
            except OSError:
                break
            conn.settimeout(None)
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._clients.add(conn)
            th = threading.Thread(target=self._serve, args=(conn,), daemon=True,
                                  name=f"sim-{self.instrument.role}-client")
            self._threads = [t for t in self._threads if t.is_alive()]
            self._threads.append(th)
            th.start()

    def _serve(self, conn: socket.socket) -> None:
        buf = bytearray()
        try:
            while not self._stop.is_set():
                try:
                    chunk = conn.recv(65536)
                except OSError:
                    break
                if not chunk:
                    break
                if not buf and chunk[-1:] == b"\n" and chunk.count(b"\n") == 1:
                    # the common case: exactly one whole message in one segment
                    if not self._handle(conn, chunk[:-1]):
                        return
                    continue
                buf += chunk
                while True:
                    nl = buf.find(b"\n")
                    if nl < 0:
                        break
                    line = bytes(buf[:nl])
                    del buf[:nl + 1]
                    if not self._handle(conn, line):
                        return
                if len(buf) > MAX_MESSAGE_BYTES:
                    buf.clear()
                    with self.instrument.bench.cond:
                        self.instrument.errors.push(-223, "message longer than 1 MiB")
        finally:
            self._clients.discard(conn)
            _shutdown(conn)

    def _handle(self, conn: socket.socket, line: bytes) -> bool:
        """Process one message; return False when the connection must close."""
        try:
            return self._answer(conn, line)
        finally:
            try:
                self.instrument.after_message()
            except Exception:  # a bug in the model must not kill the server
                log.exception("simulated %s: work after %r failed", self.instrument.role, line)

    def _answer(self, conn: socket.socket, line: bytes) -> bool:
        if line.endswith(b"\r"):
            line = line[:-1]
        text = line.decode("latin-1")
        self._log.append(text)  # deque.append is atomic
        f = self.faults
        armed = self._armed
        if armed:
            with self._flock:
                if f.stall:
                    return True
                if f.drop_after is not None:
                    if f.drop_after <= 0:
                        f.drop_after = None
                        return False
                    f.drop_after -= 1
        try:
            out, blocks = self.instrument.execute(text)
        except Exception:  # a bug in a handler must not kill the server
            log.exception("simulated %s: handler failed on %r", self.instrument.role, text)
            with self.instrument.bench.cond:
                self.instrument.errors.push(-300, "internal error of the simulated instrument")
            return True
        if out is None:
            return True
        if not blocks and not armed:
            try:
                conn.sendall((out + "\n").encode("latin-1"))
            except OSError:
                return False
            return True
        parts = self._parts(out, blocks)
        delay, truncate = 0.0, False
        if armed:
            with self._flock:
                if f.delay_count > 0:
                    f.delay_count -= 1
                    delay = f.delay_s
                truncate = f.truncate_count > 0
                if truncate:
                    f.truncate_count -= 1
        if delay:
            self._stop.wait(delay)
        if truncate:
            whole = b"".join(bytes(p) for p in parts)
            parts = [whole[: max(len(whole) // 2, 1)]]
        try:
            _send_parts(conn, parts)
        except OSError:
            return False
        return True

    def _parts(self, out: str, blocks: list[memoryview]) -> list:
        if not blocks:
            return [(out + "\n").encode("latin-1")]
        pieces = out.split(BLOCK_MARK)
        parts: list = []
        for i, text in enumerate(pieces):
            if text:
                parts.append(text.encode("latin-1"))
            if i < len(blocks):
                parts.append(self._maybe_corrupt(blocks[i]))
        parts.append(b"\n")
        return parts

    def _maybe_corrupt(self, block: memoryview):
        f = self.faults
        if not self._armed:
            return block
        with self._flock:
            if f.corrupt_count <= 0:
                return block
            f.corrupt_count -= 1
            mode = f.corrupt_mode
        raw = bytes(block)
        if mode == "garbage":
            return b"#X" + raw[2:]
        ndig = int(chr(raw[1]))
        length = int(raw[2:2 + ndig])
        wrong = str(max(length // 2, 1)).rjust(ndig, "0")[-ndig:]
        return raw[:2] + wrong.encode() + raw[2 + ndig:]


def _send_parts(conn: socket.socket, parts: list) -> None:
    """Send the pieces of one reply with one gathering ``sendmsg`` (so the client wakes
    once, not once per piece); what the kernel did not take goes with ``sendall``."""
    sent = conn.sendmsg(parts)
    for p in parts:
        n = len(p)
        if sent >= n:
            sent -= n
            continue
        conn.sendall(memoryview(p)[sent:])
        sent = 0


def _shutdown(conn: socket.socket) -> None:
    try:
        conn.shutdown(socket.SHUT_RDWR)
    except OSError:
        pass
    try:
        conn.close()
    except OSError:
        pass


def wait_port(host: str, port: int, *, timeout_s: float = 2.0) -> None:
    """Wait until a server accepts connections (used by tests and the CLI)."""
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            with socket.create_connection((host, port), timeout=0.2):
                return
        except OSError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.01)
