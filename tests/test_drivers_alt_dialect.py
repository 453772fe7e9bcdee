"""The drivers drive an instrument with other mnemonics, number formats, units in replies
and "\\r\\n" terminations by a dialect file alone.

The test-only server here is built on benchctl.scpi.CommandTree and runs on 127.0.0.1. It
plays all three roles (supply, generator, scope) of an invented bench that speaks its own
command words; a scope channel sees a sine from the generator whose peak-to-peak, offset and
frequency the tests know, with Gaussian noise, quantised by an 8-bit ADC on the screen the
driver programmed. Everything goes over pyvisa-py sockets.
"""

from __future__ import annotations

import math
import socket
import socketserver
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest

from benchctl.drivers import Supply, load_bench_text, load_dialect, open_bench
from benchctl.drivers.scope import dominant_frequency, noise_sigma
from benchctl.errors import ConfigErrors, InstrumentError, SafetyError
from benchctl.scpi import CommandTree, ErrorQueue, encode_block, format_nr3

ALT_DIALECT = r'''
[dialect]
name = "alt-test"
description = "test-only dialect: own mnemonics, units in replies, CRLF"
read_termination = "\r\n"
write_termination = "\r\n"
compound = false
true = "ENAB"
false = "DISAB"
number_format = ".6e"
int16_big_endian = false

[common]
identify = { query = "*IDN?", reply = "idn" }
reset = { write = "*RST" }
clear = { write = "*CLS" }
opc = { query = "*OPC?", reply = "boolean" }
error = { query = "DIAG:ERR?", reply = "error" }

[supply]
set_voltage = { write = "PSU:VSET {voltage_v:.4f}V" }
get_voltage = { query = "PSU:VSET?", unit = "V" }
set_current_limit = { write = "PSU:ILIM {current_a}A" }
get_current_limit = { query = "PSU:ILIM?", unit = "A" }
set_ovp = { write = "PSU:OVL {voltage_v}" }
get_ovp = { query = "PSU:OVL?", unit = "V" }
ovp_tripped = { query = "PSU:OVTR?", reply = "boolean" }
ovp_clear = { write = "PSU:OVRS" }
output = { write = "PSU:RELAY {state}" }
get_output = { query = "PSU:RELAY?", reply = "boolean" }
measure_voltage = { query = "READ:VOUT?", unit = "V" }
measure_current = { query = "READ:IOUT?", unit = "A" }

[generator]
set_shape = { write = "WAVE:FORM {shape}" }
set_frequency = { write = "WAVE:FREQ {freq_hz:.3f}HZ" }
get_frequency = { query = "WAVE:FREQ?", unit = "Hz" }
set_amplitude = { write = "WAVE:AMPL {vpp_v}" }
set_offset = { write = "WAVE:OFFS {offset_v}" }
output = { write = "WAVE:OUT {state}" }
get_output = { query = "WAVE:OUT?", reply = "boolean" }

[generator.words.shape]
sine = "SIN"
square = "SQR"
triangle = "TRI"
dc = "FLAT"

[scope]
set_range = { write = "CHAN{channel}:SPAN {range_v}" }
set_offset = { write = "CHAN{channel}:CENT {offset_v}" }
set_coupling = { write = "CHAN{channel}:COUP {coupling}" }
channel_state = { write = "CHAN{channel}:DISP {state}" }
set_window = { write = "ACQ:WIND {window_s}" }
set_points = { write = "ACQ:NPTS {points}" }
trigger_free = { write = "TRIG:MODE AUTO" }
trigger_edge = { write = "TRIG:SRC C{channel}" }
set_trigger_level = { write = "TRIG:LEV {level_v}" }
set_trigger_slope = { write = "TRIG:EDGE {slope}" }
arm = { write = "ACQ:SING" }
format_int16 = { write = "WAV:MODE WORD" }
format_ascii = { write = "WAV:MODE TEXT" }
fetch_block = { query = "WAV:DATA? {channel}", reply = "block" }
fetch_ascii = { query = "WAV:DATA? {channel}", reply = "list", separator = " " }
scaling = { query = "WAV:PRE? {channel}", reply = "list", fields = ["y0_v", "dy_v", "points", "t0_s", "dt_s"] }

[scope.words.coupling]
ac = "ALT"
dc = "DIR"

[scope.words.slope]
rising = "UP"
falling = "DOWN"
'''


