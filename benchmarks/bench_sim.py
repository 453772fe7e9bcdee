"""Benchmark of the simulated bench's sockets (not a test; prints figures and ratios).

Run: ``.venv/bin/python benchmarks/bench_sim.py``

1. Block transfer: once a record is acquired, a raw Python socket pulls a 1M-sample
   ``INTeger,16`` block (2 MB) from the simulated scope; the rate is printed beside a raw
   loopback ``sendall`` of the same size measured in the same run. Target: >= 500 MB/s.
2. Round trip: ``SYSTem:VERSion?`` on an idle simulated server against a minimal
   thread-per-client echo server measured side by side. Target: ratio < 3.

The simulated bench runs as ``benchctl sim`` in its own process and the reference servers
in another, as on a real bench: the client's interpreter lock is not shared with them.
"""

from __future__ import annotations

import re
import socket
import statistics
import subprocess
import sys
import threading
import time
from pathlib import Path

if __package__ in (None, ""):  # run as a script from the repository
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchctl.scpi import parse_block_header  # noqa: E402

POINTS = 1_000_000
BLOCK_REPEATS = 15
ROUND_TRIPS = 3000


def _connect(resource: str) -> socket.socket:
    _, host, port, _ = resource.split("::")
    s = socket.create_connection((host, int(port)), timeout=10)
    s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    s.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
    return s


def _line(s: socket.socket, msg: bytes) -> bytes:
    s.sendall(msg)
    buf = b""
    while not buf.endswith(b"\n"):
        chunk = s.recv(65536)
        if not chunk:
            raise ConnectionError("closed")
        buf += chunk
    return buf


def _pull_block(s: socket.socket, buf: bytearray) -> int:
    """Send TRAC? and read exactly the block + terminator into ``buf``; return bytes read."""
    s.sendall(b"TRAC? CH1\n")
    view = memoryview(buf)
    got = 0
    while got < 16:
        got += s.recv_into(view[got:], len(buf) - got)
    head, length = parse_block_header(bytes(view[:got]))
    total = head + length + 1
    while got < total:
        n = s.recv_into(view[got:total], total - got)
        if n == 0:
            raise ConnectionError("closed mid-block")
        got += n
    return total


class _OneClientServer:
    """A loopback server for one client, answering whatever it receives with ``_answer``."""

    def __init__(self) -> None:
        self.sock = socket.create_server(("127.0.0.1", 0))
        self.port = self.sock.getsockname()[1]
        threading.Thread(target=self._run, daemon=True).start()

    def _answer(self, conn: socket.socket, data: bytes) -> None:
        raise NotImplementedError

    def _run(self) -> None:
        conn, _ = self.sock.accept()
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        with conn:
            while True:
                data = conn.recv(65536)
                if not data:
                    return
                self._answer(conn, data)


class _RawSender(_OneClientServer):
    """Reference: a server that answers any line with a fixed prepared buffer (sendall)."""

    def __init__(self, payload: bytes) -> None:
        self.payload = memoryview(payload)
        super().__init__()

    def _answer(self, conn: socket.socket, data: bytes) -> None:
        for _ in range(data.count(b"\n")):
            conn.sendall(self.payload)


class _Echo(_OneClientServer):
    """Minimal thread-per-client line echo server: the round-trip reference."""

    def _answer(self, conn: socket.socket, data: bytes) -> None:
        conn.sendall(data)


