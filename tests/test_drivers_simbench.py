"""Every driver operation against the simulated bench, over pyvisa-py sockets on 127.0.0.1,
and every fault of the simulated bench surfacing as the right typed exception in time.

Expected values come from the simulated board's analytic truth (``sim.truth``), the
simulated instruments' state (``sim.supply_state()``...) and the command log, so the tests
check what went over the wire and what the driver made of the answer.
"""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from benchctl.drivers import load_bench_text, open_bench
from benchctl.drivers.scope import dominant_frequency
from benchctl.errors import (
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    ProtocolError,
    SafetyError,
)


class FakeClock:
    """Injected clock: sleeping advances it, nothing waits."""

    def __init__(self) -> None:
        self.now_s = 0.0
        self.sleeps: list[float] = []

    def __call__(self) -> float:
        return self.now_s

    def sleep(self, seconds: float) -> None:
        self.sleeps.append(seconds)
        self.now_s += seconds


@pytest.fixture(params=["scpi1999", "simbench"])
def bench(sim_bench, request):
    cfg = load_bench_text(sim_bench.bench_toml(dialect=request.param))
    with open_bench(cfg, max_voltage_v=6.0) as b:
        yield sim_bench, b


@pytest.fixture
def fast(sim_bench):
    cfg = load_bench_text(sim_bench.bench_toml(dialect="simbench"))
    with open_bench(cfg, max_voltage_v=6.0) as b:
        for inst in b.instruments.values():
            inst.transport.timeout_s = 0.3
        yield sim_bench, b


def _power_up(b, rail_v: float = 5.0) -> None:
    b.supply.set_current_limit(0.1)
    b.supply.set_ovp(6.5)
    b.supply.set_voltage(rail_v)
    b.supply.output(True)
    b.supply.wait_settled(rail_v, tol_v=0.02, timeout_s=2.0)


def test_open_bench_identifies_every_role(bench) -> None:
    sim, b = bench
    assert b.idn["supply"].model == "SIM-DC-SUPPLY"
    assert b.idn["scope"].maker == "benchctl"
    for role in ("supply", "generator", "scope"):
        assert sim.command_log(role)[0] == "*IDN?"  # the probe comes first


def test_supply_operations(bench) -> None:
    sim, b = bench
    s = b.supply
    s.set_current_limit(0.1)
    s.set_ovp(6.5)
    s.set_voltage(5.0)
    s.output(True)
    settled = s.wait_settled(5.0, tol_v=0.02, timeout_s=2.0)
    state = sim.supply_state()
    assert (state["setpoint_v"], state["current_limit_a"], state["ovp_v"], state["output_on"]) == (5.0, 0.1, 6.5, True)
    assert settled == pytest.approx(state["output_v"], abs=0.02)
    assert s.get_voltage() == 5.0 and s.get_current_limit() == 0.1 and s.get_ovp() == 6.5
    assert s.is_output_on() is True and s.protection_tripped() is False
    assert s.measure_voltage() == pytest.approx(state["output_v"], abs=0.02)
    assert s.measure_current() == pytest.approx(sim.supply_state()["current_a"], rel=0.05, abs=1e-4)
    s.output(False)
    assert sim.supply_state()["output_on"] is False


def test_supply_refuses_unsafe_setpoints_before_sending(bench) -> None:
    sim, b = bench
    n = len(sim.command_log("supply"))
    for bad_v in (6.0001, 100.0, -0.1, math.nan, math.inf):
        with pytest.raises(SafetyError):
            b.supply.set_voltage(bad_v)
    with pytest.raises(SafetyError):
        b.supply.ramp_to(6.5, rate_v_per_s=5.0)
    with pytest.raises(SafetyError):
        b.supply.set_current_limit(0.0)
    assert len(sim.command_log("supply")) == n
    assert sim.supply_state()["setpoint_v"] == 0.0