@dataclass
class AltState:
    """State of the invented three-in-one instrument."""

    setpoint_v: float = 0.0
    ilim_a: float = 0.1
    ovl_v: float = 10.0
    relay: bool = False
    tripped: bool = False
    load_ohm: float = 100.0
    shape: str = "SIN"
    freq_hz: float = 1000.0
    vpp_v: float = 1.0
    offset_v: float = 0.0
    gen_on: bool = False
    span_v: dict[int, float] = field(default_factory=lambda: {1: 8.0, 2: 8.0})
    centre_v: dict[int, float] = field(default_factory=lambda: {1: 0.0, 2: 0.0})
    coupling: dict[int, str] = field(default_factory=lambda: {1: "DIR", 2: "DIR"})
    window_s: float = 1e-3
    npts: int = 1000
    mode: str = "WORD"
    trig: str = "AUTO"
    noise_v: float = 0.002
    record: dict[int, np.ndarray] = field(default_factory=dict)
    rng: np.random.Generator = field(default_factory=lambda: np.random.default_rng(7))
    log: list[str] = field(default_factory=list)

    def output_v(self) -> float:
        if not self.relay or self.tripped:
            return 0.0
        return min(self.setpoint_v, self.ilim_a * self.load_ohm)

    def acquire(self) -> None:
        t = np.arange(self.npts) * (self.window_s / self.npts)
        phase = 2 * np.pi * self.freq_hz * t + 0.3
        amp = 0.5 * self.vpp_v if self.gen_on else 0.0
        if self.shape == "SQR":
            wave = amp * np.sign(np.sin(phase))
        elif self.shape == "FLAT":
            wave = np.zeros_like(t)
        else:
            wave = amp * np.sin(phase)
        signals = {
            1: wave + (self.offset_v if self.gen_on else 0.0),
            2: np.full_like(t, self.output_v()),
        }
        for ch, sig in signals.items():
            sig = sig + self.rng.normal(0.0, self.noise_v, t.size)
            if self.coupling[ch] == "ALT":
                sig = sig - sig.mean()
            dy = self.span_v[ch] / 256.0
            self.record[ch] = np.clip(np.round((sig - self.centre_v[ch]) / dy), -128, 127).astype(np.int16)

    def scaling(self, ch: int) -> tuple[float, float]:
        return self.span_v[ch] / 256.0, self.centre_v[ch]


def _unit(value: float, unit: str) -> str:
    """Format with an SI prefix, the way the invented instrument answers."""
    for prefix, mult in (("m", 1e-3),):
        if value != 0 and abs(value) < 1 and unit != "Hz":
            return f"{value / mult:.4f}{prefix}{unit}"
    return f"{value:.6f} {unit}"