def _rate(fn, nbytes: int, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return nbytes / statistics.median(times) / 1e6


def _spawn(args: list[str], pattern: str, count: int) -> tuple[subprocess.Popen, list[str]]:
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    found: list[str] = []
    deadline = time.monotonic() + 30
    while len(found) < count and time.monotonic() < deadline:
        line = proc.stdout.readline()
        if not line:
            break
        m = re.search(pattern, line)
        if m:
            found.append(m.group(1))
    if len(found) < count:
        proc.kill()
        raise RuntimeError(f"{args[2:]} did not start")
    return proc, found


def main() -> int:
    sim, resources = _spawn([sys.executable, "-m", "benchctl", "sim", "--seed", "1"],
                            r"^\w+: (TCPIP::\S+)$", 3)
    ref = None
    try:
        sup, gen, scope = (_connect(r) for r in resources)
        assert _line(sup, b"VOLT 5;:OUTP ON;*OPC?\n") == b"1\n"
        t0 = time.perf_counter()
        assert _line(scope, f"SENS1:VOLT:RANG 4;:SENS:SWE:TIME 4e-2;POIN {POINTS};"
                            ":FORM INT,16;:INIT;*OPC?\n".encode()) == b"1\n"
        synth_s = time.perf_counter() - t0
        buf = bytearray(2 * POINTS + 64)
        nbytes = _pull_block(scope, buf)  # the first pull encodes and caches the block
        sim_rate = _rate(lambda: _pull_block(scope, buf), nbytes, BLOCK_REPEATS)

        ref, ports = _spawn([sys.executable, str(Path(__file__).resolve()), "--reference",
                             str(nbytes)], r"^ports (\d+ \d+)$", 1)
        echo_port, raw_port = (int(p) for p in ports[0].split())
        raw = _connect(f"TCPIP::127.0.0.1::{raw_port}::SOCKET")
        ref_rate = _rate(lambda: _pull_block(raw, buf), nbytes, BLOCK_REPEATS)

        print(f"record synthesis + acquisition of {POINTS} samples x 2 channels: "
              f"{synth_s * 1e3:.0f} ms (accelerated)")
        print(f"block transfer, 1M-sample INTeger,16 ({nbytes / 1e6:.2f} MB), raw socket client:")
        print(f"  simulated scope  {sim_rate:8.0f} MB/s   (target >= 500 MB/s: "
              f"{'met' if sim_rate >= 500 else 'NOT met'})")
        print(f"  raw sendall ref  {ref_rate:8.0f} MB/s   ratio scope/raw = {sim_rate / ref_rate:.2f}")

        es = _connect(f"TCPIP::127.0.0.1::{echo_port}::SOCKET")
        sim_t, echo_t = [], []
        for _ in range(10):  # interleaved blocks, so both see the same machine load
            t0 = time.perf_counter()
            for _ in range(ROUND_TRIPS // 10):
                _line(gen, b"SYST:VERS?\n")
            sim_t.append((time.perf_counter() - t0) / (ROUND_TRIPS // 10))
            t0 = time.perf_counter()
            for _ in range(ROUND_TRIPS // 10):
                _line(es, b"SYST:VERS?\n")
            echo_t.append((time.perf_counter() - t0) / (ROUND_TRIPS // 10))
        s_rt, e_rt = statistics.median(sim_t), statistics.median(echo_t)
        print(f"round trip, SYSTem:VERSion? on an idle server ({ROUND_TRIPS} each, interleaved):")
        print(f"  simulated generator {s_rt * 1e6:7.1f} us")
        print(f"  minimal echo server {e_rt * 1e6:7.1f} us   ratio = {s_rt / e_rt:.2f} "
              f"(target < 3: {'met' if s_rt / e_rt < 3 else 'NOT met'})")
        for s in (sup, scope, gen, es, raw):
            s.close()
    finally:
        for proc in (sim, ref):
            if proc is not None:
                proc.terminate()
                try:
                    proc.communicate(timeout=10)
                except subprocess.TimeoutExpired:
                    proc.kill()
    return 0


def _serve_references(nbytes: int) -> None:
    """``--reference N``: an echo server and a sender of a fixed N-byte block, until killed."""
    payload = b"#7" + str(nbytes - 10).rjust(7, "0").encode() + bytes(nbytes - 10) + b"\n"
    echo, raw = _Echo(), _RawSender(payload)
    print(f"ports {echo.port} {raw.port}", flush=True)
    threading.Event().wait(600)


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--reference":
        _serve_references(int(sys.argv[2]))
        raise SystemExit(0)
    raise SystemExit(main())