def test_ramp_keeps_to_the_rate_limit(sim_bench) -> None:
    clock = FakeClock()
    cfg = load_bench_text(sim_bench.bench_toml())
    with open_bench(cfg, max_voltage_v=6.0, clock=clock, sleep=clock.sleep) as b:
        b.supply.ramp_to(5.0, rate_v_per_s=10.0, step_v=0.25)
        sent = [c for c in sim_bench.command_log("supply") if c.startswith("SOURce:VOLTage ")]
        steps_v = [float(c.split()[1]) for c in sent]
        assert len(steps_v) == 20 and steps_v[-1] == 5.0
        assert np.all(np.diff([0.0, *steps_v]) <= 0.25 + 1e-9)
        # 19 pauses of 0.25 V / 10 V/s between 20 steps (the clock does not move otherwise)
        assert clock.now_s == pytest.approx(19 * 0.025, rel=1e-9)
        assert sim_bench.supply_state()["setpoint_v"] == 5.0
        b.supply.ramp_to(4.0, rate_v_per_s=10.0, step_v=0.25)  # back-to-back: first step waits
        assert clock.sleeps[19] == pytest.approx(0.025, rel=1e-9)
        assert sim_bench.supply_state()["setpoint_v"] == 4.0


def test_wait_settled_times_out_with_the_last_reading(fast) -> None:
    sim, b = fast
    _power_up(b, 5.0)
    t0 = time.monotonic()
    with pytest.raises(InstrumentTimeout, match=r"not settled at 3 V") as info:
        b.supply.wait_settled(3.0, tol_v=0.01, timeout_s=0.2)
    assert time.monotonic() - t0 < 1.5
    last_v = float(str(info.value).split("last reading ")[1].split(" V")[0])
    assert last_v == pytest.approx(5.0, abs=0.02)  # readback noise: not exactly 5


def test_overvoltage_trip_and_clear(fast) -> None:
    sim, b = fast
    _power_up(b, 5.0)
    sim.inject("supply", "trip_ovp")
    assert b.supply.protection_tripped() is True
    assert b.supply.is_output_on() is False  # the trip forces the output off
    b.supply.clear_protection()
    assert b.supply.protection_tripped() is False and sim.supply_state()["tripped"] is False


def test_generator_operations(bench) -> None:
    sim, b = bench
    g = b.generator
    g.set_shape("sine")
    g.set_frequency(1_000.0)
    g.set_amplitude(0.2)
    g.set_offset(0.0)
    g.output(True)
    st = sim.generator_state()
    assert st["output_on"] is True and st["freq_hz"] == 1_000.0 and st["vpp_v"] == 0.2
    assert st["offset_v"] == 0.0 and st["shape"].upper().startswith("SIN")
    assert g.frequency() == 1_000.0 and g.amplitude() == 0.2 and g.offset() == 0.0
    assert g.is_output_on() is True
    g.set_shape("square")
    g.sync()  # fast mode: a write is not waited for; *OPC? makes sure it was done
    assert sim.generator_state()["shape"].upper().startswith("SQU")
    g.output(False)
    assert sim.generator_state()["output_on"] is False


def test_scope_fetch_formats_agree_and_match_the_board(bench) -> None:
    sim, b = bench
    _power_up(b, 5.0)
    sc, ch = b.scope, b.wiring.output_channel
    res = sc.autoscale(ch, cycles=8, points=8_000)
    truth = sim.truth
    assert res.freq_hz == pytest.approx(truth.freq_at(5.0), rel=2e-3)
    sc.acquire(timeout_s=2.0)
    waves = {t: sc.fetch(ch, transfer=t) for t in ("int16", "int8", "ascii")}
    ref = waves["int16"]
    assert ref.volts.size == 8_000 and ref.clipped_samples == 0
    assert ref.dt_s == pytest.approx(res.window_s / 8_000, rel=1e-6)
    lsb_v = 8 * res.scale_v_div / 256
    for t in ("int8", "ascii"):
        np.testing.assert_allclose(waves[t].volts, ref.volts, atol=lsb_v * 1e-3 + 1e-6)
        assert waves[t].dt_s == ref.dt_s and waves[t].t0_s == ref.t0_s
    # a sine's peak-to-peak is 2*sqrt(2) times its RMS (any circuits handbook)
    vpp_from_rms = 2 * math.sqrt(2) * float(np.std(ref.volts))
    assert vpp_from_rms == pytest.approx(truth.vpp_at(5.0), rel=0.03)
    assert dominant_frequency(ref.volts, ref.dt_s) == pytest.approx(truth.freq_at(5.0), rel=2e-3)
    # the peaks sit at about 6 of the 8 divisions (common practice, no published source)
    assert 5.0 <= truth.vpp_at(5.0) / res.scale_v_div <= 6.5