def build_alt_tree() -> CommandTree:
    """The invented instrument's command tree (our own words throughout)."""
    tree = CommandTree()

    def st(call) -> AltState:
        return call.context

    tree.add("*IDN", query=lambda c: "Testworks,ALT-3,A0042,0.9")
    tree.add("*RST", set=lambda c: None)
    tree.add("*CLS", set=lambda c: c.errors.clear())
    tree.add("*OPC", query=lambda c: "1")
    tree.add("DIAG:ERR", query=lambda c: c.errors.format_next())

    def vset(c):
        value = c.numeric(0, unit="V", minimum=0.0, maximum=30.0)
        st(c).setpoint_v = value
        if st(c).relay and value > st(c).ovl_v:
            st(c).tripped = True

    tree.add("PSU:VSET", set=vset, query=lambda c: _unit(st(c).setpoint_v, "V"))
    tree.add(
        "PSU:ILIM",
        set=lambda c: setattr(st(c), "ilim_a", c.numeric(0, unit="A", minimum=0.0, maximum=5.0)),
        query=lambda c: _unit(st(c).ilim_a, "A"),
    )
    tree.add(
        "PSU:OVL",
        set=lambda c: setattr(st(c), "ovl_v", c.numeric(0, unit="V", minimum=0.0, maximum=33.0)),
        query=lambda c: _unit(st(c).ovl_v, "V"),
    )
    tree.add("PSU:OVTR", query=lambda c: "ENAB" if st(c).tripped else "DISAB")
    tree.add("PSU:OVRS", set=lambda c: setattr(st(c), "tripped", False))

    def relay(c):
        st(c).relay = c.choice(0, ("ENAB", "DISAB")) == "ENAB"

    tree.add("PSU:RELAY", set=relay, query=lambda c: "ENAB" if st(c).relay else "DISAB")
    tree.add("READ:VOUT", query=lambda c: _unit(st(c).output_v(), "V"))
    tree.add("READ:IOUT", query=lambda c: _unit(st(c).output_v() / st(c).load_ohm, "A"))

    tree.add("WAVE:FORM", set=lambda c: setattr(st(c), "shape", c.choice(0, ("SIN", "SQR", "TRI", "FLAT"))))
    tree.add(
        "WAVE:FREQ",
        set=lambda c: setattr(st(c), "freq_hz", c.numeric(0, unit="HZ", minimum=1e-3, maximum=1e7)),
        query=lambda c: f"{st(c).freq_hz / 1e3:.6f}kHz",
    )
    tree.add("WAVE:AMPL", set=lambda c: setattr(st(c), "vpp_v", c.numeric(0, unit="V", minimum=0.0, maximum=20.0)))
    tree.add("WAVE:OFFS", set=lambda c: setattr(st(c), "offset_v", c.numeric(0, unit="V", minimum=-10.0, maximum=10.0)))

    def gen_out(c):
        st(c).gen_on = c.choice(0, ("ENAB", "DISAB")) == "ENAB"

    tree.add("WAVE:OUT", set=gen_out, query=lambda c: "ENAB" if st(c).gen_on else "DISAB")

    def chan(c, attr, value):
        getattr(st(c), attr)[c.suffixes[0]] = value

    tree.add("CHAN#:SPAN", set=lambda c: chan(c, "span_v", c.numeric(0, unit="V", minimum=1e-3, maximum=400.0)))
    tree.add("CHAN#:CENT", set=lambda c: chan(c, "centre_v", c.numeric(0, unit="V", minimum=-100.0, maximum=100.0)))
    tree.add("CHAN#:COUP", set=lambda c: chan(c, "coupling", c.choice(0, ("ALT", "DIR"))))
    tree.add("CHAN#:DISP", set=lambda c: c.choice(0, ("ENAB", "DISAB")) and None)
    tree.add("ACQ:WIND", set=lambda c: setattr(st(c), "window_s", c.numeric(0, unit="S", minimum=1e-9, maximum=100.0)))
    tree.add("ACQ:NPTS", set=lambda c: setattr(st(c), "npts", int(c.numeric(0, minimum=2, maximum=2_000_000))))
    tree.add("TRIG:MODE", set=lambda c: setattr(st(c), "trig", c.choice(0, ("AUTO",))))
    tree.add("TRIG:SRC", set=lambda c: setattr(st(c), "trig", c.choice(0, ("C1", "C2"))))
    tree.add("TRIG:LEV", set=lambda c: c.numeric(0, unit="V") and None)
    tree.add("TRIG:EDGE", set=lambda c: c.choice(0, ("UP", "DOWN")) and None)
    tree.add("ACQ:SING", set=lambda c: st(c).acquire())
    tree.add("WAV:MODE", set=lambda c: setattr(st(c), "mode", c.choice(0, ("WORD", "TEXT"))))

    def wav_data(c):
        ch = int(c.numeric(0, minimum=1, maximum=2))
        codes = st(c).record[ch]
        if st(c).mode == "TEXT":
            dy, y0 = st(c).scaling(ch)
            return " ".join(format_nr3(v) for v in codes * dy + y0)
        return encode_block((codes * 256).astype(np.int16), dtype="int16", big_endian=False)

    def wav_pre(c):
        ch = int(c.numeric(0, minimum=1, maximum=2))
        dy, y0 = st(c).scaling(ch)
        s = st(c)
        if s.mode == "WORD":  # 16-bit words carry the 8-bit code times 256
            dy /= 256.0
        return ",".join(format_nr3(v, digits=12) for v in (y0, dy, s.npts, 0.0, s.window_s / s.npts))

    tree.add("WAV:DATA", query=wav_data)
    tree.add("WAV:PRE", query=wav_pre)
    return tree


