"""Simulated oscilloscope over pyvisa-py: ADC, blocks, triggers, measurements, physics."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest
from scipy.signal import hilbert

from benchctl.scpi import parse_error_response
from benchctl.simulated import SimulatedBench


@pytest.fixture
def bench3(sim_bench, visa):
    r = sim_bench.resources
    return visa(r["supply"]), visa(r["generator"]), visa(r["scope"])


def _power(sup, rail_v=5.0):
    assert sup.query(f"VOLT {rail_v};CURR 0.1;:OUTP ON;*OPC?") == "1"


def _acquire(scope) -> None:
    scope.write("INIT")
    assert scope.query("*OPC?") == "1"


def _scaling(scope, ch):
    n, dt, t0, dy, y0 = scope.query(f"TRAC:SCAL? CH{ch}").split(",")
    return int(n), float(dt), float(t0), float(dy), float(y0)


def test_quantisation_blocks_and_scaling(bench3):
    sup, _, scope = bench3
    _power(sup)
    scope.write("SENS1:VOLT:RANG 4;:SENS:SWE:TIME 1e-4;POIN 4000")
    _acquire(scope)
    n, dt, t0, dy, y0 = _scaling(scope, 1)
    assert (n, dt, t0) == (4000, pytest.approx(2.5e-8), 0.0)
    assert dy == pytest.approx(4.0 / 256)  # 8 divisions over 256 codes of an 8-bit ADC
    scope.write("FORM ASC")
    volts = np.array(scope.query_ascii_values("TRAC? CH1"))
    codes = (volts - y0) / dy
    # every sample is an ADC code: on the grid, within -128..127
    assert np.allclose(codes, np.round(codes), atol=1e-4)
    assert codes.min() >= -128 and codes.max() <= 127
    scope.write("FORM INT,8")
    # reference: pyvisa's own IEEE 488.2 block reader (query_binary_values)
    b8 = scope.query_binary_values("TRAC? CH1", datatype="b", container=np.array)
    assert np.array_equal(b8, np.round(codes).astype(int))
    scope.write("FORM INT,16")
    b16 = scope.query_binary_values("TRAC? CH1", datatype="h", is_big_endian=True,
                                    container=np.array)
    assert np.array_equal(b16, b8.astype(np.int16) * 256)
    assert _scaling(scope, 1)[3] == pytest.approx(dy / 256)  # INT,16 carries code * 256
    scope.write("FORM:BORD SWAP")
    little = scope.query_binary_values("TRAC? CH1", datatype="h", is_big_endian=False,
                                       container=np.array)
    assert np.array_equal(little, b16)
    assert scope.query("FORM?;:FORM:BORD?") == "INT,16;SWAP"


def test_clipping_counts_and_matches_a_sine(sim_bench, bench3):
    sup, _, scope = bench3
    _power(sup)
    amp = sim_bench.truth.vpp_at(5.0) / 2
    span = amp  # full screen = amplitude: the screen edges sit at +/- amp/2
    scope.write(f"SENS1:VOLT:RANG {span};:SENS:SWE:TIME 2e-4;POIN 20000;:FORM INT,8")
    _acquire(scope)
    codes = scope.query_binary_values("TRAC? CH1", datatype="b", container=np.array)
    clipped = int(scope.query("TRAC:CLIP? CH1"))
    assert clipped == np.count_nonzero((codes == -128) | (codes == 127))
    # fraction of time |A sin| exceeds A/2: 1 - (2/pi) asin(1/2) = 2/3 (closed form of the
    # arcsine distribution of a sine, handbook)
    assert clipped / codes.size == pytest.approx(1 - 2 / math.pi * math.asin(0.5), abs=0.02)
    scope.write("SENS1:VOLT:RANG 8")
    _acquire(scope)
    assert int(scope.query("TRAC:CLIP? CH1")) == 0


def test_builtin_measurements_agree_with_the_record(sim_bench, bench3):
    sup, _, scope = bench3
    _power(sup, 4.4)
    scope.write("SENS1:VOLT:RANG 4;:SENS:SWE:TIME 2e-3;POIN 50000;:FORM ASC")
    _acquire(scope)
    v = np.array(scope.query_ascii_values("TRAC? CH1"))
    assert float(scope.query("FETC1:VOLT:PTP?")) == pytest.approx(np.ptp(v), rel=1e-6)
    assert float(scope.query("FETC1:VOLT:RMS?")) == pytest.approx(np.sqrt(np.mean(v**2)), rel=1e-6)
    f = float(scope.query("FETC1:FREQ?"))
    assert f == pytest.approx(sim_bench.truth.freq_at(4.4), abs=20.0)
    # a sine's rms is A / sqrt(2) (handbook); amplitude is half the true Vpp
    assert np.sqrt(np.mean(v**2)) == pytest.approx(sim_bench.truth.vpp_at(4.4) / 2 / math.sqrt(2),
                                                   rel=0.01)


def test_modulation_index_from_the_envelope(sim_bench, bench3):
    sup, gen, scope = bench3
    rail, gen_vpp, fm = 4.5, 0.6, 1000.0
    _power(sup, rail)
    assert gen.query(f"FUNC SIN;FREQ {fm};VOLT {gen_vpp};VOLT:OFFS 0;:OUTP ON;*OPC?") == "1"
    scope.write("SENS1:VOLT:RANG 4;:SENS2:VOLT:RANG 1;RANG:OFFS 4.5")
    scope.write("SENS:SWE:TIME 4e-3;POIN 160000;:TRIG:SOUR INT2;LEV 4.5;SLOP POS;:FORM INT,16")
    _acquire(scope)
    n, dt, t0, dy, y0 = _scaling(scope, 1)
    codes = scope.query_binary_values("TRAC? CH1", datatype="h", is_big_endian=True,
                                      container=np.array)
    v = codes * dy + y0
    t = t0 + np.arange(n) * dt
    env = np.abs(hilbert(v))  # reference library: scipy.signal.hilbert analytic envelope
    keep = slice(n // 20, -n // 20)
    basis = np.column_stack([np.ones(n), np.sin(2 * np.pi * fm * t), np.cos(2 * np.pi * fm * t)])
    c, *_ = np.linalg.lstsq(basis[keep], env[keep], rcond=None)
    m = math.hypot(c[1], c[2]) / c[0]
    assert m == pytest.approx(sim_bench.truth.modulation_index(rail, gen_vpp), rel=0.02)
    # the rail trigger at the rail's mean on a rising edge: the rail sine starts at phase 0
    assert abs(math.atan2(c[2], c[1])) < 0.05


def test_startup_transient_matches_truth(sim_bench, bench3):
    sup, _, scope = bench3
    truth = sim_bench.truth
    assert sup.query("VOLT 5;CURR 0.1;:OUTP OFF;*OPC?") == "1"
    scope.write(f"SENS1:VOLT:RANG 4;:SENS2:VOLT:RANG 8;RANG:OFFS 3;:TRIG:SOUR INT2;"
                f"LEV {truth.startup_v};SLOP POS;:SENS:SWE:TIME 4e-3;POIN 100000")
    scope.write("INIT")
    assert int(scope.query("STAT:OPER:COND?")) & 16  # armed, waiting for the rail
    assert sup.query("OUTP ON;*OPC?") == "1"
    assert scope.query("*OPC?") == "1"
    scope.write("FORM INT,8")
    n, dt, t0, dy, y0 = _scaling(scope, 1)
    assert t0 == pytest.approx(-0.4e-3)  # 10 % pre-trigger
    out = scope.query_binary_values("TRAC? CH1", datatype="b", container=np.array) * dy + y0
    _, _, _, dy2, y02 = _scaling(scope, 2)
    rail = scope.query_binary_values("TRAC? CH2", datatype="b", container=np.array) * dy2 + y02
    t = t0 + np.arange(n) * dt
    # the rail steps: below the level before the trigger, at 5 V at the end
    assert rail[: int(0.3e-3 / dt)].max() < truth.startup_v
    assert np.median(rail[-1000:]) == pytest.approx(5.0, abs=0.05)
    env = np.abs(hilbert(out))
    kernel = np.ones(50) / 50  # smooth over ~2 carrier cycles
    env = np.convolve(env, kernel, mode="same")
    final = np.median(env[-20000:-100])
    assert final == pytest.approx(truth.vpp_at(5.0) / 2, rel=0.01)
    i90 = int(np.argmax(env > 0.9 * final))
    # the trigger sits where the rail crosses startup_v, i.e. where growth begins
    assert t[i90] == pytest.approx(truth.startup_time_s(5.0), rel=0.03)
    assert env[int((0.2e-3 - t0) / dt)] < 0.01 * final  # still tiny early on (exponential)


def test_records_are_reproducible_by_fingerprint(visa):
    def run(prefix_other: bool):
        with SimulatedBench(board="beacon", seed=7) as sim:
            sup, scope = visa(sim.resources["supply"]), visa(sim.resources["scope"])
            _power(sup)
            scope.write("SENS1:VOLT:RANG 4;:SENS:SWE:TIME 1e-4;POIN 5000;:FORM INT,8")
            if prefix_other:  # an unrelated acquisition first: another fingerprint
                scope.write("SENS:SWE:POIN 3000")
                _acquire(scope)
                scope.write("SENS:SWE:POIN 5000")
            out = []
            for _ in range(2):
                _acquire(scope)
                out.append(scope.query_binary_values("TRAC? CH1", datatype="b",
                                                     container=np.array))
            return out

    a1, a2 = run(False)
    b1, b2 = run(True)
    assert np.array_equal(a1, b1) and np.array_equal(a2, b2)
    assert not np.array_equal(a1, a2)  # the second acquisition has its own noise and phase


def test_edge_trigger_on_output_gives_repeatable_phase(sim_bench, bench3):
    sup, _, scope = bench3
    _power(sup)
    scope.write("SENS1:VOLT:RANG 4;:TRIG:SOUR INT1;LEV 0.2;SLOP POS;"
                ":SENS:SWE:TIME 1e-5;POIN 2000;:FORM ASC")
    firsts = []
    for _ in range(3):
        _acquire(scope)
        n, dt, t0, _, _ = _scaling(scope, 1)
        v = np.array(scope.query_ascii_values("TRAC? CH1"))
        k = int(round(-t0 / dt))
        assert v[k - 3] < 0.2 < v[k + 3]  # rising through the level at the trigger point
        firsts.append(v[: k + 50])
    # same phase every time (noise aside): records agree to a few LSB
    assert np.max(np.abs(firsts[0] - firsts[1])) < 0.1
    assert np.max(np.abs(firsts[0] - firsts[2])) < 0.1


def test_status_abort_and_errors(sim_bench, bench3):
    sup, _, scope = bench3
    scope.write("TRAC? CH1")
    assert parse_error_response(scope.query("SYST:ERR?"))[0] == -230  # nothing acquired yet
    _power(sup)
    scope.write("TRIG:SOUR INT1;LEV 3.9")  # above the output: never triggers
    scope.write("INIT")
    assert int(scope.query("STAT:OPER:COND?")) == 16
    scope.write("INIT")
    assert parse_error_response(scope.query("SYST:ERR?"))[0] == -213
    scope.write("ABOR")
    assert int(scope.query("STAT:OPER:COND?")) == 0
    scope.write("TRIG:SOUR IMM;:INP2 OFF;:INIT")
    assert scope.query("*OPC?") == "1"
    scope.write("TRAC? CH2")
    assert parse_error_response(scope.query("SYST:ERR?"))[0] == -221
    scope.write("TRAC? CH3")
    assert parse_error_response(scope.query("SYST:ERR?"))[0] == -224
    scope.write("SENS3:VOLT:RANG 1")
    assert parse_error_response(scope.query("SYST:ERR?"))[0] == -114
    assert scope.query("TRIG:SOUR?") == "IMM"


def test_untriggerable_acquisition_auto_triggers(sim_bench, bench3):
    sup, _, scope = bench3
    _power(sup)
    scope.write("TRIG:SOUR INT1;LEV 3.9;:SENS:SWE:TIME 1e-4;POIN 1000;:INIT")
    t0 = time.monotonic()
    assert scope.query("*OPC?") == "1"  # after the 1 s auto-trigger wait
    assert 0.9 <= time.monotonic() - t0 < 1.9
    assert int(scope.query("TRAC:SCAL? CH1").split(",")[0]) == 1000


def test_continuous_acquisition_gives_new_records(bench3):
    sup, _, scope = bench3
    _power(sup)
    scope.write("SENS:SWE:TIME 1e-5;POIN 500;:FORM INT,8;:INIT:CONT ON")
    assert scope.query("INIT:CONT?") == "1"
    recs = []
    for _ in range(3):
        assert scope.query("*OPC?") == "1"
        recs.append(scope.query_binary_values("TRAC? CH1", datatype="b", container=np.array))
    assert not np.array_equal(recs[0], recs[1]) and not np.array_equal(recs[1], recs[2])
    scope.write("ABOR")
    assert scope.query("INIT:CONT?") == "0"


def test_realtime_acquisition_takes_its_window(visa):
    with SimulatedBench(board="beacon", seed=2, realtime=True) as sim:
        scope = visa(sim.resources["scope"])
        scope.write("SENS:SWE:TIME 0.05;POIN 1000")
        t0 = time.monotonic()
        scope.write("INIT")
        assert scope.query("*OPC?") == "1"
        elapsed = time.monotonic() - t0
        # record window 50 ms + 2 ms re-arm overhead (our scope's numbers)
        assert 0.05 <= elapsed < 1.0


def test_ac_coupling_removes_the_rail_dc(bench3):
    sup, _, scope = bench3
    _power(sup)
    scope.write("INP2:COUP AC;:SENS2:VOLT:RANG 0.2;:SENS:SWE:TIME 1e-4;POIN 2000;:FORM ASC")
    _acquire(scope)
    rail = np.array(scope.query_ascii_values("TRAC? CH2"))
    assert abs(rail.mean()) < 2e-3 and int(scope.query("TRAC:CLIP? CH2")) == 0
    assert scope.query("INP2:COUP?") == "AC"


def test_amplifier_board_driven_by_the_generator(visa):
    with SimulatedBench(board="buffer", seed=1) as sim:
        assert sim.wiring_generator == "input"
        sup, gen, scope = (visa(sim.resources[r]) for r in ("supply", "generator", "scope"))
        _power(sup, 5.0)
        assert gen.query("FUNC SIN;FREQ 10000;VOLT 0.2;:OUTP ON;*OPC?") == "1"
        scope.write("SENS1:VOLT:RANG 2;:SENS:SWE:TIME 1e-3;POIN 20000;:FORM ASC")
        _acquire(scope)
        v = np.array(scope.query_ascii_values("TRAC? CH1"))
        t = np.arange(v.size) * 5e-8
        basis = np.column_stack([np.ones_like(t), np.sin(2e4 * np.pi * t), np.cos(2e4 * np.pi * t)])
        c, *_ = np.linalg.lstsq(basis, v, rcond=None)  # reference: numpy least squares sine fit
        gain = sim.truth.gain_at(5.0)
        assert 2 * math.hypot(c[1], c[2]) == pytest.approx(gain * 0.2, rel=0.01)
        assert gen.query("VOLT 3;*OPC?") == "1"  # drive far past the swing: clips
        scope.write("SENS1:VOLT:RANG 8")
        _acquire(scope)
        v = np.array(scope.query_ascii_values("TRAC? CH1"))
        assert np.ptp(v) == pytest.approx(sim.truth.swing_vpp_at(5.0), rel=0.03)
        assert np.ptp(v) < gain * 3


def test_a_revisited_setpoint_reproduces_on_a_fresh_bench(visa):
    """A resumed run measures the second visit of a setpoint on a fresh bench first."""

    def run(path_v: list[float]) -> list[np.ndarray]:
        with SimulatedBench(board="beacon", seed=9) as sim:
            sup, scope = visa(sim.resources["supply"]), visa(sim.resources["scope"])
            scope.write("SENS1:VOLT:RANG 4;:SENS:SWE:TIME 1e-4;POIN 4000;:FORM INT,8")
            out = []
            for v in path_v:
                _power(sup, v)
                _acquire(scope)
                out.append(scope.query_binary_values("TRAC? CH1", datatype="b",
                                                     container=np.array))
                assert float(sup.query("MEAS:VOLT?")) == pytest.approx(v, abs=3e-3)
            _acquire(scope)  # a repeat within the same visit has its own noise
            out.append(scope.query_binary_values("TRAC? CH1", datatype="b", container=np.array))
            return out

    whole = run([4.0, 4.4, 4.0])
    resumed = run([3.0, 4.0])  # a different way to the same setpoint
    assert np.array_equal(whole[2], resumed[1])
    assert np.array_equal(whole[3], resumed[2])
    assert not np.array_equal(resumed[1], resumed[2])


@pytest.mark.parametrize("fm_hz", [2e3, 50e3])
def test_envelope_follows_a_first_order_bandwidth(sim_bench, bench3, fm_hz):
    """The board's envelope responds like a first-order low-pass (50 kHz in beacon.toml)."""
    sup, gen, scope = bench3
    rail, gen_vpp = 4.4, 0.4
    _power(sup, rail)
    assert gen.query(f"FUNC SIN;FREQ {fm_hz};VOLT {gen_vpp};:OUTP ON;*OPC?") == "1"
    window = 20 / fm_hz if fm_hz > 10e3 else 4e-3
    scope.write(f"SENS1:VOLT:RANG 4;:SENS:SWE:TIME {window};POIN {int(window * 40e6)};"
                ":FORM INT,16")
    _acquire(scope)
    n, dt, t0, dy, y0 = _scaling(scope, 1)
    v = scope.query_binary_values("TRAC? CH1", datatype="h", is_big_endian=True,
                                  container=np.array) * dy + y0
    t = t0 + np.arange(n) * dt
    env = np.abs(hilbert(v))  # reference: scipy.signal.hilbert
    keep = slice(n // 10, -n // 10)
    basis = np.column_stack([np.ones(n), np.sin(2 * np.pi * fm_hz * t),
                             np.cos(2 * np.pi * fm_hz * t)])
    c, *_ = np.linalg.lstsq(basis[keep], env[keep], rcond=None)
    m = math.hypot(c[1], c[2]) / c[0]
    # first-order low-pass magnitude |H| = 1 / sqrt(1 + (f / fc)^2) (circuit-theory handbook)
    fc = sim_bench.model.envelope_bandwidth_hz
    expected = sim_bench.truth.modulation_index(rail, gen_vpp) / math.sqrt(1 + (fm_hz / fc) ** 2)
    assert m == pytest.approx(expected, rel=0.02)


def test_hysteresis_between_dropout_and_startup(sim_bench, bench3):
    sup, _, scope = bench3
    truth = sim_bench.truth
    mid = 0.5 * (truth.dropout_v + truth.startup_v)  # inside the hysteresis band
    scope.write("SENS1:VOLT:RANG 2;:SENS:SWE:TIME 1e-4;POIN 4000")

    def rms_at(v: float) -> float:
        _power(sup, v)
        _acquire(scope)
        return float(scope.query("FETC1:VOLT:RMS?"))

    from_below = rms_at(mid)  # 0 V -> mid: never reached start-up
    rms_at(5.0)
    from_above = rms_at(mid)  # 5 V -> mid: still running
    # a running sine of Vpp has rms Vpp / (2 sqrt 2) (handbook)
    assert from_above == pytest.approx(truth.vpp_at(mid) / (2 * math.sqrt(2)), rel=0.03)
    # a stopped board leaves noise only: 2 mV board noise, 0.25 LSB scope noise, and the
    # quantiser's LSB/sqrt(12) at 2 V full screen (~3.5 mV in all)
    assert from_below < 0.05 * from_above
    below = rms_at(truth.dropout_v - 0.05)  # under dropout it stops ...
    assert below < 0.05 * from_above
    assert rms_at(mid) < 0.05 * from_above  # ... and stays stopped on the way back up
    assert sim_bench.board_state()["oscillating"] is False


def test_table_board_replays_its_csv(visa):
    from benchctl.simulated.models import BOARDS_DIR, read_table

    table = read_table(BOARDS_DIR / "replay.csv", file="replay.csv")
    with SimulatedBench(board="replay", seed=1) as sim:
        sup, scope = visa(sim.resources["supply"]), visa(sim.resources["scope"])
        scope.write("SENS1:VOLT:RANG 4;:SENS:SWE:TIME 2e-4;POIN 8000")
        for rail in (3.6, 4.5, 5.3):
            _power(sup, rail)
            _acquire(scope)
            rms = float(scope.query("FETC1:VOLT:RMS?"))
            # reference: numpy.interp on the user's table; a sine's rms is Vpp / (2 sqrt 2)
            vpp = float(np.interp(rail, table["rail_v"], table["vpp_v"]))
            assert rms == pytest.approx(vpp / (2 * math.sqrt(2)), rel=0.02)
            amps = float(sup.query("MEAS:CURR?"))
            assert amps == pytest.approx(np.interp(rail, table["rail_v"], table["current_a"]),
                                         abs=1e-4)