def test_scope_clip_count_matches_the_instrument(bench) -> None:
    sim, b = bench
    _power_up(b, 5.0)
    sc, ch = b.scope, b.wiring.output_channel
    sc.setup_channel(ch, scale_v_div=0.02)  # a 0.16 V screen for a volts-level output
    sc.set_timebase(window_s=2e-5, sample_rate_hz=2e8)
    sc.set_trigger(source="free")
    sc.acquire(timeout_s=2.0)
    wf = sc.fetch(ch)
    assert wf.clipped and wf.clipped_samples == int(sc.ask("clipped", channel=ch))


def test_scope_rail_channel_sees_the_supply(bench) -> None:
    sim, b = bench
    _power_up(b, 4.0)
    sc, ch = b.scope, b.wiring.rail_channel
    sc.setup_channel(ch, scale_v_div=1.0, offset_v=4.0, coupling="dc", probe=1.0)
    sc.set_timebase(window_s=1e-5, sample_rate_hz=1e8)
    sc.set_trigger(source=ch, level_v=2.0, slope="rising")
    sc.set_trigger(source="free")
    sc.acquire(timeout_s=2.0)
    wf = sc.fetch(ch)
    # the rail carries only the small ripple of the board current; 8 V screen, LSB 31 mV
    assert float(np.mean(wf.volts)) == pytest.approx(sim.supply_state()["output_v"], abs=0.05)


def test_reset_clear_sync(bench) -> None:
    sim, b = bench
    _power_up(b, 5.0)
    b.supply.reset()
    # *RST puts OUTPut:STATe to OFF (SCPI-1999 vol. 2, OUTPut subsystem *RST value, from memory)
    assert sim.supply_state()["output_on"] is False
    b.scope.clear()
    b.scope.sync(timeout_s=1.0)
    assert sim.command_log("scope")[-1] == "*OPC?"


def test_queued_error_strict_names_the_command(sim_bench) -> None:
    cfg = load_bench_text(sim_bench.bench_toml())
    with open_bench(cfg, max_voltage_v=6.0, strict=True) as b:
        b.supply.set_voltage(1.0)  # clean
        sim_bench.inject("supply", "push_error", code=-310, message="System error")
        with pytest.raises(InstrumentError) as info:
            b.supply.set_voltage(2.0)
        assert info.value.code == -310 and info.value.command == "SOURce:VOLTage 2"
        assert info.value.resource == b.supply.resource
        b.supply.set_voltage(2.5)  # the queue was drained: no stale error


def test_queued_error_fast_mode_at_a_point_of_consequence(fast) -> None:
    sim, b = fast
    b.supply.set_voltage(1.0)
    sim.inject("supply", "push_error", code=-222, message="Data out of range")
    b.supply.set_voltage(1.5)  # not checked yet in fast mode
    with pytest.raises(InstrumentError) as info:
        b.supply.output(True)
    assert info.value.code == -222 and "SOURce:VOLTage 1.5" in info.value.command


def test_settling_and_completion_read_the_error_queue_in_the_same_message(fast) -> None:
    sim, b = fast
    _power_up(b, 4.0)
    b.supply.set_voltage(4.5)
    sim.inject("supply", "push_error", code=-222, message="Data out of range")
    n = len(sim.command_log("supply"))
    with pytest.raises(InstrumentError) as info:
        b.supply.wait_settled(4.5, tol_v=0.02, timeout_s=2.0)
    assert info.value.code == -222 and "SOURce:VOLTage 4.5" in info.value.command
    assert "MEASure:VOLTage:DC?;:SYSTem:ERRor:NEXT?" in sim.command_log("supply")[n:]
    assert b.supply.drain_errors() == []  # read empty
    assert b.supply.wait_settled(4.5, tol_v=0.02, timeout_s=2.0) == pytest.approx(4.5, abs=0.02)
    sc = b.scope
    sc.set_timebase(window_s=1e-5, sample_rate_hz=1e8)
    sc.arm()
    sim.inject("scope", "push_error", code=-222, message="Data out of range")
    n = len(sim.command_log("scope"))
    with pytest.raises(InstrumentError) as info:
        sc.wait_complete(timeout_s=2.0)
    assert info.value.code == -222
    assert "*OPC?;:SYSTem:ERRor:NEXT?" in sim.command_log("scope")[n:]