class AltServer:
    """Serves one AltState over CRLF-terminated TCP on 127.0.0.1 (loopback only)."""

    def __init__(self) -> None:
        self.state = AltState()
        self.errors = ErrorQueue()
        self.tree = build_alt_tree()
        self.lock = threading.Lock()
        outer = self

        class Handler(socketserver.BaseRequestHandler):
            def handle(self) -> None:
                self.request.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                buf = b""
                while True:
                    try:
                        data = self.request.recv(65536)
                    except OSError:
                        return
                    if not data:
                        return
                    buf += data
                    while b"\n" in buf:
                        line, buf = buf.split(b"\n", 1)
                        message = line.rstrip(b"\r").decode("latin-1")
                        with outer.lock:
                            outer.state.log.append(message)
                            reply = outer.tree.execute(message, context=outer.state, errors=outer.errors)
                        if reply is not None:
                            self.request.sendall(reply.encode("latin-1") + b"\r\n")

        class Server(socketserver.ThreadingTCPServer):
            daemon_threads = True
            allow_reuse_address = True

        self.server = Server(("127.0.0.1", 0), Handler)
        self.port = self.server.server_address[1]
        self.thread = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)

    @property
    def resource(self) -> str:
        return f"TCPIP::127.0.0.1::{self.port}::SOCKET"

    def __enter__(self) -> AltServer:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(timeout=2.0)


@pytest.fixture()
def alt_bench(tmp_path: Path):
    dialect_path = tmp_path / "alt.toml"
    dialect_path.write_text(ALT_DIALECT, encoding="utf-8")
    with AltServer() as server:
        text = f"""
[bench]
name = "alt"
[roles.supply]
resource = "{server.resource}"
dialect = "alt.toml"
timeout_s = 1.0
[roles.generator]
resource = "{server.resource}"
dialect = "alt.toml"
timeout_s = 1.0
[roles.scope]
resource = "{server.resource}"
dialect = "alt.toml"
timeout_s = 1.0
[wiring]
output_channel = 1
rail_channel = 2
generator = "input"
"""
        config = load_bench_text(text, source=str(tmp_path / "bench.toml"), base_dir=tmp_path)
        with open_bench(config, max_voltage_v=6.0) as bench:
            yield server, bench


def test_alt_dialect_loads_and_renders_our_words(tmp_path: Path) -> None:
    path = tmp_path / "alt.toml"
    path.write_text(ALT_DIALECT, encoding="utf-8")
    supply = load_dialect(path, "supply")
    assert supply.read_termination == "\r\n"
    assert supply.op("set_voltage").render(voltage_v=5) == "PSU:VSET 5.0000V"
    assert supply.op("output").render(state=True) == "PSU:RELAY ENAB"
    # SI prefixes in replies: 12.5 mA = 0.0125 A (SI brochure, 9th ed., table 7: m = 1e-3)
    assert supply.op("measure_current").parse("12.5000mA") == pytest.approx(0.0125, rel=1e-12)
    scope = load_dialect(path, "scope")
    fields = scope.op("scaling").parse("+1.0E-1,+3.125E-2,1000,0,1E-6")
    assert fields == {"y0_v": 0.1, "dy_v": 0.03125, "points": 1000.0, "t0_s": 0.0, "dt_s": 1e-6}


def test_alt_bench_identifies_every_role(alt_bench) -> None:
    server, bench = alt_bench
    for role in ("supply", "generator", "scope"):
        idn = bench.idn[role]
        assert (idn.maker, idn.model, idn.serial, idn.firmware) == ("Testworks", "ALT-3", "A0042", "0.9")
    assert "*IDN?" in server.state.log


def test_alt_supply_by_dialect_alone(alt_bench) -> None:
    server, bench = alt_bench
    s = bench.supply
    s.set_current_limit(0.2)
    s.set_ovp(6.5)
    s.set_voltage(5.0)
    s.output(True)
    assert server.state.relay is True
    assert "PSU:VSET 5.0000V" in server.state.log
    assert s.get_voltage() == pytest.approx(5.0, abs=1e-9)
    assert s.measure_voltage() == pytest.approx(5.0, abs=1e-9)
    # Ohm's law: 5 V across the 100 ohm load is 50 mA (reply "50.0000mA")
    assert s.measure_current() == pytest.approx(0.05, rel=1e-6)
    assert s.get_current_limit() == pytest.approx(0.2, rel=1e-9)
    assert s.get_ovp() == pytest.approx(6.5, rel=1e-9)
    assert s.is_output_on() is True
    assert s.protection_tripped() is False
    assert s.wait_settled(5.0, tol_v=0.01, timeout_s=1.0) == pytest.approx(5.0)
    s.output(False)
    assert s.is_output_on() is False


