"""Simulated DC supply and function generator over pyvisa-py sockets."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from benchctl.scpi import parse_error_response
from benchctl.simulated import BenchPhysics, SimulatedBench


@pytest.fixture
def supply(sim_bench, visa):
    return visa(sim_bench.resources["supply"])


def test_setpoint_readback_and_board_current(sim_bench, supply):
    supply.write("VOLT 4.2;CURR 0.1")
    supply.write("OUTP ON")
    assert supply.query("OUTP?") == "1"
    volts = [float(supply.query("MEAS:VOLT?")) for _ in range(20)]
    amps = [float(supply.query("MEAS:CURR?")) for _ in range(20)]
    # 1 mV and 10 uA readback resolution (our supply's numbers)
    assert np.allclose(np.round(np.array(volts) / 1e-3) * 1e-3, volts, atol=1e-12)
    assert np.allclose(np.round(np.array(amps) / 1e-5) * 1e-5, amps, atol=1e-12)
    assert np.mean(volts) == pytest.approx(4.2, abs=1e-3)
    # the current comes from the board: its running law at 4.2 V
    expected = sim_bench.truth.current_at(4.2, True)
    assert np.mean(amps) == pytest.approx(expected, abs=2e-5)
    assert len(set(volts)) > 1  # readback noise ~0.5 mV exists
    st = sim_bench.supply_state()
    assert st["mode"] == "cv" and st["output_v"] == pytest.approx(4.2, abs=1e-6)


def test_constant_current_mode(sim_bench, supply):
    truth = sim_bench.truth
    limit = 0.018
    supply.write(f"VOLT 5;CURR {limit}")
    supply.write("OUTP ON")
    v = float(supply.query("MEAS:VOLT?"))
    i = float(supply.query("MEAS:CURR?"))
    # the board draws 8 mA + 3 mA/V running: the rail settles where that equals the limit
    v_expected = (limit - sim_bench.model.current_osc_a) / sim_bench.model.current_osc_a_per_v
    assert v == pytest.approx(v_expected, abs=3e-3)
    assert i == pytest.approx(limit, abs=6e-5)
    assert truth.current_at(v, True) == pytest.approx(limit, abs=2e-5)
    assert int(supply.query("STAT:QUES:COND?")) & 2
    assert sim_bench.supply_state()["mode"] == "cc"
    supply.write("CURR 0.1")
    assert int(supply.query("STAT:QUES:COND?")) & 2 == 0


def test_over_voltage_protection_trips_and_latches(sim_bench, supply):
    supply.write("VOLT:PROT 6.0;:VOLT 5;:OUTP ON")
    assert supply.query("VOLT:PROT:TRIP?") == "0"
    supply.write("VOLT 6.5")
    assert supply.query("VOLT:PROT:TRIP?") == "1"
    assert supply.query("OUTP?") == "0"
    assert int(supply.query("STAT:QUES:COND?")) & 1
    assert float(supply.query("MEAS:VOLT?")) == pytest.approx(0.0, abs=3e-3)
    supply.write("VOLT 5;:OUTP ON")  # refused while latched
    code, _ = parse_error_response(supply.query("SYST:ERR?"))
    assert code == -221
    assert supply.query("VOLT:PROT:TRIP?") == "1"  # still latched after lowering setpoint
    supply.write("VOLT:PROT:CLE;:OUTP ON")
    assert supply.query("VOLT:PROT:TRIP?") == "0" and supply.query("OUTP?") == "1"
    assert float(supply.query("MEAS:VOLT?")) == pytest.approx(5.0, abs=3e-3)


def test_supply_limits_and_bounds(supply):
    supply.write("VOLT 31")
    assert parse_error_response(supply.query("SYST:ERR?"))[0] == -222
    assert float(supply.query("VOLT? MAX")) == 30.0
    supply.write("VOLT MAX")
    assert float(supply.query("VOLT?")) == 30.0
    supply.write("VOLT 2500 mV")
    assert float(supply.query("VOLT?")) == 2.5


def test_realtime_readback_shows_the_slew():
    """With a slow slew (100 V/s) a readback right after the step is mid-ramp."""
    import pyvisa

    from tests.conftest import set_nodelay

    phys = BenchPhysics(slew_v_per_s=100.0, settle_tau_s=1e-3)
    with SimulatedBench(board="beacon", seed=3, realtime=True, physics=phys) as sim:
        rm = pyvisa.ResourceManager("@py")
        try:
            s = rm.open_resource(sim.resources["supply"], read_termination="\n",
                                 write_termination="\n", timeout=2000)
            set_nodelay(s)
            s.write("VOLT 5;:OUTP ON")
            t0 = time.monotonic()
            first = float(s.query("MEAS:VOLT?"))
            assert first < 4.0  # 5 V at 100 V/s takes 50 ms
            deadline = t0 + 2.0
            last = first
            while time.monotonic() < deadline:  # bounded by time
                last = float(s.query("MEAS:VOLT?"))
                if abs(last - 5.0) < 3e-3:
                    break
                time.sleep(0.01)
            assert last == pytest.approx(5.0, abs=3e-3)
            assert time.monotonic() - t0 >= 0.045  # could not be settled before the ramp
            s.close()
        finally:
            rm.close()


def test_generator_settings_roundtrip(sim_bench, visa):
    gen = visa(sim_bench.resources["generator"])
    gen.write("FUNC TRI;FREQ 2.5KHZ;VOLT 0.3;VOLT:OFFS 0.1;:OUTP ON")
    assert gen.query("FUNC?") == "TRI"
    assert float(gen.query("FREQ?")) == 2500.0
    assert float(gen.query("VOLT?")) == pytest.approx(0.3)
    assert float(gen.query("VOLT:OFFS?")) == pytest.approx(0.1)
    assert gen.query("OUTP?") == "1"
    st = sim_bench.generator_state()
    assert st == {"output_on": True, "shape": "TRIangle", "freq_hz": 2500.0, "vpp_v": 0.3,
                  "offset_v": 0.1}
    gen.write("SOUR1:FUNC:SHAP SQUARE;:SOUR2:FREQ 1")
    assert gen.query("FUNC?") == "SQU"
    assert parse_error_response(gen.query("SYST:ERR?"))[0] == -114  # only source 1
    gen.write("FUNC NOISE")
    assert parse_error_response(gen.query("SYST:ERR?"))[0] == -141  # invalid character data
    gen.write("VOLT:OFFS 9.99")  # offset + amplitude/2 beyond 10 V
    assert parse_error_response(gen.query("SYST:ERR?"))[0] == -221


@pytest.mark.parametrize("shape", ["SIN", "SQU", "TRI"])
def test_generator_shapes_on_the_rail(sim_bench, visa, shape):
    sup, gen = visa(sim_bench.resources["supply"]), visa(sim_bench.resources["generator"])
    scope = visa(sim_bench.resources["scope"])
    # each server runs its own connection thread: *OPC? makes sure a setting has landed
    # before another instrument acts on it
    assert sup.query("VOLT 4.5;:OUTP ON;*OPC?") == "1"
    assert gen.query(f"FUNC {shape};FREQ 2000;VOLT 0.4;:OUTP ON;*OPC?") == "1"
    scope.write("SENS2:VOLT:RANG 0.8;RANG:OFFS 4.5;:SENS:SWE:TIME 2e-3;POIN 20000;:FORM ASC")
    scope.write("INIT")
    assert scope.query("*OPC?") == "1"
    rail = np.array(scope.query_ascii_values("TRAC? CH2"))
    t = np.arange(rail.size) * 1e-7
    assert np.ptp(rail) == pytest.approx(0.4, abs=0.012)
    assert rail.mean() == pytest.approx(4.5, abs=0.01)
    # reference: numpy FFT; the fundamental sits at the generator frequency
    spec = np.abs(np.fft.rfft(rail - rail.mean()))
    freqs = np.fft.rfftfreq(rail.size, t[1] - t[0])
    assert freqs[np.argmax(spec)] == pytest.approx(2000.0, abs=1.0)
    # form factors (handbook: sine rms = A/sqrt2, triangle A/sqrt3, square A)
    rms = np.sqrt(np.mean((rail - rail.mean()) ** 2))
    expected = {"SIN": 0.2 / np.sqrt(2), "SQU": 0.2, "TRI": 0.2 / np.sqrt(3)}[shape]
    assert rms == pytest.approx(expected, rel=0.03)


def test_readback_noise_level(sim_bench, supply):
    assert supply.query("VOLT 3.3;:OUTP ON;*OPC?") == "1"
    volts = np.array([float(supply.query("MEAS:VOLT?")) for _ in range(300)])
    # 0.5 mV rms noise through a 1 mV quantiser: sqrt(0.5^2 + 1^2/12) mV (quantisation
    # noise of a uniform quantiser is step^2/12, Widrow's rule, from memory)
    expected = math.sqrt(0.5e-3**2 + 1e-3**2 / 12)
    assert volts.std(ddof=1) == pytest.approx(expected, rel=0.2)
    assert volts.mean() == pytest.approx(3.3, abs=1e-4)
