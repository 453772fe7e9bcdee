"""Transport: typed errors for faults, the fast block path, TCP_NODELAY, retries, logging.

Each test talks pyvisa-py over a real 127.0.0.1 socket to a small scripted server that
misbehaves on purpose (stall, drop, corrupt blocks). Every wait is bounded by a timeout.
"""

from __future__ import annotations

import logging
import socket
import threading
import time
from collections.abc import Callable

import numpy as np
import pytest
from pyvisa import constants, util

from benchctl.drivers.transport import open_resource, resource_shape_ok
from benchctl.errors import ConnectionLost, InstrumentTimeout, ProtocolError
from benchctl.scpi import encode_block

Reply = Callable[[bytes, int], bytes | None]  # (message, index) -> reply bytes, None = no reply


class ScriptServer:
    """TCP server on 127.0.0.1 whose replies come from ``script``.

    ``script`` returns the bytes to send for each received line, None to send nothing, or
    the string "close" to drop the connection.
    """

    def __init__(self, script: Callable[[bytes, int], bytes | str | None]) -> None:
        self.script = script
        self.sock = socket.create_server(("127.0.0.1", 0))
        self.sock.settimeout(0.1)
        self.port = self.sock.getsockname()[1]
        self.received: list[bytes] = []
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self.thread = threading.Thread(target=self._serve, daemon=True)

    @property
    def resource(self) -> str:
        return f"TCPIP::127.0.0.1::{self.port}::SOCKET"

    def _serve(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self.sock.accept()
            except OSError:
                continue
            threading.Thread(target=self._connection, args=(conn,), daemon=True).start()

    def _connection(self, conn: socket.socket) -> None:
        with conn:
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            conn.settimeout(0.1)
            buf = b""
            while not self._stop.is_set():
                try:
                    data = conn.recv(65536)
                except TimeoutError:
                    continue
                except OSError:
                    return
                if not data:
                    return
                buf += data
                while b"\n" in buf:
                    line, buf = buf.split(b"\n", 1)
                    with self._lock:
                        self.received.append(line)
                        index = len(self.received) - 1
                    out = self.script(line, index)
                    if out == "close":
                        return
                    if out is not None:
                        conn.sendall(out)

    def __enter__(self) -> ScriptServer:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self.thread.join(timeout=2.0)
        self.sock.close()


def _echo_idn(line: bytes, i: int) -> bytes | None:
    return b"Testworks,SCRIPT,0001,1.0\n" if line.strip() == b"*IDN?" else None


def test_query_and_nodelay_on_the_socket() -> None:
    with ScriptServer(_echo_idn) as server, open_resource(server.resource, timeout_s=1.0) as tr:
        assert tr.query("*IDN?") == "Testworks,SCRIPT,0001,1.0"
        assert tr.nodelay is True
        sock = tr._session.interface  # the pyvisa-py session's socket (see pyvisa_py/tcpip.py)
        assert sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) == 1


