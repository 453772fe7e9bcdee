"""``benchctl sim`` as a subprocess: resource strings, bench file, SIGTERM/Ctrl-C, warnings."""

from __future__ import annotations

import io
import re
import signal
import subprocess
import sys
import threading
import time
import tomllib

import pytest
from rich.console import Console

from benchctl.cli import build_parser

RESOURCE = re.compile(r"^(supply|generator|scope): (TCPIP::127\.0\.0\.\d+::\d+::SOCKET)$")


def _start(*args: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "benchctl", "sim", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def _read_resources(proc: subprocess.Popen, timeout_s: float = 20.0) -> tuple[dict, list[str]]:
    found: dict[str, str] = {}
    lines: list[str] = []
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and len(lines) < 50:  # bounded in time and count
        line = proc.stdout.readline()
        if not line:
            break
        lines.append(line.rstrip("\n"))
        m = RESOURCE.match(lines[-1])
        if m:
            found[m.group(1)] = m.group(2)
        if lines[-1].startswith("serving"):
            break
    return found, lines


@pytest.mark.parametrize("how", [signal.SIGTERM, signal.SIGINT])
def test_sim_serves_and_stops_cleanly(tmp_path, visa, how):
    bench = tmp_path / "bench.toml"
    proc = _start("--board", "beacon", "--revision", "C", "--seed", "4", "--write-bench", str(bench))
    try:
        res, lines = _read_resources(proc)
        assert set(res) == {"supply", "generator", "scope"}, lines
        assert any("revision C" in ln for ln in lines)
        doc = tomllib.loads(bench.read_text())
        assert doc["roles"]["scope"]["resource"] == res["scope"]
        assert doc["roles"]["supply"]["dialect"] == "scpi1999"
        assert doc["wiring"] == {"output_channel": 1, "rail_channel": 2, "generator": "rail"}
        sup = visa(res["supply"])
        assert sup.query("*IDN?").startswith("benchctl,SIM-DC-SUPPLY")
        assert sup.query("VOLT 5;:OUTP ON;*OPC?") == "1"
        assert float(sup.query("MEAS:VOLT?")) == pytest.approx(5.0, abs=3e-3)
        sup.close()
        proc.send_signal(how)
        out, _ = proc.communicate(timeout=10)
        assert proc.returncode == 0
        assert "stopped" in out
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate(timeout=5)


def test_sim_warns_when_not_on_127_0_0_1():
    # 127.0.0.2 is still loopback on Linux, but it is not the default: the warning must show
    proc = _start("--bind", "127.0.0.2")
    try:
        res, lines = _read_resources(proc)
        assert any("WARNING" in ln and "no authentication" in ln for ln in lines), lines
        assert all(r.startswith("TCPIP::127.0.0.2::") for r in res.values())
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=10)
        assert proc.returncode == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate(timeout=5)


def _run_in_process(argv: list[str]) -> tuple[int, str]:
    buf = io.StringIO()
    args = build_parser().parse_args(argv)
    rc = args.func(args, Console(file=buf, width=200), stop=threading.Event())
    return rc, buf.getvalue()


def test_sim_bad_input_exits_2(tmp_path):
    bad = tmp_path / "board.toml"
    bad.write_text('[board]\nname = "x"\nkind = "oscillator"\nflavour = 1\n')
    rc, out = _run_in_process(["sim", "--board", str(bad)])
    assert rc == 2
    assert "board.flavour" in out and "unknown key" in out and str(bad) in out
    rc, out = _run_in_process(["sim", "--fault", "scope:melt"])
    assert rc == 2 and "unknown fault" in out
    rc, out = _run_in_process(["sim", "--board", "replay", "--revision", "T9"])
    assert rc == 2 and "revisions" in out and "T9" in out


def test_handler_in_process_with_port_base_and_fault(visa, tmp_path):
    """The handler with an injected console and stop event (no signals needed)."""
    import socket

    with socket.socket() as probe:  # find a free block of three ports
        probe.bind(("127.0.0.1", 0))
        base = probe.getsockname()[1]
    if base > 65000:
        base -= 1000
    args = build_parser().parse_args(["sim", "--port-base", str(base), "--wire-generator",
                                      "none", "--write-bench", str(tmp_path / "b.toml"),
                                      "--fault",
                                      "generator:push_error:code=-310,message=hello"])
    buf = io.StringIO()
    console = Console(file=buf, width=200)
    stop = threading.Event()
    rc: list[int] = []
    th = threading.Thread(target=lambda: rc.append(args.func(args, console, stop=stop)))
    th.start()
    try:
        deadline = time.monotonic() + 10
        while "serving" not in buf.getvalue() and time.monotonic() < deadline:
            if not th.is_alive():
                break
            time.sleep(0.02)
        if not th.is_alive():
            pytest.skip(f"ports {base}..{base + 2} not free: {buf.getvalue()}")
        text = buf.getvalue()
        assert f"generator: TCPIP::127.0.0.1::{base + 1}::SOCKET" in text
        gen = visa(f"TCPIP::127.0.0.1::{base + 1}::SOCKET")
        assert gen.query("SYST:ERR?") == '-310,"System error;hello"'
        gen.close()
        assert tomllib.loads((tmp_path / "b.toml").read_text())["wiring"]["generator"] == "none"
    finally:
        stop.set()
        th.join(timeout=10)
    assert rc == [0]


def test_sim_help_carries_the_cautions(capsys):
    with pytest.raises(SystemExit) as exc:
        build_parser().parse_args(["sim", "--help"])
    assert exc.value.code == 0
    text = capsys.readouterr().out
    assert "no authentication" in text and "Cautions:" in text and "--write-bench" in text
