"""Command tree: header matching, current path, dispatch, parameter errors, fuzzing."""

from __future__ import annotations

import time

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from benchctl.scpi import (
    Call,
    CommandTree,
    ErrorQueue,
    ScpiError,
    decode_block,
    encode_block,
    format_boolean,
    format_nr1,
    format_nr3,
    format_string,
    parse_error_response,
    parse_response_number,
)


class Model:
    """A tiny two-output supply plus a waveform memory, enough to exercise the tree."""

    def __init__(self) -> None:
        self.volt = {1: 0.0, 2: 0.0}
        self.curr = {1: 0.1, 2: 0.1}
        self.out = {1: False, 2: False}
        self.shape = "SINusoid"
        self.label = ""
        self.data = b""
        self.log: list[str] = []


def build_tree() -> CommandTree:
    t = CommandTree()

    def set_volt(c: Call) -> None:
        c.context.volt[c.suffix] = c.numeric(0, unit="V", minimum=0.0, maximum=30.0, default=0.0)
        c.context.log.append(f"VOLT{c.suffix}")

    def set_curr(c: Call) -> None:
        c.context.curr[c.suffix] = c.numeric(0, unit="A", minimum=0.0, maximum=3.0)
        c.context.log.append(f"CURR{c.suffix}")

    def check_out(c: Call) -> int:
        if c.suffix not in (1, 2):
            raise ScpiError(-114, f"output {c.suffix}")
        return c.suffix

    def set_out(c: Call) -> None:
        c.context.out[check_out(c)] = c.boolean(0)

    t.add("[SOURce#]:VOLTage[:LEVel][:IMMediate][:AMPLitude]", set=set_volt,
          query=lambda c: format_nr3(c.context.volt[c.suffix]))
    t.add("[SOURce#]:CURRent[:LEVel][:IMMediate][:AMPLitude]", set=set_curr,
          query=lambda c: format_nr3(c.context.curr[c.suffix]))
    t.add("[SOURce#]:VOLTage:PROTection[:LEVel]", set=lambda c: c.context.log.append(f"OVP{c.numeric(0)}"),
          query=lambda c: "6.5")
    t.add("OUTPut#[:STATe]", set=set_out,
          query=lambda c: format_boolean(c.context.out[check_out(c)]))
    t.add("[SOURce#]:FUNCtion[:SHAPe]",
          set=lambda c: setattr(c.context, "shape", c.choice(0, ("SINusoid", "SQUare", "DC"))),
          query=lambda c: c.context.shape[:3].upper())
    t.add("MEASure[:SCALar]:VOLTage[:DC]?", query=lambda c: format_nr3(c.context.volt[1]))
    t.add("DISPlay:TEXT", set=lambda c: setattr(c.context, "label", c.string(0)),
          query=lambda c: format_string(c.context.label))
    t.add("TRACe[:DATA]", set=lambda c: setattr(c.context, "data", c.block(0)),
          query=lambda c: encode_block(c.context.data))
    t.add("SENSe#:SWEep:POINts", set=lambda c: c.context.log.append(f"PTS{c.integer(0)}"))
    t.add("CALCulate#:LIMit#:STATe", set=lambda c: c.context.log.append(f"LIM{c.suffixes}"))
    t.add("SYSTem:PAIR", set=lambda c: (c.expect(2), c.context.log.append(str(c.params))))
    t.add("*IDN", query=lambda c: "BENCHCTL,MODEL,0,1")
    t.add("*RST", set=lambda c: c.context.log.append("RST"))
    t.add("*CLS", set=lambda c: c.errors.clear())
    t.add("SYSTem:ERRor[:NEXT]", query=lambda c: c.errors.format_next())
    return t


TREE = build_tree()


def run(message, model: Model | None = None, queue: ErrorQueue | None = None):
    model = model or Model()
    queue = queue if queue is not None else ErrorQueue()
    return TREE.execute(message, context=model, errors=queue), model, queue


# ------------------------------------------------------------------ mnemonics and forms


@pytest.mark.parametrize("header", ["VOLT", "VOLTAGE", "volt", "VoLtAgE", "SOUR:VOLT",
                                    "SOURCE1:VOLTAGE:LEVEL:IMMEDIATE:AMPLITUDE", ":VOLT:LEV",
                                    "SOUR:VOLT:AMPL", "VOLT:IMM"])
def test_long_short_and_optional_nodes(header: str) -> None:
    # SCPI-1999 Vol. 1 §6.2.1 long/short form, case-insensitive; §6.2.3 optional nodes
    # in [ ] may be left out (from memory).
    out, model, q = run(f"{header} 2.5;:{header.lstrip(':')}?")
    assert len(q) == 0, q
    assert model.volt[1] == 2.5
    assert parse_response_number(out) == 2.5