def test_arm_reads_the_error_queue_in_the_same_message(fast) -> None:
    sim, b = fast
    _power_up(b, 5.0)
    sc = b.scope
    sc.set_timebase(window_s=1e-5, sample_rate_hz=1e8)
    n = len(sim.command_log("scope"))
    sc.arm()
    assert sim.command_log("scope")[n:] == ["INITiate:IMMediate;:SYSTem:ERRor:NEXT?"]
    sc.wait_complete(timeout_s=2.0)
    # an error left by a set-up command surfaces at the arm and names what was sent since
    # the last check (the set-up, then the arm)
    sc.set_trigger(source="free")
    sim.inject("scope", "push_error", code=-222, message="Data out of range")
    with pytest.raises(InstrumentError) as info:
        sc.arm()
    assert info.value.code == -222 and "INITiate:IMMediate" in info.value.command
    assert "TRIGger" in info.value.command
    assert sc.drain_errors() == []  # read empty
    sc.wait_complete(timeout_s=2.0)  # the scope armed all the same; the session is in step
    sc.arm()
    assert sc.wait_and_fetch(b.wiring.output_channel, timeout_s=2.0).volts.size > 0


def test_readback_and_the_protection_check_are_one_message_each(sim_bench) -> None:
    sim = sim_bench
    cfg = load_bench_text(sim.bench_toml())
    for strict in (False, True):
        with open_bench(cfg, max_voltage_v=6.0, strict=strict) as b:
            _power_up(b, 4.0)
            n = len(sim.command_log("supply"))
            volts, amps = b.supply.readback()
            sent = sim.command_log("supply")[n:]
            # 1 mV readback resolution and 0.5 mV noise (our supply's numbers); the current
            # is the board's running law at 4 V, within the 10 uA resolution and noise
            assert volts == pytest.approx(4.0, abs=3e-3)
            assert amps == pytest.approx(sim.truth.current_at(4.0, True), abs=1e-4)
            n = len(sim.command_log("supply"))
            assert b.supply.protection_checked() is False
            checked = sim.command_log("supply")[n:]
            if strict:  # one query each, every one followed by the error queue
                assert sent[0] == "MEASure:VOLTage:DC?" and "MEASure:CURRent:DC?" in sent
                assert "SYSTem:ERRor:NEXT?" in sent
            else:
                assert sent == ["MEASure:VOLTage:DC?;:MEASure:CURRent:DC?"]
                assert checked == ["SOURce:VOLTage:PROTection:TRIPped?;:SYSTem:ERRor:NEXT?"]
            b.supply.set_voltage(4.1)
            sim.inject("supply", "push_error", code=-222, message="Data out of range")
            with pytest.raises(InstrumentError) as info:
                b.supply.protection_checked()
            assert info.value.code == -222
            assert b.supply.drain_errors() == []
            sim.inject("supply", "trip_ovp")
            assert b.supply.protection_checked() is True
            b.supply.clear_protection()
            b.supply.output(False)


def test_fault_delay_is_a_timeout_then_the_session_recovers(fast) -> None:
    sim, b = fast
    b.supply.query_retries = 0
    sim.inject("supply", "delay", seconds=0.6, count=1)
    t0 = time.monotonic()
    with pytest.raises(InstrumentTimeout):
        b.supply.measure_voltage()
    assert time.monotonic() - t0 < 1.5
    time.sleep(0.7)  # the late reply arrives; it must not answer the next question
    assert b.supply.get_current_limit() == sim.supply_state()["current_limit_a"]


def test_fault_drop_is_connection_lost(fast) -> None:
    sim, b = fast
    sim.inject("supply", "drop_after", n=1)
    b.supply.set_voltage(1.0)  # the last message it takes
    t0 = time.monotonic()
    with pytest.raises(ConnectionLost):
        b.supply.measure_voltage()
    assert time.monotonic() - t0 < 2.0


def test_fault_stall_is_a_timeout(fast) -> None:
    sim, b = fast
    b.scope.query_retries = 0
    sim.inject("scope", "stall")
    t0 = time.monotonic()
    with pytest.raises(InstrumentTimeout):
        b.scope.scaling(1)
    assert time.monotonic() - t0 < 2.0


