"""Message transport to one instrument: the only module of benchctl that imports pyvisa.

Everything pyvisa or the operating system raises is converted here, in one place, into the
project's exception tree (:mod:`benchctl.errors`):

* a VISA timeout -> :class:`~benchctl.errors.InstrumentTimeout` (or
  :class:`~benchctl.errors.ConnectionLost` when the peer turns out to have closed the socket),
* a refused, reset or closed connection (pyvisa-py raises plain :class:`OSError`) ->
  :class:`~benchctl.errors.ConnectionLost`,
* a malformed binary block or undecodable reply -> :class:`~benchctl.errors.ProtocolError`.

Times are seconds everywhere in benchctl; pyvisa's milliseconds appear only in this module.

Notes
-----
Facts of pyvisa 1.16 / pyvisa-py 0.8 on SOCKET resources that shape this module (measured
on loopback by the project, see benchmarks/bench_drivers.py):

* Nagle's algorithm plus delayed ACK make a write followed by a query cost ~40 ms. pyvisa-py
  refuses ``VI_ATTR_TCPIP_NODELAY`` on SOCKET sessions, so the option is set on the session's
  socket object directly (guarded: if the socket cannot be found, nothing breaks, it is
  only slower).
* With the termination character enabled, every read stops at each 0x0A byte, which makes
  binary blocks slow. :meth:`Transport.read_block` reads the IEEE 488.2 header, then exactly
  the declared byte count: straight from the session's socket into one buffer
  (``recv_into``, after what pyvisa-py already buffered), or, when the socket cannot be
  reached, through pyvisa with the termination character off and a large receive chunk,
  both restored in ``finally``.
* Messages go out with one ``sendall`` on that socket (pyvisa-py sends 4 KiB pieces with a
  ``select`` before each); replies to text queries are read through pyvisa.
* A dropped peer does not raise on read under pyvisa-py: the read spins until the timeout.
  After a timeout the socket is probed; a closed peer becomes ConnectionLost. A reply that
  comes after its timeout is dropped before the next exchange (the session is drained).

References
----------
IEEE 488.2-1992, section 8.7.9 (definite length arbitrary block response data).
"""

from __future__ import annotations

import logging
import re
import select
import socket
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass

import pyvisa
from pyvisa import constants
from pyvisa.errors import InvalidBinaryFormat, VisaIOError

from benchctl.errors import ConnectionLost, InstrumentTimeout, ProtocolError, shorten

__all__ = ["Transport", "open_resource", "list_resources", "resource_shape_ok"]

logger = logging.getLogger(__name__)

#: Receive chunk of the pyvisa-py socket session while the termination character is on.
#: pyvisa-py rescans its pending buffer after each chunk; 20-256 KiB is the sweet spot.
TEXT_CHUNK_BYTES = 64 * 1024
#: Receive chunk while reading the payload of a binary block (termination off).
BLOCK_CHUNK_BYTES = 1024 * 1024
#: Quiet time that ends a drain before a retry, and before the first exchange after a timeout, s.
RETRY_QUIET_S = 0.1
RESYNC_QUIET_S = 0.02

_RESOURCE_RE = re.compile(
    r"^(?:"
    r"TCPIP\d*::[A-Za-z0-9_.\-]+::\d{1,5}::SOCKET"
    r"|TCPIP\d*::[A-Za-z0-9_.\-]+(?:::[A-Za-z0-9_,.\-\[\]]+)?(?:::INSTR)?"
    r"|GPIB\d*::\d{1,2}(?:::\d{1,2})?(?:::INSTR)?"
    r"|ASRL[A-Za-z0-9/_.\-]+(?:::INSTR)?"
    r"|USB\d*::(?:0x[0-9A-Fa-f]+|\d+)::(?:0x[0-9A-Fa-f]+|\d+)::[A-Za-z0-9_.\-]+(?:::\d+)?(?:::INSTR)?"
    r"|[A-Za-z][A-Za-z0-9_]*"  # a VISA alias
    r")$",
    re.IGNORECASE,
)


def resource_shape_ok(resource: str) -> bool:
    """Return True if ``resource`` has the shape of a VISA resource string (or an alias).

    The shapes follow the VISA resource-name grammar (IVI VPP-4.3, section 4.3.1.1, from
    memory): ``TCPIP[board]::host::port::SOCKET``, ``TCPIP[board]::host[::device]::INSTR``,
    ``GPIB[board]::primary[::secondary]::INSTR``, ``ASRL<port>::INSTR`` and
    ``USB[board]::vendor::product::serial[::interface]::INSTR``.
    """
    return bool(_RESOURCE_RE.match(resource.strip()))