@pytest.mark.parametrize("header", ["VOLTA", "VOL", "SOURC:VOLT", "VOLT:LEVE", "VOLTAGES"])
def test_only_exact_short_or_long_form_matches(header: str) -> None:
    # SCPI-1999 Vol. 1 §6.2.1 (from memory): neither a longer abbreviation nor a
    # truncation of the long form is a match: -113 Undefined header.
    out, model, q = run(f"{header} 2.5")
    assert out is None and model.volt[1] == 0.0
    assert q.codes() == [-113]


def test_numeric_suffixes() -> None:
    # SCPI-1999 Vol. 1 §6.2.5 numeric suffix (from memory): absent means 1.
    out, model, q = run("SOUR2:VOLT 3;:SOUR1:VOLT 1;:OUTP2 ON;:OUTP2?;:OUTP?")
    assert len(q) == 0, q
    assert model.volt == {1: 1.0, 2: 3.0}
    assert out == "1;0"
    _, model, q = run("CALC2:LIM3:STAT 1;:CALC:LIM:STAT 1")
    assert model.log == ["LIM(2, 3)", "LIM(1, 1)"]
    # A suffix on a node that takes none is an unknown header; out-of-range is -114.
    _, _, q = run("MEAS2:VOLT?")
    assert q.codes() == [-113]
    _, _, q = run("OUTP3 ON;:OUTP0 ON")
    assert q.codes() == [-114, -114]


# ------------------------------------------------------------------ path and compounding


def test_current_path_rule() -> None:
    # SCPI-1999 Vol. 1 §6.2.4 (from memory): after SOUR:VOLT the current path is SOUR, so
    # the next unit CURR means SOUR:CURR; a suffix on the path carries over.
    out, model, q = run("SOUR2:VOLT 1;CURR 0.5")
    assert len(q) == 0 and model.volt[2] == 1.0 and model.curr[2] == 0.5
    # Deeper: after VOLT:PROT the path is VOLT, so LEV is VOLT:LEV.
    out, model, q = run("VOLT:PROT 6;LEV 4")
    assert len(q) == 0 and model.volt[1] == 4.0 and model.log == ["OVP6.0", "VOLT1"]
    # Without a leading ':' a root command after a compound one is looked up under the
    # path and is unknown; with ':' it resolves from the root.
    _, model, q = run("SOUR:VOLT 1;OUTP ON")
    assert q.codes() == [-113] and model.out[1] is False
    _, model, q = run("SOUR:VOLT 1;:OUTP ON")
    assert len(q) == 0 and model.out[1] is True


def test_common_commands_do_not_change_the_path() -> None:
    # IEEE 488.2-1992 §A.1.1 (from memory): common commands may appear anywhere and leave
    # the current path alone.
    out, model, q = run("SOUR2:VOLT 1;*IDN?;CURR 0.25;*idn?")
    assert len(q) == 0, q
    assert model.curr[2] == 0.25
    assert out == "BENCHCTL,MODEL,0,1;BENCHCTL,MODEL,0,1"


def test_every_message_starts_at_the_root() -> None:
    model, q = Model(), ErrorQueue()
    TREE.execute("SOUR:VOLT 1", context=model, errors=q)
    TREE.execute("OUTP ON", context=model, errors=q)
    assert len(q) == 0 and model.out[1] is True


def test_queries_joined_and_none_without_queries() -> None:
    # IEEE 488.2-1992 §8.4.1 (from memory): response message units separated by ';'.
    out, _, q = run("VOLT 1.5;VOLT?;:OUTP?;:FUNC?")
    assert out == "1.500000E+00;0;SIN" and len(q) == 0
    assert run("VOLT 1")[0] is None


def test_execution_continues_after_an_error() -> None:
    # IEEE 488.2-1992 §6.1.6 (from memory): after a command error the parser resumes at
    # the next program message unit; errors queue in order.
    out, model, q = run("VOLT 99;:BOGUS;:CURR 0.2;:VOLT 2;:VOLT?")
    assert q.codes() == [-222, -113]
    assert model.volt[1] == 2.0 and model.curr[1] == 0.2
    assert parse_response_number(out) == 2.0


# ------------------------------------------------------------------ whitespace, terminators


@pytest.mark.parametrize("message", ["VOLT 2", "VOLT 2\n", "VOLT 2\r\n", "  VOLT\t2  ",
                                     "VOLT 2;", ":VOLT 2", "VOLT   +2.0E+00"])
def test_whitespace_and_terminators(message: str) -> None:
    # IEEE 488.2-1992 §7.4.1 <white space> and §7.5 terminator (from memory).
    _, model, q = run(message)
    assert len(q) == 0, (message, q)
    assert model.volt[1] == 2.0


