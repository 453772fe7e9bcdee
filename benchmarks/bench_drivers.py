"""Driver speed, measured side by side in one run against a real-time simulated bench.

Run: ``.venv/bin/python benchmarks/bench_drivers.py`` (or ``make bench``).

Three ratios, each against the bare minimum the same server allows:

1. set-then-read (set a voltage, read it back) through the Supply driver vs the same two
   messages over a raw socket with TCP_NODELAY; target <= 3x. pyvisa-py's default path
   (no TCP_NODELAY: Nagle + delayed ACK) is printed beside it.
2. 1M-sample INTeger,16 waveform fetched through the Scope driver and decoded to volts vs a
   raw socket pull of the same block from the same server; target <= 2x.
   ``query_binary_values`` is printed beside it.
3. per-command overhead: a driver query vs a bare pyvisa query of the same command on a
   session with TCP_NODELAY; target <= 1.2x.

The simulated bench runs in its own process (``--in-process`` to run it in this one).
Rounds alternate between the contenders so both see the same machine load; the best
round of each is used. The numbers are printed, never asserted.
"""

from __future__ import annotations

import contextlib
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from benchctl.drivers import load_bench_text, open_bench  # noqa: E402
from benchctl.drivers.transport import _manager  # noqa: E402

POINTS = 1_000_000


def _best_interleaved(funcs: dict[str, Callable[[], object]], *, rounds: int, per_round: int) -> dict[str, float]:
    """Seconds per call of each function: the best round, rounds interleaved.

    The best of several rounds is the least disturbed by other load on the machine (the
    Python ``timeit`` documentation recommends the minimum for the same reason); the
    rounds alternate between the contenders so both see the same conditions.
    """
    samples: dict[str, list[float]] = {k: [] for k in funcs}
    for f in funcs.values():  # warm-up
        f()
    for _ in range(rounds):
        for name, f in funcs.items():
            t0 = time.perf_counter()
            for _ in range(per_round):
                f()
            samples[name].append((time.perf_counter() - t0) / per_round)
    return {k: min(v) for k, v in samples.items()}


class RawSocket:
    """The least a client can do: a socket with TCP_NODELAY and exact reads."""

    def __init__(self, resource: str) -> None:
        _, host, port, _ = resource.split("::")
        self.sock = socket.create_connection((host, int(port)), timeout=10.0)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.buf = bytearray()

    def send(self, text: str) -> None:
        self.sock.sendall(text.encode() + b"\n")

    def _fill(self, n: int) -> None:
        while len(self.buf) < n:
            chunk = self.sock.recv(max(1 << 20, n - len(self.buf)))
            if not chunk:
                raise ConnectionError("closed")
            self.buf += chunk

    def line(self) -> bytes:
        while b"\n" not in self.buf:
            chunk = self.sock.recv(65536)
            if not chunk:
                raise ConnectionError("closed")
            self.buf += chunk
        i = self.buf.index(b"\n")
        out = bytes(self.buf[:i])
        del self.buf[: i + 1]
        return out

    def block(self) -> bytes:
        self._fill(2)
        n = self.buf[1] - 0x30
        self._fill(2 + n)
        length = int(self.buf[2 : 2 + n])
        total = 2 + n + length + 1
        self._fill(total)
        out = bytes(self.buf[2 + n : 2 + n + length])
        del self.buf[:total]
        return out

    def close(self) -> None:
        self.sock.close()