def test_refused_port_surfaces_at_first_io_as_connection_lost() -> None:
    probe = socket.create_server(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()  # nobody listens there now
    t0 = time.monotonic()
    try:
        tr = open_resource(f"TCPIP::127.0.0.1::{port}::SOCKET", timeout_s=0.5)
    except ConnectionLost:
        return  # some systems refuse at connect time already; that is fine too
    with tr, pytest.raises(ConnectionLost) as info:
        tr.query("*IDN?")
    assert f"::{port}::" in str(info.value)
    assert time.monotonic() - t0 < 3.0


def test_stalled_instrument_is_a_timeout_within_the_timeout() -> None:
    with ScriptServer(lambda line, i: None) as server, open_resource(server.resource, timeout_s=0.3) as tr:
        t0 = time.monotonic()
        with pytest.raises(InstrumentTimeout) as info:
            tr.query("MEASure:VOLTage?")
        elapsed = time.monotonic() - t0
        assert 0.25 <= elapsed < 1.5
        assert info.value.command == "MEASure:VOLTage?"
        assert info.value.timeout_s == pytest.approx(0.3)


def test_dropped_connection_is_connection_lost() -> None:
    with ScriptServer(lambda line, i: "close") as server, open_resource(server.resource, timeout_s=3.0) as tr:
        t0 = time.monotonic()
        with pytest.raises(ConnectionLost):
            tr.query("*IDN?")
        assert time.monotonic() - t0 < 1.5  # seen when the peer closes, not at the timeout
        with pytest.raises(ConnectionLost):  # the socket stays dead: keep saying so
            for _ in range(3):
                tr.write("*CLS")
                time.sleep(0.05)


def test_retry_after_timeout_for_idempotent_queries() -> None:
    # First query is ignored (as if lost); the resend is answered.
    def script(line: bytes, i: int) -> bytes | None:
        return None if i == 0 else b"+4.99E+00\n"

    with ScriptServer(script) as server, open_resource(server.resource, timeout_s=0.2) as tr:
        assert tr.query("MEASure:VOLTage?", retries=1) == "+4.99E+00"
        assert tr.stats.retries == 1
        assert len(server.received) == 2


def _block_server(payload: bytes, *, declared: int | None = None, tail: bytes = b"\n"):
    header_len = len(payload) if declared is None else declared
    digits = str(header_len).encode()
    block = b"#" + str(len(digits)).encode() + digits + payload + tail

    def script(line: bytes, i: int) -> bytes | None:
        if line.startswith(b"TRACe:DATA?"):
            return block
        if line.strip() == b"*IDN?":
            return b"Testworks,SCRIPT,0001,1.0\n"
        return None

    return ScriptServer(script)


def test_read_block_matches_pyvisa_ieee_block_decoder() -> None:
    rng = np.random.default_rng(11)
    codes = rng.integers(-128, 128, 200_000, dtype=np.int16) * 256
    codes[::97] = 0x0A0A  # plenty of termination bytes inside the payload
    payload = codes.astype(">i2").tobytes()
    assert payload.count(b"\n") > 1000
    with _block_server(payload) as server, open_resource(server.resource, timeout_s=2.0) as tr:
        got = tr.read_block("TRACe:DATA? CH1", expected_bytes=len(payload))
        assert got == payload
        # reference: pyvisa's own IEEE 488.2 block decoder on the same bytes
        block = encode_block(payload)
        ref = util.from_ieee_block(block, datatype="h", is_big_endian=True, container=np.array)
        np.testing.assert_array_equal(np.frombuffer(got, dtype=">i2"), ref)
        # termination character and receive chunk are back for text replies
        assert tr._res.get_visa_attribute(constants.ResourceAttribute.termchar_enabled)
        assert tr.query("*IDN?").startswith("Testworks")


def test_block_longer_than_its_payload_is_a_protocol_error() -> None:
    payload = bytes(range(256)) * 4
    with _block_server(payload, declared=len(payload) + 100) as server, open_resource(server.resource, timeout_s=0.3) as tr:
        t0 = time.monotonic()
        with pytest.raises(ProtocolError, match="shorter than its declared"):
            tr.read_block("TRACe:DATA? CH1")
        assert time.monotonic() - t0 < 2.0
        # state restored after the failure (a one-off termination change would stay set)
        assert tr._res.get_visa_attribute(constants.ResourceAttribute.termchar_enabled)
        assert tr._session.max_recv_size == 64 * 1024
        assert tr.query("*IDN?").startswith("Testworks")


def test_block_shorter_than_its_payload_is_a_protocol_error() -> None:
    payload = b"\x01\x02" * 500
    with _block_server(payload, declared=len(payload) - 10) as server, open_resource(server.resource, timeout_s=0.5) as tr:
        with pytest.raises(ProtocolError, match="not followed by the terminator"):
            tr.read_block("TRACe:DATA? CH1")
        assert tr.query("*IDN?").startswith("Testworks")


def test_block_length_disagreeing_with_scaling_is_a_protocol_error() -> None:
    payload = b"\x00" * 100
    with _block_server(payload) as server, open_resource(server.resource, timeout_s=0.5) as tr:
        with pytest.raises(ProtocolError, match="expected 200"):
            tr.read_block("TRACe:DATA? CH1", expected_bytes=200)


def test_reply_that_is_not_a_block() -> None:
    def script(line: bytes, i: int) -> bytes | None:
        return b"-222,\"Data out of range\"\n"

    with ScriptServer(script) as server, open_resource(server.resource, timeout_s=0.5) as tr:
        with pytest.raises(ProtocolError, match="not a block"):
            tr.read_block("TRACe:DATA? CH1")


def test_every_exchange_is_logged_with_its_duration(caplog: pytest.LogCaptureFixture) -> None:
    with ScriptServer(_echo_idn) as server, open_resource(server.resource, timeout_s=1.0) as tr:
        with caplog.at_level(logging.DEBUG, logger="benchctl.drivers.transport"):
            tr.query("*IDN?")
            tr.write("*CLS")
    lines = [r.getMessage() for r in caplog.records if r.name == "benchctl.drivers.transport"]
    assert any("'*IDN?'" in m and "Testworks" in m and " ms)" in m for m in lines)
    assert any("'*CLS'" in m and " ms)" in m for m in lines)


@pytest.mark.parametrize(
    ("resource", "ok"),
    [
        # shapes from the VISA resource-name grammar (IVI VPP-4.3, from memory)
        ("TCPIP::127.0.0.1::5025::SOCKET", True),
        ("TCPIP0::192.168.1.20::inst0::INSTR", True),
        ("GPIB0::12::INSTR", True),
        ("USB0::0x1234::0x5678::SN001::INSTR", True),
        ("ASRL/dev/ttyUSB0::INSTR", True),
        ("TCPIP::127.0.0.1::port::SOCKET", False),
        ("127.0.0.1:5025", False),
        ("", False),
    ],
)
def test_resource_shapes(resource: str, ok: bool) -> None:
    assert resource_shape_ok(resource) is ok


def test_late_reply_after_a_timeout_does_not_answer_the_next_query() -> None:
    # The first reply comes 0.4 s late (after the 0.2 s timeout); the next query must get
    # its own answer, not the stale one.
    def script(line: bytes, i: int) -> bytes | None:
        if i == 0:
            time.sleep(0.4)
            return b"STALE\n"
        return b"FRESH %d\n" % i

    with ScriptServer(script) as server, open_resource(server.resource, timeout_s=0.2) as tr:
        with pytest.raises(InstrumentTimeout):
            tr.query("MEASure:VOLTage?")
        time.sleep(0.6)  # the stale reply arrives meanwhile
        assert tr.query("MEASure:CURRent?") == "FRESH 1"


def test_block_fallback_through_pyvisa_gives_the_same_bytes(monkeypatch: pytest.MonkeyPatch) -> None:
    # When the pyvisa-py socket cannot be reached, the payload is read through pyvisa with
    # the termination character off; both paths must agree byte for byte.
    payload = (np.arange(50_000, dtype=">i2") * 7).tobytes()
    with _block_server(payload) as server, open_resource(server.resource, timeout_s=2.0) as tr:
        fast = tr.read_block("TRACe:DATA? CH1", expected_bytes=len(payload))
        monkeypatch.setattr(tr, "_read_payload", lambda n, msg: tr._read_payload_visa(n, msg))
        slow = tr.read_block("TRACe:DATA? CH1", expected_bytes=len(payload))
        assert bytes(fast) == bytes(slow) == payload
        assert tr._res.get_visa_attribute(constants.ResourceAttribute.termchar_enabled)


def test_text_then_block_in_one_reply() -> None:
    # Response units of one compound query are joined by ';' (IEEE 488.2-1992 8.4, from memory)
    payload = bytes(range(256)) * 40
    block = encode_block(payload)

    def script(line: bytes, i: int) -> bytes | None:
        if line == b"TRACe:SCALing? CH1;:TRACe:DATA? CH1":
            return b"10240,1.0E-06,0,1.0E-03,0;" + block + b"\n"
        if line == b"TRACe:DATA? CH1":
            return block + b"\n"  # the text unit is missing
        return b"Testworks,SCRIPT,0001,1.0\n"

    seen: list[str] = []

    def expected(text: str) -> int:
        seen.append(text)
        return int(text.split(",")[0])

    with ScriptServer(script) as server, open_resource(server.resource, timeout_s=0.5) as tr:
        got = tr.read_block("TRACe:SCALing? CH1;:TRACe:DATA? CH1", prefix=expected)
        assert bytes(got) == payload and seen == ["10240,1.0E-06,0,1.0E-03,0"]
        with pytest.raises(ProtocolError, match="expected '<text>;<block>'"):
            tr.read_block("TRACe:DATA? CH1", prefix=expected)
        assert tr.query("*IDN?").startswith("Testworks")  # drained, in step again


def test_everything_works_through_plain_pyvisa_too(monkeypatch: pytest.MonkeyPatch) -> None:
    # The socket fast paths rely on pyvisa-py internals; without them every exchange goes
    # through pyvisa's own API and must give the same answers and the same typed errors.
    payload = (np.arange(30_000, dtype=">i2") * 3).tobytes()
    with _block_server(payload) as server, open_resource(server.resource, timeout_s=0.5) as tr:
        monkeypatch.setattr(tr, "_socket_path", lambda: None)
        monkeypatch.setattr(tr, "_sock", None)
        assert tr.query("*IDN?") == "Testworks,SCRIPT,0001,1.0"
        assert bytes(tr.read_block("TRACe:DATA? CH1", expected_bytes=len(payload))) == payload
        assert tr._res.get_visa_attribute(constants.ResourceAttribute.termchar_enabled)
        with pytest.raises(InstrumentTimeout):
            tr.query("MEASure:VOLTage?")  # the script does not answer it
        assert tr.query("*IDN?").startswith("Testworks")