@pytest.mark.parametrize(("message", "code"), [
    # IEEE 488.2-1992 §7.4.3 header separator and §7.6 headers (from memory).
    ("VOLT,2", -111),
    ("VOLT 1;;CURR 1", -102),
    (";VOLT 1", -102),
    ("VOLT 1,", -102),
    ("SYST:PAIR 1,,2", -102),
    ("VOLT: 1", -111),
    ("::VOLT 1", -102),
    ("VOLT? ?", -108),
    (":*IDN?", -102),
    ("VOLTAGEVOLTAGE 1", -112),
    ("*FOO?", -113),
])
def test_header_syntax_errors(message: str, code: int) -> None:
    _, _, q = run(message)
    assert q.codes()[:1] == [code], (message, q)


# ------------------------------------------------------------------ parameters


def test_parameter_count_errors() -> None:
    # SCPI-1999 Vol. 2 §21.8.9 (from memory): -109 missing parameter, -108 not allowed.
    _, model, q = run("VOLT")
    assert q.codes() == [-109] and model.volt[1] == 0.0
    _, _, q = run("SYST:PAIR 1")
    assert q.codes() == [-109]
    _, _, q = run("SYST:PAIR 1,2,3")
    assert q.codes() == [-108]
    _, model, q = run("SYST:PAIR 1, 2")
    assert len(q) == 0 and model.log == ["('1', '2')"]
    out, _, q = run("*IDN? 5")
    assert out is None and q.codes() == [-108]  # the response is withheld
    _, _, q = run("VOLT 1,2")
    assert q.codes() == [-108]


def test_min_max_and_units_through_the_tree() -> None:
    _, model, q = run("VOLT MAX;:CURR 250 mA;:SOUR2:VOLT DEF")
    assert len(q) == 0
    assert model.volt[1] == 30.0 and model.curr[1] == 0.25 and model.volt[2] == 0.0
    _, _, q = run("VOLT 5 A;:CURR MIN;:VOLT MAXI")
    assert q.codes() == [-131, -148]  # CURR has a minimum: MIN works


def test_choice_string_and_boolean_parameters() -> None:
    _, model, q = run("FUNC squ;:DISP:TEXT 'it''s on';:OUTP 1")
    assert len(q) == 0, q
    assert model.shape == "SQUare" and model.label == "it's on" and model.out[1] is True
    _, _, q = run("FUNC SQUA;:DISP:TEXT unquoted;:OUTP MAYBE")
    assert q.codes() == [-141, -104, -224]
    out, _, q = run('DISP:TEXT "a;b,c";:DISP:TEXT?')
    assert len(q) == 0 and out == '"a;b,c"'  # ';' and ',' inside strings are data
    _, _, q = run('DISP:TEXT "open')
    assert q.codes() == [-151]


def test_blocks_inside_program_messages() -> None:
    # IEEE 488.2-1992 §7.7.6 <ARBITRARY BLOCK PROGRAM DATA> (from memory): a definite
    # block may carry any byte, ';' and NL included; an indefinite block runs to NL^END.
    payload = bytes([0x3B, 0x0A, 0x2C, 0x23, 0x00, 0xFF, 0x22])  # ; NL , # NUL 0xFF "
    model = Model()
    q = ErrorQueue()
    msg = b"TRAC " + encode_block(payload) + b";:TRAC?;:VOLT 1\n"
    out = TREE.execute(msg, context=model, errors=q)
    assert len(q) == 0, q
    assert model.data == payload and model.volt[1] == 1.0
    assert out.encode("latin-1") == encode_block(payload)
    out_b = TREE.execute_bytes(b"TRAC #0" + payload + b"\n", context=model, errors=q)
    assert model.data == payload and out_b is None
    codes = np.arange(-128, 128, dtype=np.int8)
    TREE.execute(b"TRAC " + encode_block(codes), context=model, errors=q)
    back = TREE.execute_bytes(b"TRAC?", context=model, errors=q)
    np.testing.assert_array_equal(decode_block(back, dtype="int8"), codes)


def test_block_length_mismatch_in_a_message() -> None:
    _, model, q = run(b"TRAC #15abc")
    assert q.codes() == [-161] and model.data == b""
    _, model, q = run(b"TRAC #9abc")
    assert q.codes() == [-161]
    _, model, q = run(b"TRAC #13abcdef")
    assert q.codes() == [-103]  # bytes after the declared payload: not a separator


# ------------------------------------------------------------------ declaration