@contextlib.contextmanager
def _simulated_bench(*, in_process: bool) -> Iterator[tuple[dict[str, str], str]]:
    """Start the real-time simulated bench; yield (role -> resource, bench file text).

    By default the bench runs in its own process (``benchctl sim --realtime``), as real
    instruments would: in one process the server threads and the client share one GIL and
    the measurement would be of GIL hand-offs, not of the drivers.
    """
    if in_process:
        from benchctl.simulated import SimulatedBench

        with SimulatedBench(board="beacon", revision="B", serial="B0001", seed=1, realtime=True) as sim:
            yield dict(sim.resources), sim.bench_toml(dialect="scpi1999")
        return
    with tempfile.TemporaryDirectory() as tmp:
        bench_file = Path(tmp) / "bench.toml"
        proc = subprocess.Popen(
            [sys.executable, "-m", "benchctl", "sim", "--realtime", "--board", "beacon",
             "--seed", "1", "--write-bench", str(bench_file)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
        try:
            deadline = time.monotonic() + 30.0
            while not bench_file.exists() or "[wiring]" not in bench_file.read_text():
                if proc.poll() is not None or time.monotonic() > deadline:
                    err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
                    raise RuntimeError(f"benchctl sim did not start: {err.strip()[-500:]}")
                time.sleep(0.05)
            time.sleep(0.1)
            text = bench_file.read_text()
            cfg = load_bench_text(text)
            yield {role: rc.resource for role, rc in cfg.roles.items()}, text
        finally:
            proc.terminate()
            try:
                proc.wait(timeout=10.0)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10.0)


def main(argv: list[str] | None = None) -> int:
    in_process = "--in-process" in (argv or [])
    with _simulated_bench(in_process=in_process) as (resources, text):
        cfg = load_bench_text(text)
        rm = _manager("@py")
        with open_bench(cfg, max_voltage_v=6.0) as bench:
            supply, scope = bench.supply, bench.scope
            supply.set_current_limit(0.05)
            supply.set_voltage(1.0)
            # -------------------------------------------------- 1. set-then-read
            raw = RawSocket(resources["supply"])
            default = rm.open_resource(resources["supply"], read_termination="\n", write_termination="\n")
            nodelay = rm.open_resource(resources["supply"], read_termination="\n", write_termination="\n")
            sock = nodelay.visalib.sessions[nodelay.session].interface
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

            def drv_set_read() -> float:
                supply.set_voltage(1.25)
                return supply.get_voltage()

            def raw_set_read() -> bytes:
                raw.send("SOURce:VOLTage 1.25")
                raw.send("SOURce:VOLTage?")
                return raw.line()

            def default_set_read() -> str:
                default.write("SOURce:VOLTage 1.25")
                return default.query("SOURce:VOLTage?")

            r = _best_interleaved({"driver": drv_set_read, "raw": raw_set_read}, rounds=40, per_round=20)
            d = _best_interleaved({"default": default_set_read}, rounds=3, per_round=5)
            ratio1 = r["driver"] / r["raw"]
            print("set-then-read (set a voltage, read it back)")
            print(f"  raw socket, TCP_NODELAY    {r['raw'] * 1e3:9.3f} ms")
            print(f"  benchctl Supply driver     {r['driver'] * 1e3:9.3f} ms   ratio {ratio1:5.2f}x (target <= 3x)")
            print(f"  pyvisa-py defaults         {d['default'] * 1e3:9.3f} ms   ratio {d['default'] / r['raw']:7.1f}x")

            # -------------------------------------------------- 3. per-command overhead
            def drv_query() -> float:
                return supply.get_voltage()

            def bare_query() -> str:
                return nodelay.query("SOURce:VOLTage?")

            q = _best_interleaved({"driver": drv_query, "bare": bare_query}, rounds=40, per_round=20)
            ratio3 = q["driver"] / q["bare"]
            print("per-command overhead (one query)")
            print(f"  bare pyvisa query          {q['bare'] * 1e3:9.3f} ms")
            print(f"  benchctl driver query      {q['driver'] * 1e3:9.3f} ms   ratio {ratio3:5.2f}x (target <= 1.2x)")
            raw.close()
            default.close()

            # -------------------------------------------------- 2. waveform fetch
            ch = bench.wiring.output_channel
            scope.setup_channel(ch, scale_v_div=0.5)
            scope.set_trigger(source="free")
            scope.set_timebase(window_s=1e-2, sample_rate_hz=POINTS / 1e-2)
            scope.acquire(timeout_s=30.0)
            scope.transport.write("FORMat:DATA INTeger,16;:FORMat:BORDer NORMal")
            raw = RawSocket(resources["scope"])
            bare = rm.open_resource(resources["scope"], read_termination="\n", write_termination="\n", timeout=30000)
            bare.visalib.sessions[bare.session].interface.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            raw.send("FORMat:DATA INTeger,16;:FORMat:BORDer NORMal")

            def drv_fetch() -> np.ndarray:
                return scope.fetch(ch).volts

            def raw_fetch() -> bytes:
                raw.send(f"TRACe:DATA? CH{ch}")
                return raw.block()

            def qbv_fetch() -> np.ndarray:
                return bare.query_binary_values(
                    f"TRACe:DATA? CH{ch}", datatype="h", is_big_endian=True, container=np.array
                )

            wf = drv_fetch()
            assert wf.size == POINTS, wf.size
            w = _best_interleaved({"driver": drv_fetch, "raw": raw_fetch}, rounds=25, per_round=1)
            b = _best_interleaved({"qbv": qbv_fetch}, rounds=1, per_round=1)
            ratio2 = w["driver"] / w["raw"]
            mb = 2 * POINTS / 1e6
            print(f"waveform fetch, {POINTS} samples INTeger,16 ({mb:.0f} MB)")
            print(f"  raw socket pull            {w['raw'] * 1e3:9.2f} ms  {mb / w['raw']:7.0f} MB/s")
            print(f"  benchctl Scope.fetch->V    {w['driver'] * 1e3:9.2f} ms  {mb / w['driver']:7.0f} MB/s   ratio {ratio2:5.2f}x (target <= 2x)")
            print(f"  query_binary_values        {b['qbv'] * 1e3:9.2f} ms  {mb / b['qbv']:7.0f} MB/s   ratio {b['qbv'] / w['raw']:6.1f}x")
            raw.close()
            bare.close()
            nodelay.close()
    ok = ratio1 <= 3 and ratio2 <= 2 and ratio3 <= 1.2
    print("targets:", "all met" if ok else "NOT all met")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