def test_fault_truncated_reply_is_a_timeout(fast) -> None:
    sim, b = fast
    b.supply.query_retries = 0
    sim.inject("supply", "truncate", count=1)
    with pytest.raises(InstrumentTimeout):
        b.supply.get_voltage()
    assert b.supply.get_ovp() == sim.supply_state()["ovp_v"]  # next exchange is clean


@pytest.mark.parametrize("mode", ["length", "garbage"])
def test_fault_corrupt_block_is_a_protocol_error(fast, mode: str) -> None:
    sim, b = fast
    sc = b.scope
    sc.setup_channel(1, scale_v_div=0.5)
    sc.set_timebase(window_s=1e-5, sample_rate_hz=1e9)
    sc.acquire(timeout_s=2.0)
    good = sc.fetch(1)
    sim.inject("scope", "corrupt_block", count=1, mode=mode)
    t0 = time.monotonic()
    with pytest.raises(ProtocolError):
        sc.fetch(1)
    assert time.monotonic() - t0 < 2.0
    again = sc.fetch(1)  # the session resynchronises
    np.testing.assert_array_equal(again.volts, good.volts)


def test_rejected_query_is_an_instrument_error_not_a_bare_timeout(sim_bench, tmp_path) -> None:
    # A dialect with a misspelt query: the instrument queues -113 "Undefined header" and
    # sends nothing (IEEE 488.2-1992 6.1.6 / SCPI-1999 vol. 2 21.8.4, from memory).
    (tmp_path / "typo.toml").write_text(
        '[dialect]\nextends = "scpi1999"\n[supply]\nmeasure_voltage = { query = "MEASure:VOLTage:DCC?" }\n',
        encoding="utf-8",
    )
    text = sim_bench.bench_toml().replace('dialect = "scpi1999"', 'dialect = "typo.toml"', 1)
    cfg = load_bench_text(text, base_dir=tmp_path)
    for strict in (False, True):
        with open_bench(cfg, max_voltage_v=6.0, strict=strict) as b:
            b.supply.transport.timeout_s = 0.3
            b.supply.query_retries = 0
            with pytest.raises(InstrumentError) as info:
                b.supply.measure_voltage()
            assert info.value.code == -113 and "MEASure:VOLTage:DCC?" in info.value.command


def test_discover_against_the_simulated_bench(sim_bench) -> None:
    import io
    import json

    from rich.console import Console

    from benchctl.cli import main

    buf = io.StringIO()
    resources = list(sim_bench.resources.values())
    code = main(["discover", "--no-scan", "--json", *resources], Console(file=buf, width=300))
    assert code == 0
    rows = json.loads(buf.getvalue())["resources"]
    assert [r["resource"] for r in rows] == resources
    assert [r["model"] for r in rows] == ["SIM-DC-SUPPLY", "SIM-FUNC-GEN", "SIM-SCOPE-2CH"]
    assert all(r["ok"] and r["maker"] == "benchctl" for r in rows)


def test_autoscale_of_a_board_that_is_off_settles_without_a_frequency(fast) -> None:
    sim, b = fast
    res = b.scope.autoscale(b.wiring.output_channel, cycles=5, timeout_s=2.0)
    assert math.isnan(res.freq_hz)
    assert res.scale_v_div >= 1e-3 and res.acquisitions <= 6
    assert res.window_s == pytest.approx(0.1)  # 1 ms grown x10 twice, then kept


def test_fetch_before_any_acquisition_says_why(fast) -> None:
    sim, b = fast
    b.scope.query_retries = 0
    with pytest.raises(InstrumentError) as info:
        b.scope.fetch(1)
    assert info.value.code == -230  # "Data corrupt or stale" (SCPI-1999 vol. 2, 21.8.9, from memory)
    assert "TRACe:DATA? CH1" in info.value.command


def test_fast_fetch_is_one_exchange_strict_fetch_is_checked(sim_bench) -> None:
    cfg = load_bench_text(sim_bench.bench_toml())
    for strict in (False, True):
        with open_bench(cfg, max_voltage_v=6.0, strict=strict) as b:
            sc = b.scope
            sc.setup_channel(1, scale_v_div=0.5)
            sc.set_timebase(window_s=1e-5, sample_rate_hz=1e9)
            sc.acquire(timeout_s=2.0)
            sc.fetch(1)  # the first fetch also sends the transfer format
            n = len(sim_bench.command_log("scope"))
            wf = sc.fetch(1)
            sent = sim_bench.command_log("scope")[n:]
            assert wf.volts.size == 10_000
            if strict:
                assert "TRACe:SCALing? CH1" in sent and "TRACe:DATA? CH1" in sent
                assert "SYSTem:ERRor:NEXT?" in sent
            else:
                assert sent == ["TRACe:SCALing? CH1;:TRACe:DATA? CH1"]