_MANAGERS: dict[str, pyvisa.ResourceManager] = {}


def _manager(visa_library: str) -> pyvisa.ResourceManager:
    """Return a cached ResourceManager for ``visa_library`` ("@py" = pyvisa-py).

    pyvisa gives every caller the same manager per library; if any code closed it, a new
    one is opened rather than failing every later open with "Invalid session handle".
    """
    rm = _MANAGERS.get(visa_library)
    if rm is not None:
        try:
            rm.session  # noqa: B018 - raises once someone closed the shared manager
        except pyvisa.errors.InvalidSession:
            rm = None
    if rm is None:
        try:
            rm = pyvisa.ResourceManager(visa_library)
        except (OSError, ValueError, VisaIOError) as exc:
            raise ConnectionLost(f"cannot load VISA library {visa_library!r}: {exc}") from exc
        _MANAGERS[visa_library] = rm
    return rm


def list_resources(*, visa_library: str = "@py", query: str = "?*::INSTR") -> tuple[str, ...]:
    """Return the resource strings the VISA library can list (SOCKET resources never appear).

    Note that pyvisa-py looks for TCPIP instruments with a broadcast on the local network.
    """
    rm = _manager(visa_library)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            found = tuple(rm.list_resources(query))
        for w in caught:  # the backend's hints about optional packages: log, do not print
            logger.info("listing resources: %s", w.message)
        return found
    except VisaIOError as exc:
        if exc.error_code == constants.StatusCode.error_resource_not_found:
            return ()
        raise ConnectionLost(f"listing resources failed: {exc}") from exc
    except (OSError, ValueError) as exc:
        raise ConnectionLost(f"listing resources failed: {exc}") from exc


@dataclass
class ExchangeStats:
    """Counters of one transport, for diagnostics and benchmarks."""

    writes: int = 0
    queries: int = 0
    blocks: int = 0
    block_bytes: int = 0
    retries: int = 0


