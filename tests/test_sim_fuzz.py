"""Random program messages to each simulated server: only error-queue entries, no crash or hang."""

from __future__ import annotations

import time

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from benchctl.scpi import STANDARD_ERRORS, parse_error_response
from benchctl.simulated import SimulatedBench

WORDS = [
    "VOLT", "VOLTage", "CURR", "OUTP", "OUTPut", "MEAS", "MEAS:VOLT?", "MEAS:CURR?", "SOUR",
    "SOUR1", "SOUR2", "PROT", "PROT:TRIP?", "PROT:CLE", "FREQ", "FUNC", "SHAP", "OFFS", "SENS1",
    "SENS2", "SENS", "SWE:TIME", "SWE:POIN", "RANG", "INP1:COUP", "INP2:PROB", "TRAC?",
    "TRAC:SCAL?", "TRAC:CLIP?", "FETC1:FREQ?", "FETC2:VOLT:PTP?", "INIT", "INIT:CONT", "ABOR",
    "TRIG:SOUR", "TRIG:LEV", "FORM", "FORM:BORD", "STAT:QUES:COND?", "STAT:OPER:COND?",
    "*IDN?", "*RST", "*CLS", "*ESE", "*ESR?", "*STB?", "*SRE", "*OPC", "*WAI", "SYST:ERR?",
    "SYST:VERS?", ":", ";", "?", " ", ",", "1", "0", "-5", "2.5", "1e99", "-1E-12", "9.91E37",
    "ON", "OFF", "MAX", "MIN", "DEF", "SIN", "SQU", "DC", "AC", "INT,8", "INT,16", "ASC", "IMM",
    "INT2", "CH1", "CH2", "CH9", "#12AB", "#0xyz", '"text"', "'q'", "5 mV", "2KHZ", "1MHZ",
    "\t", "(", ")", "\x7f", "\xe9",
]

messages = st.one_of(
    st.lists(st.sampled_from(WORDS), min_size=1, max_size=12).map("".join),
    st.text(alphabet=st.characters(min_codepoint=1, max_codepoint=255,
                                   blacklist_characters="\n"), max_size=80),
)


@pytest.mark.parametrize("role", ["supply", "generator", "scope"])
def test_random_messages_only_queue_errors(visa, role):
    with SimulatedBench(board="beacon", seed=5) as sim:
        inst = visa(sim.resources[role], timeout_ms=4000)
        # keep acquisitions small whatever the messages do next
        started = time.monotonic()

        @settings(max_examples=60, deadline=None, derandomize=True, database=None,
                  suppress_health_check=[HealthCheck.too_slow])
        @given(msg=messages)
        def check(msg: str) -> None:
            if role == "scope":
                inst.write("SENS:SWE:POIN 1000;TIME 1e-4")
            inst.write_raw(msg.encode("latin-1") + b"\n")
            inst.write("SYST:VERS?;*ESE 173;*ESE?")  # a marker reply no random message gives
            for _ in range(40):  # bounded: replies to the random queries come first
                if inst.read_raw().endswith(b"1999.0;173\n"):
                    break
            else:
                pytest.fail(f"no marker reply after {msg!r}")
            for _ in range(20):  # bounded drain of the error queue
                code, text = parse_error_response(inst.query("SYST:ERR?"))
                if code == 0:
                    break
                # only standard SCPI errors; -300 would be a handler crash
                assert code in STANDARD_ERRORS and code != -300, (msg, code, text)
            inst.write("*RST;*CLS")

        check()
        assert time.monotonic() - started < 120
