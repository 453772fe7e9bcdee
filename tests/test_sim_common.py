"""Common IEEE 488.2 / SCPI behaviour of the three simulated servers, over pyvisa-py."""

from __future__ import annotations

import socket

import pytest

from benchctl.scpi import parse_error_response

ROLES = ("supply", "generator", "scope")


@pytest.mark.parametrize("role", ROLES)
def test_identification_and_common_commands(sim_bench, visa, role):
    inst = visa(sim_bench.resources[role])
    idn = inst.query("*IDN?").split(",")
    # IEEE 488.2 §10.14 (from memory): four fields, manufacturer,model,serial,firmware
    assert len(idn) == 4 and idn[0] == "benchctl"
    assert inst.query("*TST?") == "0"
    assert inst.query("*OPC?") == "1"
    assert inst.query("SYST:VERS?") == "1999.0"
    assert parse_error_response(inst.query("SYST:ERR?")) == (0, "No error")
    inst.write("*ESE 60;*SRE 32")
    assert inst.query("*ESE?;*SRE?") == "60;32"


@pytest.mark.parametrize(("message", "code"), [
    ("FOO:BAR 1", -113),       # SCPI-1999 Vol 2 §21.8.9 undefined header (from memory)
    ("*IDN? 3", -108),         # parameter not allowed
    ("*ESE", -109),            # missing parameter
    ("*ESE 300", -222),        # data out of range
    ("*ESE ABC", -148),        # character data not allowed where a number is expected
    ("SYST:ERR:NEXT? 1", -108),
])
@pytest.mark.parametrize("role", ROLES)
def test_errors_have_standard_codes(sim_bench, visa, role, message, code):
    inst = visa(sim_bench.resources[role])
    inst.write(message)
    got, _ = parse_error_response(inst.query("SYST:ERR?"))
    assert got == code
    assert parse_error_response(inst.query("SYST:ERR:NEXT?"))[0] == 0


def test_event_status_register_bits(sim_bench, visa):
    inst = visa(sim_bench.resources["supply"])
    inst.query("*ESR?")  # clears power-on
    inst.write("NOT:A:COMMAND")
    # IEEE 488.2 §11.5.1.1 (from memory): bit 5 (32) command error
    assert int(inst.query("*ESR?")) & 32
    inst.write("VOLT 1000")  # out of range -> -222, an execution error, bit 4 (16)
    assert int(inst.query("*ESR?")) == 16
    assert int(inst.query("*ESR?")) == 0  # reading clears it
    inst.write("*OPC")
    assert int(inst.query("*ESR?")) == 1  # operation complete
    # status byte: bit 2 (4) = error/event queue not empty (SCPI-1999 Vol 1 §9, from memory)
    inst.write("*CLS")
    assert int(inst.query("*STB?")) & 4 == 0
    inst.write("BAD")
    assert int(inst.query("*STB?")) & 4
    inst.write("*CLS")
    assert parse_error_response(inst.query("SYST:ERR?"))[0] == 0
    # ESB summary (32) follows ESR & ESE
    inst.write("*ESE 32;BAD")
    assert int(inst.query("*STB?")) & 32


def test_error_queue_overflow(sim_bench, visa):
    inst = visa(sim_bench.resources["generator"])
    for _ in range(20):  # bounded
        inst.write("BAD")
    codes = [parse_error_response(inst.query("SYST:ERR?"))[0] for _ in range(17)]
    # SCPI-1999 Vol 2 §21.8 (from memory): the last entry of a full queue is -350
    assert codes[:15] == [-113] * 15 and codes[15] == -350 and codes[16] == 0


def test_compound_messages_and_current_path(sim_bench, visa):
    inst = visa(sim_bench.resources["supply"])
    assert inst.query("SOUR:VOLT 2.5;CURR 0.05;:SOUR:VOLT?;CURR?") == "2.500000E+00;5.000000E-02"
    assert sim_bench.supply_state()["current_limit_a"] == pytest.approx(0.05)


def test_several_clients_and_disconnect(sim_bench, visa):
    res = sim_bench.resources["generator"]
    a, b = visa(res), visa(res)
    assert a.query("FREQ 1234;*OPC?") == "1"  # landed before the other client asks
    assert float(b.query("FREQ?")) == 1234.0
    # one client vanishing (raw socket, closed mid-message) never affects the others
    host, port = res.split("::")[1], int(res.split("::")[2])
    with socket.create_connection((host, port), timeout=2) as raw:
        raw.sendall(b"FREQ 99")  # no terminator: the message never completes
    raw2 = socket.create_connection((host, port), timeout=2)
    raw2.sendall(b"*IDN?\n")
    raw2.close()  # leaves before reading its reply
    assert float(a.query("FREQ?")) == 1234.0
    assert b.query("*IDN?").startswith("benchctl,")
    c = visa(res)  # a new client after the others is served too
    assert c.query("*OPC?") == "1"


def test_rst_restores_defaults(sim_bench, visa):
    gen = visa(sim_bench.resources["generator"])
    gen.write("FUNC SQU;FREQ 5000;OUTP ON")
    assert gen.query("FUNC?") == "SQU"
    assert gen.query("*RST;*OPC?") == "1"
    st = sim_bench.generator_state()
    assert st["shape"] == "SINusoid" and not st["output_on"] and st["freq_hz"] == 1e3


def test_command_log_records_messages(sim_bench, visa):
    inst = visa(sim_bench.resources["scope"])
    inst.write("SENS:SWE:POIN 1000")
    inst.query("SENS:SWE:POIN?")
    assert sim_bench.command_log("scope")[-2:] == ["SENS:SWE:POIN 1000", "SENS:SWE:POIN?"]


def test_bench_in_a_child_process(visa):
    from benchctl.simulated import SimulatedBench

    with SimulatedBench(board="beacon", revision="C", serial="C0042", seed=3, process=True,
                        faults=["generator:push_error:code=-310,message=boot"]) as sim:
        assert sim.truth.dropout_v < 2.6  # revision C, computed in this process
        sup = visa(sim.resources["supply"])
        assert sup.query("*IDN?") == "benchctl,SIM-DC-SUPPLY,SIM-C0042-SUP,0.1.0"
        gen = visa(sim.resources["generator"])
        assert parse_error_response(gen.query("SYST:ERR?")) == (-310, "System error;boot")
        with pytest.raises(RuntimeError, match="in a process"):
            sim.supply_state()
        proc = sim._proc
    assert proc.returncode == 0  # SIGTERM: a clean exit