class Transport:
    """One open message-based VISA session, with errors converted to benchctl's tree.

    Use :func:`open_resource` to make one. Every exchange is logged at debug level with its
    duration on the ``benchctl.drivers.transport`` logger.
    """

    def __init__(self, resource: object, name: str, *, timeout_s: float) -> None:
        self._res = resource
        self.resource = name
        self._timeout_s = float(timeout_s)
        self.stats = ExchangeStats()
        self._session = _pyvisa_py_session(resource)
        sock = getattr(self._session, "interface", None)
        # Messages go out with one sendall on the session's socket when it can be reached
        # (pyvisa-py writes in 4 KiB pieces with a select() before each); replies are read
        # through pyvisa, which owns the receive buffer.
        self._sock: socket.socket | None = sock if isinstance(sock, socket.socket) else None
        self._wterm = str(getattr(resource, "write_termination", "\n") or "")
        self._rterm = str(getattr(resource, "read_termination", "\n") or "\n").encode("ascii")
        self._encoding = str(getattr(resource, "encoding", "ascii") or "ascii")
        self.nodelay = _set_nodelay(self._session)
        if self._session is not None and hasattr(self._session, "max_recv_size"):
            self._session.max_recv_size = TEXT_CHUNK_BYTES
        self._closed = False
        self._dirty = False  # a reply may be late: drain before the next exchange

    # ------------------------------------------------------------------ properties
    @property
    def timeout_s(self) -> float:
        """I/O timeout, s."""
        return self._timeout_s

    @timeout_s.setter
    def timeout_s(self, value_s: float) -> None:
        if not value_s > 0:
            raise ValueError(f"{value_s=} must be > 0")
        self._timeout_s = float(value_s)
        self._res.timeout = value_s * 1000.0  # pyvisa wants milliseconds

    @property
    def closed(self) -> bool:
        """True once :meth:`close` ran."""
        return self._closed

    # ------------------------------------------------------------------ exchanges
    def write(self, message: str) -> None:
        """Send one program message (the write termination is appended)."""
        if self._dirty:
            self._resync()
        t0 = time.perf_counter()
        try:
            self._send(message)
        except (VisaIOError, OSError, UnicodeError) as exc:
            raise self._convert(exc, message) from exc
        self.stats.writes += 1
        if logger.isEnabledFor(logging.DEBUG):
            logger.debug("%s <- %r (%.3f ms)", self.resource, message, 1e3 * (time.perf_counter() - t0))

    def query(self, message: str, *, retries: int = 0) -> str:
        """Send a query and return its reply, termination stripped.

        Parameters
        ----------
        message : str
            The program message; it must contain a query.
        retries : int
            How many times to resend after a timeout. Only for idempotent queries: before a
            resend the input is drained so a late reply cannot answer the next question.

        Raises
        ------
        InstrumentTimeout, ConnectionLost, ProtocolError
        """
        attempt = 0
        while True:
            if self._dirty:
                self._resync()
            t0 = time.perf_counter()
            try:
                self._send(message)
                reply = self._read_line(message)
            except (VisaIOError, OSError, UnicodeError) as exc:
                err = self._convert(exc, message)
                if isinstance(err, InstrumentTimeout) and attempt < retries:
                    attempt += 1
                    self.stats.retries += 1
                    logger.info("%s: retry %d of %r after timeout", self.resource, attempt, message)
                    self.drain(quiet_s=RETRY_QUIET_S)
                    continue
                raise err from exc
            self.stats.queries += 1
            if logger.isEnabledFor(logging.DEBUG):
                logger.debug(
                    "%s <- %r -> %r (%.3f ms)",
                    self.resource,
                    message,
                    shorten(reply),
                    1e3 * (time.perf_counter() - t0),
                )
            return reply

    def _read_line(self, message: str) -> str:
        """Read one reply up to the read termination and return it without it.

        Through the session's socket when it can be reached (taking what pyvisa-py already
        buffered first; anything after the terminator stays buffered for the next read),
        otherwise through pyvisa. A peer that closes the connection is ConnectionLost at
        once, not after the timeout.
        """
        path = self._socket_path()
        if path is None:
            return self._res.read()
        sock, pending = path
        term = self._rterm
        deadline = time.monotonic() + self._timeout_s
        start = 0
        while True:
            cut = pending.find(term, start)
            if cut >= 0:
                line = bytes(pending[:cut])
                del pending[: cut + len(term)]
                return line.decode(self._encoding)
            start = max(len(pending) - len(term) + 1, 0)
            remaining_s = deadline - time.monotonic()
            if remaining_s <= 0:
                pending.clear()  # a partial reply is useless; a late rest is drained later
                raise VisaIOError(constants.StatusCode.error_timeout)
            ready, _, _ = select.select([sock], [], [], remaining_s)
            if ready:
                chunk = sock.recv(TEXT_CHUNK_BYTES)
                if not chunk:
                    raise ConnectionResetError("connection closed by the instrument")
                pending += chunk

    def _send(self, message: str) -> None:
        if self._sock is not None:
            self._sock.sendall((message + self._wterm).encode(self._encoding))
        else:
            self._res.write(message)

    def read_block(
        self,
        message: str,
        *,
        expected_bytes: int | None = None,
        prefix: Callable[[str], int | None] | None = None,
        prefix_units: int = 1,
    ) -> bytes | bytearray:
        """Send ``message`` and read its IEEE 488.2 definite-length block reply fast.

        The header ``#<n><length>`` is read, then exactly ``length`` bytes, then the
        trailing terminator. Through the session's socket (pyvisa-py) no termination
        character is involved; through pyvisa it is switched off for the payload and
        restored in ``finally``.

        Parameters
        ----------
        message : str
            The query that returns the block.
        expected_bytes : int or None
            Payload size the caller expects (points x sample width); needed for an
            indefinite ``#0`` block, and checked against a definite block's declared length.
        prefix : callable, optional
            For a compound query whose reply is ``<text>;<block>`` (IEEE 488.2 response
            units joined by ';'): ``prefix(text)`` gets the text and returns the expected
            payload size (or None). Needs :attr:`direct`.
        prefix_units : int
            How many text response units come before the block (``prefix`` then gets them
            all, still joined by ';').

        Returns
        -------
        bytes
            The payload, without header or terminator.

        Raises
        ------
        ProtocolError
            Malformed header, declared length disagreeing with ``expected_bytes``, payload
            shorter than declared, or no terminator after it.
        InstrumentTimeout, ConnectionLost
        """
        t0 = time.perf_counter()
        self.write(message)
        if prefix is not None:
            text = self._read_prefix(message, units=prefix_units)
            expected_bytes = prefix(text)
        head = self._read_exact(2, message)
        if head[:1] != b"#" or not head[1:2].isdigit():
            rest = b"" if head.endswith(b"\n") else self._read_line_quietly()
            self.drain()
            raise ProtocolError(f"{self.resource}: reply to {message!r} is not a block", head + rest)
        ndigits = int(head[1:2])
        if ndigits == 0:
            if expected_bytes is None:
                raise ProtocolError(
                    f"{self.resource}: indefinite block (#0) needs a known length over a socket",
                    head,
                )
            length = expected_bytes
        else:
            digits = self._read_exact(ndigits, message)
            if not digits.isdigit():
                self.drain()
                raise ProtocolError(f"{self.resource}: bad block length in reply to {message!r}", head + digits)
            length = int(digits)
            if expected_bytes is not None and length != expected_bytes:
                self.drain()
                raise ProtocolError(
                    f"{self.resource}: block declares {length} bytes, expected {expected_bytes}",
                    head + digits,
                )
        payload = self._read_payload(length, message)
        tail = self._read_exact(1, message)
        if tail not in (b"\n", b"\r"):
            self.drain()
            raise ProtocolError(
                f"{self.resource}: block of {length} bytes not followed by the terminator", tail
            )
        if tail == b"\r":  # "\r\n" terminated dialects
            self._read_exact(1, message)
        self.stats.blocks += 1
        self.stats.block_bytes += len(payload)
        if logger.isEnabledFor(logging.DEBUG):
            dt_s = time.perf_counter() - t0
            logger.debug(
                "%s <- %r -> block %d B (%.3f ms, %.0f MB/s)",
                self.resource,
                message,
                len(payload),
                1e3 * dt_s,
                len(payload) / max(dt_s, 1e-9) / 1e6,
            )
        return payload

    def drain(self, *, quiet_s: float = 0.05) -> None:
        """Discard anything pending from the instrument (after a timeout or a corrupt reply)."""
        sock = getattr(self._session, "interface", None)
        pending = getattr(self._session, "_pending_buffer", None)
        if isinstance(pending, bytearray):
            pending.clear()
        if sock is None:
            try:
                self._res.clear()
            except (VisaIOError, OSError):
                pass
            return
        deadline = time.monotonic() + max(self._timeout_s, quiet_s)
        try:
            while time.monotonic() < deadline:
                ready, _, _ = select.select([sock], [], [], quiet_s)
                if not ready or not sock.recv(65536):
                    break
        except OSError:
            pass

    def mark_suspect(self) -> None:
        """A reply did not fit its question (maybe a late one): drain before the next exchange."""
        self._dirty = True

    def _resync(self) -> None:
        """After a timeout a late reply may still come: drop whatever arrived meanwhile."""
        self._dirty = False
        self.drain(quiet_s=RESYNC_QUIET_S)

    def close(self) -> None:
        """Close the session; safe to call twice."""
        if self._closed:
            return
        self._closed = True
        try:
            self._res.close()
        except (VisaIOError, OSError) as exc:  # closing a dead socket is not an error
            logger.debug("%s: close: %s", self.resource, exc)

    def __enter__(self) -> Transport:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # ------------------------------------------------------------------ internals
    def _socket_path(self) -> tuple[socket.socket, bytearray] | None:
        """The pyvisa-py session's socket and pending buffer, if they can be reached."""
        sock = getattr(self._session, "interface", None)
        pending = getattr(self._session, "_pending_buffer", None)
        if isinstance(sock, socket.socket) and isinstance(pending, bytearray):
            return sock, pending
        return None

    def _fill(self, path: tuple[socket.socket, bytearray], out: bytearray, message: str) -> None:
        """Fill ``out`` exactly from what pyvisa-py buffered, then from the socket in place.

        Never reads past ``len(out)``, so what follows stays for the next read.

        Raises
        ------
        InstrumentTimeout
            Not enough bytes within the timeout (carries the count received in
            ``.received``).
        ConnectionLost
            The peer closed the connection.
        """
        sock, pending = path
        length = len(out)
        view = memoryview(out)
        got = min(len(pending), length)
        if got:
            view[:got] = pending[:got]
            del pending[:got]
        deadline = time.monotonic() + self._timeout_s
        try:
            while got < length:
                remaining_s = deadline - time.monotonic()
                if remaining_s <= 0:
                    self._dirty = True
                    err = InstrumentTimeout("no complete reply", message, self.resource, self._timeout_s)
                    err.received = got  # type: ignore[attr-defined]
                    raise err
                ready, _, _ = select.select([sock], [], [], remaining_s)
                if not ready:
                    continue
                n = sock.recv_into(view[got:], length - got)
                if n == 0:
                    raise ConnectionLost("connection closed by the instrument", message, self.resource)
                got += n
        except OSError as exc:
            raise self._convert(exc, message) from exc
        finally:
            view.release()

    @property
    def direct(self) -> bool:
        """True if blocks are read straight from the session's socket."""
        return self._socket_path() is not None

    def _read_prefix(self, message: str, *, units: int = 1, limit: int = 4096) -> str:
        """Read the ``units`` text response units before a block, up to the ';' after them.

        Receives in small pieces; whatever follows that ';' goes back into pyvisa-py's
        pending buffer, which every later read takes first.
        """
        path = self._socket_path()
        if path is None:
            raise ProtocolError(f"{self.resource}: a text-then-block reply needs the socket path", message)
        sock, pending = path
        got = bytearray(pending)
        pending.clear()
        deadline = time.monotonic() + self._timeout_s
        try:
            while True:
                # the separator must come before the block starts ('#'): a payload may hold ';'
                mark = got.find(b"#")
                cut = -1
                for _ in range(units):
                    cut = got.find(b";", cut + 1, mark if mark >= 0 else len(got))
                    if cut < 0:
                        break
                if cut >= 0:
                    pending[:0] = got[cut + 1 :]
                    return got[:cut].decode("ascii", errors="replace")
                if mark >= 0 or b"\n" in got or len(got) > limit:
                    pending[:0] = got
                    self.drain()
                    raise ProtocolError(f"{self.resource}: expected '<text>;<block>' in reply to {message!r}", got[:40])
                remaining_s = deadline - time.monotonic()
                if remaining_s <= 0:
                    self._dirty = True
                    raise InstrumentTimeout("no reply", message, self.resource, self._timeout_s)
                ready, _, _ = select.select([sock], [], [], remaining_s)
                if ready:
                    chunk = sock.recv(256)
                    if not chunk:
                        raise ConnectionLost("connection closed by the instrument", message, self.resource)
                    got += chunk
        except OSError as exc:
            raise self._convert(exc, message) from exc

    def _read_exact(self, count: int, message: str) -> bytes:
        path = self._socket_path()
        if path is not None:
            out = bytearray(count)
            self._fill(path, out, message)
            return bytes(out)
        try:
            return bytes(self._res.read_bytes(count))
        except (VisaIOError, OSError) as exc:
            raise self._convert(exc, message) from exc

    def _read_payload(self, length: int, message: str) -> bytes | bytearray:
        """Read exactly ``length`` payload bytes; the termination character plays no part."""
        path = self._socket_path()
        if path is None:
            return self._read_payload_visa(length, message)
        out = bytearray(length)
        try:
            self._fill(path, out, message)
        except InstrumentTimeout as exc:
            self.drain()
            raise ProtocolError(
                f"{self.resource}: block shorter than its declared {length} bytes "
                f"(got {getattr(exc, 'received', '?')} within {self._timeout_s:g} s)",
                message,
            ) from exc
        return out

    def _read_payload_visa(self, length: int, message: str) -> bytes:
        res = self._res
        session = self._session
        old_chunk = getattr(session, "max_recv_size", None)
        try:
            res.set_visa_attribute(constants.ResourceAttribute.termchar_enabled, constants.VI_FALSE)
            if old_chunk is not None:
                session.max_recv_size = BLOCK_CHUNK_BYTES
            try:
                payload = res.read_bytes(length, chunk_size=max(length, 1))
            except (VisaIOError, OSError) as exc:
                err = self._convert(exc, message)
                if isinstance(err, InstrumentTimeout):
                    self.drain()
                    raise ProtocolError(
                        f"{self.resource}: block shorter than its declared {length} bytes "
                        f"(nothing more within {self._timeout_s:g} s)",
                        message,
                    ) from exc
                raise err from exc
        finally:
            try:
                res.set_visa_attribute(constants.ResourceAttribute.termchar_enabled, constants.VI_TRUE)
            except (VisaIOError, OSError):
                pass
            if old_chunk is not None:
                session.max_recv_size = old_chunk
        return bytes(payload)

    def _read_line_quietly(self) -> bytes:
        try:
            return bytes(self._res.read_raw())
        except (VisaIOError, OSError):
            return b""

    def _peer_closed(self) -> bool:
        sock = getattr(self._session, "interface", None)
        if sock is None:
            return False
        try:
            ready, _, _ = select.select([sock], [], [], 0)
            if not ready:
                return False
            return sock.recv(1, socket.MSG_PEEK) == b""
        except OSError:
            return True

    def _convert(self, exc: BaseException, message: str) -> Exception:
        """Map a pyvisa / OS exception to benchctl's tree (the one place this happens)."""
        if isinstance(exc, InvalidBinaryFormat):
            return ProtocolError(f"{self.resource}: malformed binary block: {exc}", message)
        if isinstance(exc, UnicodeDecodeError):
            return ProtocolError(f"{self.resource}: reply is not ASCII text", message)
        if isinstance(exc, UnicodeEncodeError):
            return ProtocolError(f"{self.resource}: command is not ASCII text", message)
        if isinstance(exc, VisaIOError):
            if exc.error_code == constants.StatusCode.error_timeout:
                if self._peer_closed():
                    return ConnectionLost("connection closed by the instrument", message, self.resource)
                self._dirty = True
                return InstrumentTimeout("no reply", message, self.resource, self._timeout_s)
            if exc.error_code in (
                constants.StatusCode.error_connection_lost,
                constants.StatusCode.error_closing_failed,
                constants.StatusCode.error_invalid_object,
                constants.StatusCode.error_io,
            ):
                return ConnectionLost(f"I/O failed ({exc.abbreviation})", message, self.resource)
            return ConnectionLost(f"VISA error {exc.abbreviation}", message, self.resource)
        if isinstance(exc, OSError):
            reason = exc.strerror or type(exc).__name__
            return ConnectionLost(f"socket error: {reason}", message, self.resource)
        return ConnectionLost(f"unexpected transport error: {exc}", message, self.resource)