def test_alt_supply_refuses_setpoint_above_limit_before_sending(alt_bench) -> None:
    server, bench = alt_bench
    n_before = len(server.state.log)
    with pytest.raises(SafetyError, match="above the limit 6 V"):
        bench.supply.set_voltage(6.01)
    with pytest.raises(SafetyError):
        bench.supply.ramp_to(7.0, rate_v_per_s=10.0)
    assert len(server.state.log) == n_before  # nothing went out


def test_alt_instrument_error_names_the_command(alt_bench) -> None:
    server, bench = alt_bench
    # 33 V exceeds the server's maximum of 30 V: SCPI -222 "Data out of range"
    # (SCPI-1999 vol. 2, 21.8.6, from memory). A driver opened with a 40 V limit reaches it.
    with pytest.raises(AttributeError):
        bench.supply.max_voltage_v = 40.0  # the limit it was opened with cannot be lifted
    wide = Supply(bench.supply.transport, bench.supply.dialect, max_voltage_v=40.0)
    wide.set_voltage(33.0)  # fast mode: not checked yet
    with pytest.raises(InstrumentError) as info:
        wide.output(True)  # a point of consequence
    assert info.value.code == -222
    assert "PSU:VSET 33.0000V" in info.value.command
    wide.strict = True
    with pytest.raises(InstrumentError) as info:
        wide.set_voltage(31.0)
    assert info.value.code == -222 and info.value.command == "PSU:VSET 31.0000V"


def test_alt_generator_by_dialect_alone(alt_bench) -> None:
    server, bench = alt_bench
    g = bench.generator
    g.set_shape("square")
    g.set_frequency(12_345.678)
    g.set_amplitude(0.8)
    g.set_offset(0.1)
    g.output(True)
    st = server.state
    assert (st.shape, st.vpp_v, st.offset_v, st.gen_on) == ("SQR", 0.8, 0.1, True)
    assert st.freq_hz == pytest.approx(12_345.678, abs=1e-9)
    assert g.frequency() == pytest.approx(12_345.678, rel=1e-9)  # reply "12.345678kHz"
    assert g.is_output_on() is True
    with pytest.raises(ValueError):
        g.set_shape("sawtooth")  # type: ignore[arg-type]


@pytest.mark.parametrize("transfer", ["int16", "ascii"])
def test_alt_scope_fetch_matches_the_signal(alt_bench, transfer: str) -> None:
    server, bench = alt_bench
    g, sc = bench.generator, bench.scope
    g.set_shape("sine")
    g.set_frequency(2_000.0)
    g.set_amplitude(1.2)
    g.set_offset(0.0)
    g.output(True)
    sc.setup_channel(1, scale_v_div=0.2, offset_v=0.0, coupling="dc")
    window_s, points = sc.set_timebase(window_s=5e-3, sample_rate_hz=400_000)
    assert points == 2000
    sc.set_trigger(source=1, level_v=0.0, slope="rising")
    sc.acquire(timeout_s=1.0)
    wf = sc.fetch(1, transfer=transfer)  # type: ignore[arg-type]
    assert wf.volts.size == 2000 and wf.dt_s == pytest.approx(2.5e-6, rel=1e-9)
    assert wf.time_s[-1] == pytest.approx(1999 * 2.5e-6, rel=1e-9)
    assert wf.sample_rate_hz == pytest.approx(400_000, rel=1e-9)
    assert wf.clipped_samples == 0
    # A sine of peak A has RMS A/sqrt(2) (any circuits handbook); 1.2 Vpp -> 0.4243 V.
    # Quantisation: q = 1.6 V / 256, noise q/sqrt(12) (Widrow, from memory) << tolerance.
    rms = float(np.sqrt(np.mean(wf.volts**2)))
    assert rms == pytest.approx(0.6 / math.sqrt(2), rel=0.01)
    assert dominant_frequency(wf.volts, wf.dt_s) == pytest.approx(2_000.0, rel=2e-3)
    assert server.state.log.count("WAV:MODE TEXT" if transfer == "ascii" else "WAV:MODE WORD") == 1