def test_headers_and_declaration_errors() -> None:
    t = CommandTree()
    t.add("OUTPut#[:STATe]", set=lambda c: None)
    t.add("*IDN", query=lambda c: "x")
    assert t.headers() == ["OUTPut#[:STATe]", "*IDN"]
    with pytest.raises(ValueError):
        t.add("OUTPut[:STATe]", set=lambda c: None)  # same header again
    t.add("[SYSTem]:BEEP[:STATe]", set=lambda c: None)
    with pytest.raises(ValueError):
        t.add("BEEPer", set=lambda c: None)  # short form BEEP clashes with the node BEEP
    with pytest.raises(ValueError):
        t.add("SYSTem:BEEP", set=lambda c: None)  # one of the expansions declared above
    t2 = CommandTree()
    t2.add("SYSTem:BEEP", set=lambda c: None)
    with pytest.raises(ValueError):
        t2.add("[SYSTem]:BEEP[:STATe]", set=lambda c: None)  # overlaps in one expansion
    q = ErrorQueue()
    t2.execute("BEEP;BEEP:STAT", context=None, errors=q)
    assert q.codes() == [-113, -113]  # the refused spec left no partial entries
    with pytest.raises(ValueError):
        t.add("OUTPut:STATus", set=lambda c: None)  # STAT clashes with STATe below OUTP
    with pytest.raises(ValueError):
        t.add("[OPTional]", set=lambda c: None)
    with pytest.raises(ValueError):
        t.add("VOLTage[:LEVel", set=lambda c: None)
    with pytest.raises(ValueError):
        t.add("volt", set=lambda c: None)  # no capitals: no short form
    with pytest.raises(ValueError):
        t.add("VOLTage")  # no handler
    with pytest.raises(ValueError):
        t.add("INPut2:COUPling", set=lambda c: None)  # a suffix is marked with '#'
    with pytest.raises(ValueError):
        t.add("MEASure:CURRent?", set=lambda c: None)  # query-only spec with a set handler


def test_resolution_cache_respects_the_path() -> None:
    # The same typed header means different commands from the root and under a path
    # (SCPI-1999 Vol. 1 §6.2.4, from memory); repeated calls must not mix them up.
    for _ in range(3):
        out, model, q = run("VOLT 2;:VOLT:PROT 6;LEV 3;:SOUR2:VOLT:PROT 6.5;LEV 4;LEV?")
        assert len(q) == 0, q
        assert model.volt == {1: 3.0, 2: 4.0}
        assert model.log == ["VOLT1", "OVP6.0", "VOLT1", "OVP6.5", "VOLT2"]
        # "LEV?" after SOUR2:VOLT:LEV resolves to SOUR2:VOLT:LEV?, not a root "LEV".
        assert parse_response_number(out) == 4.0
        # After SOUR2:VOLT the path is SOUR2, where there is no LEV.
        _, _, q = run("SOUR2:VOLT 4;LEV?")
        assert q.codes() == [-113]


def test_handler_bugs_propagate() -> None:
    t = CommandTree()
    t.add("BOOM", set=lambda c: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        t.execute("BOOM", context=None, errors=ErrorQueue())


def test_error_reported_through_syst_err() -> None:
    model, q = Model(), ErrorQueue()
    TREE.execute("FOO:BAR 1", context=model, errors=q)
    reply = TREE.execute("SYST:ERR?", context=model, errors=q)
    assert parse_error_response(reply) == (-113, "Undefined header;FOO:BAR")
    assert format_nr1(len(q)) == "0"


# ------------------------------------------------------------------ fuzzing


ALPHABET = "VOLTvolCURSEMAsu:;,? *#0123456789.+-E\"'()\n\r\t\x00\xff"
WORDS = ["VOLT", "SOUR2", ":", ";", ",", "?", " ", "*IDN", "*RST", "MEAS", "OUTP", "FUNC",
         "TRAC", "#", "#0", "#15", "#9", "'", '"', "MAX", "1.5E3", "mV", "SYST:ERR?", "(",
         ")", "\n", "1", "ON"]

messages = st.one_of(
    st.text(alphabet=ALPHABET, max_size=60),
    st.lists(st.sampled_from(WORDS), max_size=25).map("".join),
    st.binary(max_size=60).map(lambda b: b.decode("latin-1")),
)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(messages)
def test_fuzz_only_error_queue_entries(message: str) -> None:
    # Any input ends as queue entries (valid codes) or responses: never an exception,
    # never a hang (each call is timed), never an unbounded queue.
    model, q = Model(), ErrorQueue(capacity=8)
    t0 = time.perf_counter()
    out = TREE.execute(message, context=model, errors=q)
    assert time.perf_counter() - t0 < 1.0
    assert out is None or isinstance(out, str)
    assert len(q) <= 8
    for code in q.codes():
        assert -499 <= code < 0
    for _ in range(9):  # bounded: capacity + 1 reads always empty the queue
        parse_error_response(q.format_next())
    assert len(q) == 0
