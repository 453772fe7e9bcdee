"""The SCPI core behind a real 127.0.0.1 socket, driven by pyvisa-py as the reference client.

A minimal line server (in this file) runs a :class:`CommandTree`; pyvisa's own writers and
readers (``write_binary_values``, ``query_binary_values``, ``query_ascii_values``) must
agree with our block and list encodings byte for byte.
"""

from __future__ import annotations

import socket
import socketserver
import threading

import numpy as np
import pytest

from benchctl.scpi import (
    CommandTree,
    ErrorQueue,
    decode_block,
    encode_block,
    format_list,
    format_nr3,
    format_string,
    parse_error_response,
    parse_response_list,
    parse_response_number,
    parse_response_string,
)

MAX_LINE = 1 << 20
MAX_MESSAGES = 1000  # per connection: every loop in a test is bounded


class _State:
    def __init__(self) -> None:
        self.volt = {1: 0.0, 2: 0.0}
        self.curr = 0.1
        self.codes = np.zeros(0, dtype=np.int16)
        self.lock = threading.Lock()


def _tree() -> CommandTree:
    t = CommandTree()

    def set_volt(c):
        c.expect(1)
        c.context.volt[c.suffix] = c.numeric(0, unit="V", minimum=0.0, maximum=30.0)

    def set_curr(c):
        c.expect(1)
        c.context.curr = c.numeric(0, unit="A", minimum=0.0, maximum=3.0)

    def set_trace(c):
        c.expect(1)
        c.context.codes = np.frombuffer(c.block(0), dtype=">i2").astype(np.int16)

    t.add("[SOURce#]:VOLTage[:LEVel][:IMMediate][:AMPLitude]", set=set_volt,
          query=lambda c: format_nr3(c.context.volt[c.suffix]))
    t.add("[SOURce#]:CURRent[:LEVel][:IMMediate][:AMPLitude]", set=set_curr,
          query=lambda c: format_nr3(c.context.curr))
    t.add("TRACe[:DATA]", set=set_trace, query=lambda c: encode_block(c.context.codes))
    t.add("TRACe:ASCii", query=lambda c: format_list(c.context.codes / 256.0))
    t.add("*IDN", query=lambda c: "benchctl,LOOPBACK-TEST,0,0")
    t.add("SYSTem:ERRor[:NEXT]", query=lambda c: c.errors.format_next())
    t.add("DISPlay:TEXT", set=lambda c: None, query=lambda c: format_string('say "hi"'))
    return t


class _Handler(socketserver.StreamRequestHandler):
    def handle(self) -> None:
        server = self.server
        self.connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        for _ in range(MAX_MESSAGES):
            line = self.rfile.readline(MAX_LINE)
            if not line:
                return
            with server.state.lock:  # type: ignore[attr-defined]
                out = server.tree.execute_bytes(  # type: ignore[attr-defined]
                    line, context=server.state, errors=server.errors  # type: ignore[attr-defined]
                )
            if out is not None:
                self.wfile.write(out + b"\n")


class _Server(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True


@pytest.fixture
def loopback():
    server = _Server(("127.0.0.1", 0), _Handler)
    server.tree = _tree()
    server.state = _State()
    server.errors = ErrorQueue()
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05},
                              daemon=True)
    thread.start()
    try:
        yield server
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=5)


def _open(visa, server):
    port = server.server_address[1]
    return visa(f"TCPIP::127.0.0.1::{port}::SOCKET", timeout_ms=2000)


def test_queries_and_compound_messages(loopback, visa) -> None:
    inst = _open(visa, loopback)
    assert inst.query("*IDN?") == "benchctl,LOOPBACK-TEST,0,0"
    inst.write("SOUR2:VOLT 250 mV;CURR 500MA")
    assert parse_response_number(inst.query("SOUR2:VOLT?")) == 0.25
    assert parse_response_number(inst.query(":SOUR2:CURR?")) == 0.5
    assert parse_response_string(inst.query("DISP:TEXT?")) == 'say "hi"'
    inst.write("BOGUS:HEADER 1")
    assert parse_error_response(inst.query("SYST:ERR?")) == (-113, "Undefined header;BOGUS:HEADER")
    assert parse_error_response(inst.query("SYST:ERR?")) == (0, "No error")


def test_blocks_agree_with_pyvisa_reader_and_writer(loopback, visa) -> None:
    inst = _open(visa, loopback)
    # Codes whose bytes include 0x0A (NL) and 0x3B (';'): the reply block must be read by
    # its declared length, not cut at a termination character.
    rng = np.random.default_rng(7)
    codes = np.concatenate([[0x0A0A, 0x3B0A, -1, 10], rng.integers(-32768, 32767, 4000)])
    codes = codes.astype(np.int16)
    loopback.state.codes = codes
    # Reference reader: pyvisa's query_binary_values (IEEE header, big-endian int16).
    got = inst.query_binary_values("TRAC?", datatype="h", is_big_endian=True,
                                   container=np.array)
    np.testing.assert_array_equal(got, codes)
    # Reference writer: pyvisa's write_binary_values; the program block is parsed by our
    # lexer. The line server splits at NL, so these values avoid 0x0A bytes.
    sent = np.array([1, -2, 300, -32768, 32767, 0x3B3B], dtype=np.int16)
    assert 0x0A not in sent.astype(">i2").tobytes()
    inst.write_binary_values("TRAC ", sent, datatype="h", is_big_endian=True)
    assert parse_error_response(inst.query("SYST:ERR?"))[0] == 0
    np.testing.assert_array_equal(loopback.state.codes, sent)
    # Our decoder on the raw reply bytes gives the same as pyvisa's reader.
    inst.write("TRAC?")
    raw = inst.read_raw()
    np.testing.assert_array_equal(decode_block(raw, dtype="int16"), sent)


def test_ascii_list_agrees_with_pyvisa(loopback, visa) -> None:
    inst = _open(visa, loopback)
    codes = np.arange(-128, 128, dtype=np.int16) * 256
    loopback.state.codes = codes
    # Reference: pyvisa's query_ascii_values (float conversion of each element).
    ref = inst.query_ascii_values("TRAC:ASC?", container=np.array)
    np.testing.assert_allclose(ref, codes / 256.0, rtol=0, atol=0)
    ours = parse_response_list(inst.query("TRAC:ASC?"))
    np.testing.assert_array_equal(np.array(ours), ref)