def test_wait_and_fetch_is_one_exchange_and_gives_the_record_fetch_gives(fast) -> None:
    sim, b = fast
    _power_up(b, 5.0)
    sc, ch = b.scope, b.wiring.output_channel
    sc.setup_channel(ch, scale_v_div=0.5)
    sc.set_timebase(window_s=1e-5, sample_rate_hz=1e9)
    sc.set_trigger(source="free")
    sc.arm()
    n = len(sim.command_log("scope"))
    wf = sc.wait_and_fetch(ch, timeout_s=2.0)
    sent = sim.command_log("scope")[n:]
    assert sent[-1] == "*OPC?;:TRACe:SCALing? CH1;:TRACe:DATA? CH1"
    again = sc.fetch(ch)  # the same last record, fetched the usual way
    assert wf.volts.size == again.volts.size == 10_000
    np.testing.assert_array_equal(wf.volts, again.volts)
    assert (wf.dt_s, wf.t0_s, wf.clipped_samples) == (again.dt_s, again.t0_s, again.clipped_samples)
    # an error queued meanwhile is left to the next check, which names the exchange; an
    # error text may hold ';' (SCPI-1999 vol. 2, 21.8: "<description>;<device info>")
    sc.arm()
    sim.inject("scope", "push_error", code=-222, message="Data out of range;CH1")
    assert sc.wait_and_fetch(ch, timeout_s=2.0).volts.size == 10_000
    with pytest.raises(InstrumentError) as info:
        sc.check_errors()
    assert info.value.code == -222 and "TRACe:DATA? CH1" in info.value.command
    sc.arm()
    assert sc.wait_and_fetch(ch, timeout_s=2.0).volts.size == 10_000  # the session is in step


def test_large_record_decoded_in_pieces_matches_ascii_and_the_clip_count(fast) -> None:
    # 300 000 samples: the block is decoded in several cache-sized pieces; the ASCII
    # transfer of the same record (volts as NR3 text) is the reference.
    sim, b = fast
    _power_up(b, 5.0)
    sc, ch = b.scope, b.wiring.output_channel
    for inst in b.instruments.values():
        inst.transport.timeout_s = 5.0
    sc.setup_channel(ch, scale_v_div=0.15)  # 1.2 V screen for a ~2 Vpp output: clips
    sc.set_timebase(window_s=3e-4, sample_rate_hz=1e9)
    sc.set_trigger(source="free")
    sc.acquire(timeout_s=5.0)
    wf = sc.fetch(ch)
    text_wf = sc.fetch(ch, transfer="ascii")
    assert wf.volts.size == 300_000
    # ASCII carries 7 significant digits (the simulated scope's "%.6E")
    np.testing.assert_allclose(wf.volts, text_wf.volts, rtol=1e-6, atol=1e-9)
    assert wf.clipped_samples == int(sc.ask("clipped", channel=ch)) > 1000


def test_errors_queued_before_the_session_are_logged_not_blamed(sim_bench, caplog) -> None:
    sim_bench.inject("supply", "push_error", code=-310, message="left from before")
    cfg = load_bench_text(sim_bench.bench_toml())
    with caplog.at_level("INFO", logger="benchctl.drivers.bench"):
        with open_bench(cfg, max_voltage_v=6.0) as b:
            assert sim_bench.command_log("supply")[:3] == ["*IDN?", "SYSTem:ERRor:NEXT?", "SYSTem:ERRor:NEXT?"]
            b.supply.output(False)  # a checked point: the old error must not be blamed on it
    assert any("-310" in r.getMessage() and "before this session" in r.getMessage() for r in caplog.records)


def test_wait_settled_on_a_tripped_supply_says_so(fast) -> None:
    sim, b = fast
    _power_up(b, 5.0)
    sim.inject("supply", "trip_ovp")
    with pytest.raises(InstrumentError, match="over-voltage protection tripped"):
        b.supply.wait_settled(5.0, tol_v=0.01, timeout_s=0.2)
