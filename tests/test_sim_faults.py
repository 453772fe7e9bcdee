"""Fault injection of the simulated servers, seen through pyvisa-py and raw sockets."""

from __future__ import annotations

import socket
import time

import numpy as np
import pytest
from pyvisa.errors import VisaIOError

from benchctl.scpi import parse_block_header, parse_error_response
from benchctl.simulated import SimulatedBench, parse_fault


def _hostport(resource: str) -> tuple[str, int]:
    parts = resource.split("::")
    return parts[1], int(parts[2])


def _raw(resource: str, timeout_s: float = 2.0) -> socket.socket:
    s = socket.create_connection(_hostport(resource), timeout=timeout_s)
    s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    return s


def _read_until(sock: socket.socket, n_min: int, deadline_s: float = 2.0) -> bytes:
    buf = bytearray()
    end = time.monotonic() + deadline_s
    while len(buf) < n_min and time.monotonic() < end:  # bounded in time
        try:
            chunk = sock.recv(65536)
        except TimeoutError:
            break
        if not chunk:
            break
        buf += chunk
    return bytes(buf)


def test_drop_after_closes_only_that_connection(sim_bench, visa):
    res = sim_bench.resources["supply"]
    victim, other = visa(res, timeout_ms=500), visa(res)
    sim_bench.inject("supply", "drop_after", n=2)
    assert victim.query("*IDN?").startswith("benchctl")
    assert victim.query("*OPC?") == "1"
    # pyvisa-py surfaces a closed socket as a VisaIOError or a plain OSError
    with pytest.raises((VisaIOError, OSError)):
        victim.query("*IDN?")
    assert other.query("*OPC?") == "1"  # the fault is one-shot; the others go on
    assert visa(res).query("*IDN?").startswith("benchctl")


def test_delay_beyond_client_timeout(sim_bench, visa):
    inst = visa(sim_bench.resources["generator"], timeout_ms=300)
    sim_bench.inject("generator", "delay", seconds=0.8, count=1)
    t0 = time.monotonic()
    with pytest.raises(VisaIOError):
        inst.query("*IDN?")
    assert time.monotonic() - t0 < 0.75
    time.sleep(0.6)  # the late reply arrives; drop it
    late = inst.read()  # the late *IDN? reply is still in the pipe
    assert late.startswith("benchctl")
    assert inst.query("*OPC?") == "1"  # count=1: the next reply is on time


def test_truncated_reply_loses_half_and_terminator(sim_bench):
    sock = _raw(sim_bench.resources["scope"], timeout_s=0.3)
    with sock:
        sock.sendall(b"*IDN?\n")
        full = _read_until(sock, 10)
        assert full.endswith(b"\n")
        sim_bench.inject("scope", "truncate", count=1)
        sock.sendall(b"*IDN?\n")
        cut = _read_until(sock, len(full), deadline_s=0.5)
        assert cut == full[: len(full) // 2] and not cut.endswith(b"\n")


@pytest.mark.parametrize("mode", ["length", "garbage"])
def test_corrupt_block(sim_bench, mode):
    sup = _raw(sim_bench.resources["supply"])
    sock = _raw(sim_bench.resources["scope"])
    with sup, sock:
        sup.sendall(b"VOLT 5;:OUTP ON;*OPC?\n")
        assert _read_until(sup, 2) == b"1\n"
        sock.sendall(b"SENS:SWE:POIN 1000;:FORM INT,16;:INIT;*OPC?\n")
        assert _read_until(sock, 2) == b"1\n"
        sim_bench.inject("scope", "corrupt_block", count=1, mode=mode)
        sock.sendall(b"TRAC? CH1\n")
        bad = _read_until(sock, 2000 + 7)
        sock.sendall(b"TRAC? CH1\n")
        good = _read_until(sock, 2000 + 7)
    head, length = parse_block_header(good)
    assert length == 2000 and len(good) == head + length + 1
    if mode == "length":  # the declared length disagrees with the bytes that follow
        assert parse_block_header(bad)[1] != 2000 and len(bad) == len(good)
    else:
        assert bad[:2] == b"#X"


def test_push_error_and_trip_ovp(sim_bench, visa):
    sup = visa(sim_bench.resources["supply"])
    sim_bench.inject("supply", "push_error", code=-310, message="simulated fault")
    code, msg = parse_error_response(sup.query("SYST:ERR?"))
    assert code == -310 and "simulated fault" in msg
    assert sup.query("VOLT 5;:OUTP ON;*OPC?") == "1"
    sim_bench.inject("supply", "trip_ovp")
    assert sup.query("VOLT:PROT:TRIP?") == "1" and sup.query("OUTP?") == "0"
    assert sim_bench.supply_state()["tripped"]
    with pytest.raises(ValueError, match="supply only"):
        sim_bench.inject("scope", "trip_ovp")


def test_stall_reads_but_never_answers(sim_bench, visa):
    inst = visa(sim_bench.resources["scope"], timeout_ms=200)
    sim_bench.inject("scope", "stall")
    with pytest.raises(VisaIOError):
        inst.query("*IDN?")
    assert sim_bench.command_log("scope")[-1] == "*IDN?"  # it was read
    sim_bench.clear_faults()
    fresh = visa(sim_bench.resources["scope"])
    assert fresh.query("*OPC?") == "1"


def test_fault_option_errors():
    with pytest.raises(ValueError, match="unknown fault"):
        parse_fault("scope:melt")
    with pytest.raises(ValueError, match="unknown role"):
        parse_fault("toaster:stall")
    with pytest.raises(ValueError, match="takes"):
        parse_fault("scope:delay:colour=red")
    with pytest.raises(ValueError, match="bad option value"):
        parse_fault("scope:delay:seconds=soon")
    assert parse_fault("scope:delay:seconds=2,count=3") == (
        "scope", "delay", {"seconds": "2", "count": "3"})


def test_faults_armed_at_start(visa):
    with SimulatedBench(board="beacon", seed=1, faults=["supply:push_error:code=-300"]) as sim:
        sup = visa(sim.resources["supply"])
        assert parse_error_response(sup.query("SYST:ERR?"))[0] == -300
        assert np.isfinite(float(sup.query("MEAS:VOLT?")))