def test_alt_scope_reports_clipping(alt_bench) -> None:
    server, bench = alt_bench
    bench.generator.set_amplitude(4.0)
    bench.generator.output(True)
    bench.scope.setup_channel(1, scale_v_div=0.1)  # 0.8 V screen, 4 Vpp signal
    bench.scope.set_timebase(window_s=2e-3, sample_rate_hz=500_000)
    bench.scope.acquire()
    wf = bench.scope.fetch(1)
    codes = server.state.record[1]
    assert wf.clipped_samples == int(np.count_nonzero((codes <= -128) | (codes >= 127)))
    assert wf.clipped_samples > 100


def test_alt_scope_autoscale_fills_six_divisions(alt_bench) -> None:
    server, bench = alt_bench
    g, sc = bench.generator, bench.scope
    g.set_shape("sine")
    g.set_frequency(5_000.0)
    g.set_amplitude(3.0)
    g.set_offset(0.5)
    g.output(True)
    res = sc.autoscale(1, cycles=4, points=4000, start_scale_v_div=0.05, first_window_s=1e-4)
    assert res.freq_hz == pytest.approx(5_000.0, rel=5e-3)
    assert res.window_s == pytest.approx(4 / 5_000.0, rel=5e-3)
    assert res.offset_v == pytest.approx(0.5, abs=0.05)
    # peaks (3 Vpp + noise) at about 6 of the 8 divisions: common practice, no published source
    divisions = 3.0 / res.scale_v_div
    assert 5.0 <= divisions <= 6.5
    wf = sc.fetch(1)
    assert wf.clipped_samples == 0
    # the record's noise is the signal's plus the ADC's quantisation noise q^2/12 (Widrow's
    # model, from memory); autoscale reports the signal's part. With q/sqrt(12) ~ 2.7x the
    # signal's 2 mV here, only a loose check is meaningful.
    assert 0.0 < res.noise_v < 3 * server.state.noise_v


def test_noise_sigma_of_white_noise_on_a_slow_sine() -> None:
    rng = np.random.default_rng(3)
    t = np.arange(20_000) * 1e-6
    x = np.sin(2 * np.pi * 200.0 * t) + rng.normal(0.0, 0.01, t.size)
    # var(third difference of white noise) = (1+9+9+1) sigma^2 = 20 sigma^2 (binomial coefficients)
    assert noise_sigma(x) == pytest.approx(0.01, rel=0.05)


def test_broken_alt_dialect_is_a_load_time_error(tmp_path: Path) -> None:
    bad = ALT_DIALECT.replace("PSU:VSET {voltage_v:.4f}V", "PSU:VSET {volts}V").replace(
        'measure_current = { query = "READ:IOUT?", unit = "A" }\n', ""
    )
    path = tmp_path / "bad.toml"
    path.write_text(bad, encoding="utf-8")
    with pytest.raises(ConfigErrors) as info:
        load_dialect(path, "supply")
    keys = {(e.file, e.key) for e in info.value.errors}
    assert (str(path), "supply.set_voltage.write") in keys
    assert (str(path), "supply.measure_current") in keys
    assert any("{volts}" in e.reason for e in info.value.errors)


def test_dominant_frequency_finds_a_line_and_rejects_noise() -> None:
    rng = np.random.default_rng(5)
    dt_s = 1e-6
    t = np.arange(50_000) * dt_s
    tone_hz = 12_345.6
    x = 0.1 * np.sin(2 * np.pi * tone_hz * t) + rng.normal(0.0, 0.01, t.size)
    # bin spacing 1/(N dt) = 20 Hz; interpolation resolves far below one bin
    assert dominant_frequency(x, dt_s) == pytest.approx(tone_hz, abs=2.0)
    assert math.isnan(dominant_frequency(rng.normal(0.0, 0.01, t.size), dt_s))


def test_discover_speaks_crlf() -> None:
    import io
    import json

    from rich.console import Console

    from benchctl.cli import main

    with AltServer() as server:
        buf = io.StringIO()
        code = main(["discover", "--no-scan", "--json", "--crlf", server.resource], Console(file=buf, width=300))
    row = json.loads(buf.getvalue())["resources"][0]
    assert code == 0 and (row["maker"], row["model"], row["serial"]) == ("Testworks", "ALT-3", "A0042")