def _pyvisa_py_session(resource: object) -> object | None:
    """Return the pyvisa-py session object behind ``resource``, or None if not pyvisa-py."""
    try:
        sessions = resource.visalib.sessions  # type: ignore[attr-defined]
        return sessions[resource.session]  # type: ignore[attr-defined]
    except (AttributeError, KeyError, TypeError):
        return None


def _set_nodelay(session: object | None) -> bool:
    """Set TCP_NODELAY on the session's socket if there is one; return True on success."""
    sock = getattr(session, "interface", None)
    if not isinstance(sock, socket.socket):
        return False
    try:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    except OSError:
        return False
    return True


def open_resource(
    resource: str,
    *,
    visa_library: str = "@py",
    timeout_s: float = 2.0,
    read_termination: str = "\n",
    write_termination: str = "\n",
) -> Transport:
    """Open a message-based VISA resource and return a :class:`Transport`.

    Parameters
    ----------
    resource : str
        VISA resource string, e.g. ``"TCPIP::127.0.0.1::5025::SOCKET"``.
    visa_library : str
        pyvisa backend; ``"@py"`` is pyvisa-py.
    timeout_s : float
        I/O timeout, s (converted to pyvisa's milliseconds here and nowhere else).
    read_termination, write_termination : str
        Message terminators. A SOCKET resource needs a read termination, or every read
        waits for the timeout.

    Raises
    ------
    ConnectionLost
        The resource cannot be opened. Note that a SOCKET to a refused port opens fine under
        pyvisa-py; the error comes at the first I/O, so probe with ``*IDN?``.
    """
    if not timeout_s > 0:
        raise ValueError(f"{timeout_s=} must be > 0")
    if not read_termination:
        raise ValueError(f"{read_termination=} must not be empty (reads would never end)")
    rm = _manager(visa_library)
    try:
        res = rm.open_resource(
            resource,
            read_termination=read_termination,
            write_termination=write_termination,
            timeout=timeout_s * 1000.0,
            open_timeout=int(timeout_s * 1000.0),
        )
    except (VisaIOError, OSError, ValueError) as exc:
        raise ConnectionLost(f"cannot open: {exc}", "", resource) from exc
    except Exception as exc:  # pyvisa-py raises a bare Exception when a connect fails
        raise ConnectionLost(f"cannot open: {exc}", "", resource) from exc
    return Transport(res, resource, timeout_s=timeout_s)
