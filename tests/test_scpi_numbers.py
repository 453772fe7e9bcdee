"""Numeric, boolean, character and string data: program side and response side."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from benchctl.errors import ProtocolError
from benchctl.scpi import (
    NAN_VALUE,
    OVERFLOW_VALUE,
    ScpiError,
    format_boolean,
    format_list,
    format_nr1,
    format_nr2,
    format_nr3,
    format_string,
    parse_boolean,
    parse_character,
    parse_error_response,
    parse_numeric,
    parse_response_boolean,
    parse_response_list,
    parse_response_number,
    parse_response_string,
    parse_string,
)


def code_of(func, *args, **kw) -> int:
    with pytest.raises(ScpiError) as info:
        func(*args, **kw)
    return info.value.code


# ------------------------------------------------------------------ decimal numeric data


@pytest.mark.parametrize(
    ("token", "value"),
    [
        # IEEE 488.2-1992 §7.7.2.2 <DECIMAL NUMERIC PROGRAM DATA> (NRf = NR1|NR2|NR3),
        # forms from memory; values checked against Python's float() of the same literal.
        ("5", 5.0),
        ("-12", -12.0),
        ("+1.5E-3", 1.5e-3),
        (".5", 0.5),
        ("5.", 5.0),
        ("1e3", 1000.0),
        ("-0.25e+2", -25.0),
        ("1.5 E 3", 1500.0),  # white space around E is allowed (§7.7.2.2, from memory)
        ("000123", 123.0),
    ],
)
def test_decimal_forms(token: str, value: float) -> None:
    assert parse_numeric(token) == value


@pytest.mark.parametrize("token", ["1.2.3", ".", "+", "1e", "--1", "1+", "e5x"])
def test_malformed_numbers_queue_numeric_errors(token: str) -> None:
    # IEEE 488.2-1992 §11.5.1.1.4 / SCPI-1999 Vol. 2 §21.8.9: -120 numeric data error
    # (or another -1xx command error for a word where a number belongs), from memory.
    assert -199 <= code_of(parse_numeric, token) <= -100


def test_exponent_and_digit_limits() -> None:
    # IEEE 488.2-1992 §7.7.2.4 (from memory): exponent magnitude up to 32000, mantissa
    # up to 255 digits; beyond that -123 "Exponent too large" / -124 "Too many digits".
    assert code_of(parse_numeric, "1E32001") == -123
    assert code_of(parse_numeric, "1" * 256) == -124
    assert parse_numeric("0" * 300 + "1") == 1.0  # leading zeros are not counted
    # 1E400 is a legal program number but not a finite float: -222 out of range.
    assert code_of(parse_numeric, "1E400") == -222


@pytest.mark.parametrize(
    ("token", "unit", "value"),
    [
        # IEEE 488.2-1992 §7.7.3 suffix program data and its multiplier table (from memory).
        ("100 mV", "V", 0.1),
        ("100MV", "V", 0.1),  # M alone is milli
        ("2.5KHZ", "HZ", 2500.0),
        ("1MHZ", "HZ", 1e6),  # special case: MHZ is megahertz
        ("1mhz", "HZ", 1e6),
        ("2MOHM", "OHM", 2e6),  # special case: MOHM is megaohm
        ("3MAHZ", "HZ", 3e6),  # MA is the general mega multiplier
        ("5 V", "V", 5.0),
        ("20MA", "A", 0.02),  # MA with the ampere unit: milli + A (documented choice)
        ("1MAA", "A", 1e6),
        ("1UA", "A", 1e-6),
        ("4NS", "S", 4e-9),
        ("10MS", "S", 0.01),
        ("1GHZ", "HZ", 1e9),
        ("1THZ", "HZ", 1e12),
        ("1PEHZ", "HZ", 1e15),
        ("1EXHZ", "HZ", 1e18),
        ("3PS", "S", 3e-12),
        ("7FS", "S", 7e-15),
        ("7AS", "S", 7e-18),
    ],
)
def test_suffix_units(token: str, unit: str, value: float) -> None:
    assert parse_numeric(token, unit=unit) == pytest.approx(value, rel=1e-12)


def test_suffix_errors() -> None:
    # SCPI-1999 Vol. 2 §21.8.9 (from memory): -131 invalid suffix, -138 suffix not allowed.
    assert code_of(parse_numeric, "5 V", unit="A") == -131
    assert code_of(parse_numeric, "5 V") == -138
    assert code_of(parse_numeric, "5 XV", unit="V") == -131
    # Our documented choice: MSEC is not a unit (seconds are spelled S), so refused.
    assert code_of(parse_numeric, "5 MSEC", unit="S") == -131
    # IEEE 488.2 §7.7.3.4 (from memory): suffixes are at most 12 characters.
    assert code_of(parse_numeric, "5 " + "V" * 13, unit="V") == -134


def test_min_max_default_and_range() -> None:
    # SCPI-1999 Vol. 1 §7.2.1.1 MINimum|MAXimum|DEFault numeric parameters (from memory).
    kw = {"minimum": 0.0, "maximum": 30.0, "default": 1.0}
    assert parse_numeric("MIN", **kw) == 0.0
    assert parse_numeric("maximum", **kw) == 30.0
    assert parse_numeric("DEF", **kw) == 1.0
    assert parse_numeric("Default", **kw) == 1.0
    assert code_of(parse_numeric, "MAXI", **kw) == -148  # neither short nor long form
    assert code_of(parse_numeric, "MAX") == -224  # no maximum declared
    # SCPI-1999 Vol. 2 §21.8.10 (from memory): -222 "Data out of range".
    assert code_of(parse_numeric, "30.0001", **kw) == -222
    assert code_of(parse_numeric, "-1 mV", unit="V", **kw) == -222
    assert parse_numeric("30", **kw) == 30.0  # bounds are inclusive


def test_nondecimal_numbers() -> None:
    # IEEE 488.2-1992 §7.7.4 <NONDECIMAL NUMERIC PROGRAM DATA> #H/#Q/#B (from memory);
    # values checked against Python's int(text, base).
    assert parse_numeric("#H1F") == int("1F", 16)
    assert parse_numeric("#q17") == int("17", 8)
    assert parse_numeric("#B1011") == int("1011", 2)
    assert code_of(parse_numeric, "#B102") == -121


def test_wrong_data_types_for_numbers() -> None:
    # SCPI-1999 Vol. 2 §21.8.9 (from memory): -148 character, -158 string, -168 block
    # data not allowed where a number is expected; -109 missing parameter.
    assert code_of(parse_numeric, "ABC") == -148
    assert code_of(parse_numeric, '"5"') == -158
    assert code_of(parse_numeric, "#15abcde") == -168
    assert code_of(parse_numeric, "") == -109
    assert code_of(parse_numeric, "ABCDEFGHIJKLM") == -144


# --------------------------------------------------------------------- booleans, words


@pytest.mark.parametrize(
    ("token", "value"),
    # SCPI-1999 Vol. 1 §7.3 Boolean program data ON|OFF|<NRf>, numbers rounded,
    # non-zero = ON (from memory).
    [("ON", True), ("off", False), ("1", True), ("0", False), ("0.4", False), ("0.6", True),
     ("-1", True), ("2", True)],
)
def test_booleans(token: str, value: bool) -> None:
    assert parse_boolean(token) is value


def test_boolean_errors() -> None:
    assert code_of(parse_boolean, "YES") == -224
    assert code_of(parse_boolean, '"ON"') == -158


def test_character_data_long_and_short_forms() -> None:
    # SCPI-1999 Vol. 1 §6.2.1 (from memory): only the exact short or long form matches,
    # case-insensitive; the choice comes back as declared.
    choices = ("SINusoid", "SQUare", "TRIangle", "DC")
    assert parse_character("sin", choices) == "SINusoid"
    assert parse_character("SINUSOID", choices) == "SINusoid"
    assert parse_character("Squ", choices) == "SQUare"
    assert parse_character("dc", choices) == "DC"
    assert code_of(parse_character, "SINU", choices) == -141
    assert code_of(parse_character, "SI", choices) == -141
    assert code_of(parse_character, "5", choices) == -128
    assert code_of(parse_character, '"SIN"', choices) == -158


def test_character_data_with_suffix() -> None:
    # Numeric suffix on a discrete parameter (SCPI-1999 Vol. 1 §6.2.5, from memory).
    choices = ("IMMediate", "INTernal#")
    assert parse_character("IMM", choices) == "IMMediate"
    assert parse_character("INT", choices) == "INTernal1"
    assert parse_character("int2", choices) == "INTernal2"
    assert parse_character("INTERNAL12", choices) == "INTernal12"
    assert code_of(parse_character, "IMM2", choices) == -141


def test_choice_declaration_errors() -> None:
    with pytest.raises(ValueError):
        parse_character("X", ("STATe", "STATus"))  # both short forms are STAT


def test_strings() -> None:
    # IEEE 488.2-1992 §7.7.5 <STRING PROGRAM DATA> (from memory): either quote, the
    # quote doubled inside.
    assert parse_string('"hello"') == "hello"
    assert parse_string("'it''s'") == "it's"
    assert parse_string('"say ""hi"""') == 'say "hi"'
    assert parse_string('""') == ""
    assert code_of(parse_string, '"abc') == -151
    assert code_of(parse_string, '"a"b"') == -151
    assert code_of(parse_string, "abc") == -104


# ----------------------------------------------------------------------------- formatting


def test_format_nr1_nr2_nr3() -> None:
    # IEEE 488.2-1992 §8.7.2-8.7.4 NR1/NR2/NR3 response forms (from memory).
    assert format_nr1(5) == "5"
    assert format_nr1(-12.0) == "-12"
    assert format_nr1(np.int16(7)) == "7"
    assert format_nr2(1.5) == "1.5"
    assert format_nr2(3) == "3.0"
    assert "E" not in format_nr2(1e-5).upper()
    assert format_nr3(1.234567) == "1.234567E+00"
    assert format_nr3(-0.0015) == "-1.500000E-03"
    assert format_nr3(2.5e6, digits=3) == "2.50E+06"
    # SCPI-1999 Vol. 1 §7.2.1 (from memory): NaN is 9.91E37, infinity 9.9E37.
    assert parse_response_number(format_nr3(math.nan)) != parse_response_number(
        format_nr3(math.nan)
    )
    assert float(format_nr3(math.nan)) == pytest.approx(NAN_VALUE)
    assert float(format_nr3(-math.inf)) == pytest.approx(-OVERFLOW_VALUE)
    assert format_boolean(True) == "1" and format_boolean(False) == "0"
    assert format_string('a"b') == '"a""b"'


finite = st.floats(allow_nan=False, allow_infinity=False, min_value=-1e30, max_value=1e30)


@settings(max_examples=200, deadline=None)
@given(finite)
def test_nr3_round_trip_seven_digits(x: float) -> None:
    # Round trip within the 7-digit resolution: half a unit in the 7th digit = 5e-7 rel.
    back = parse_response_number(format_nr3(x))
    assert back == pytest.approx(x, rel=5e-7, abs=1e-300)
    # The same text read by the server's program-data parser gives the same value.
    assert parse_numeric(format_nr3(x)) == back


@settings(max_examples=200, deadline=None)
@given(st.floats(width=32, allow_nan=False, allow_infinity=False))
def test_nr3_nine_digits_round_trips_float32_exactly(x: float) -> None:
    # 9 significant decimal digits identify every float32 (IEEE 754-2019 §5.12.2,
    # from memory: Pmin(binary32) = 9).
    back = parse_response_number(format_nr3(x, digits=9))
    if abs(x) >= 9.9e37 * (1 - 1e-6):  # these are the SCPI sentinels on the wire
        return
    assert np.float32(back) == np.float32(x)


@settings(max_examples=200, deadline=None)
@given(finite)
def test_nr2_round_trips_exactly(x: float) -> None:
    text = format_nr2(x)
    assert "e" not in text.lower()
    assert parse_response_number(text) == x
    assert parse_numeric(text) == x


@settings(max_examples=200, deadline=None)
@given(st.integers(min_value=-(2**53), max_value=2**53))
def test_nr1_round_trips(n: int) -> None:
    assert int(parse_response_number(format_nr1(n))) == n


# ---------------------------------------------------------------------- response side


def test_response_numbers_and_sentinels() -> None:
    assert parse_response_number("+1.500000E-03\n") == 1.5e-3
    assert parse_response_number(b" 42 ") == 42.0
    assert math.isnan(parse_response_number("9.91E37"))
    assert math.isnan(parse_response_number("+9.910000E+37"))
    assert parse_response_number("9.9E37") == math.inf
    assert parse_response_number("-9.9E+37") == -math.inf
    assert math.isnan(parse_response_number("NAN"))
    for bad in ["", "abc", "1.2.3", "1,2", "0x10", "1_000", "inf5"]:
        with pytest.raises(ProtocolError):
            parse_response_number(bad)


def test_response_list() -> None:
    assert parse_response_list("1,2.5,-3E-1") == [1.0, 2.5, -0.3]
    assert parse_response_list(" 1 , 2 \n") == [1.0, 2.0]
    assert parse_response_list("") == []
    got = parse_response_list("1,9.91E37,9.9E37")
    assert got[0] == 1.0 and math.isnan(got[1]) and got[2] == math.inf
    with pytest.raises(ProtocolError) as info:
        parse_response_list("1,2,x,4")
    assert "element 3" in str(info.value) and "'x'" in str(info.value)
    for bad in ["1 2", "1..2", "+-1", "1e", "infinity", "1_0", "0x1"]:  # (INF is accepted)
        with pytest.raises(ProtocolError):
            parse_response_list(f"0,{bad}")
    long = ",".join(["1"] * 200) + ",bad"
    with pytest.raises(ProtocolError) as info:
        parse_response_list(long)
    assert len(str(info.value)) < 200  # the offending text is shortened
    with pytest.raises(ProtocolError):
        parse_response_list("1,,2")


@settings(max_examples=100, deadline=None)
@given(st.lists(finite, max_size=50))
def test_response_list_matches_numpy_text_parsing(values: list[float]) -> None:
    # Reference: numpy's own text parser (numpy.fromstring with sep) on the same text.
    text = ",".join(format_nr3(v) for v in values)
    ours = parse_response_list(text)
    ref = np.fromstring(text, sep=",") if values else np.array([])
    np.testing.assert_array_equal(np.array(ours), ref)


def test_response_boolean() -> None:
    assert parse_response_boolean("1\n") is True
    assert parse_response_boolean("0") is False
    assert parse_response_boolean("+1.0E+00") is True
    assert parse_response_boolean("OFF") is False
    for bad in ["2", "yes", ""]:
        with pytest.raises(ProtocolError):
            parse_response_boolean(bad)


def test_response_string_and_error() -> None:
    # IEEE 488.2-1992 §8.7.8 string response data; SCPI-1999 Vol. 2 §21.8.8
    # SYSTem:ERRor? response <code>,"<text>" (from memory).
    assert parse_response_string('"a ""b"" c"\n') == 'a "b" c'
    assert parse_error_response('-113,"Undefined header;FOO:BAR"') == (-113, "Undefined header;FOO:BAR")
    assert parse_error_response('+0,"No error"\n') == (0, "No error")
    assert parse_error_response('-222,"Data out of range; ""x"""') == (-222, 'Data out of range; "x"')
    for bad in ['-113,Undefined header', 'x,"y"', '"no code"', '-1,"a"b"']:
        with pytest.raises(ProtocolError):
            parse_error_response(bad)
    with pytest.raises(ProtocolError):
        parse_response_string("unquoted")


@settings(max_examples=200, deadline=None)
@given(st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=126), max_size=60))
def test_string_round_trips(text: str) -> None:
    assert parse_response_string(format_string(text)) == text
    assert parse_string(format_string(text)) == text


# IEEE 488.2-1992 §7.7.3.2 table 7-1 multipliers (from memory), written out here
# independently of the implementation's table.
PREFIXES = {"EX": 1e18, "PE": 1e15, "T": 1e12, "G": 1e9, "MA": 1e6, "K": 1e3, "M": 1e-3,
            "U": 1e-6, "N": 1e-9, "P": 1e-12, "F": 1e-15, "A": 1e-18, "": 1.0}


@settings(max_examples=300, deadline=None)
@given(
    st.floats(min_value=-1e6, max_value=1e6, allow_nan=False),
    st.sampled_from(sorted(PREFIXES)),
    st.sampled_from(["V", "A", "S", "HZ", "OHM", "W"]),
    st.sampled_from(["", " ", "  "]),
    st.booleans(),
)
def test_suffix_multiplier_property(x: float, prefix: str, unit: str, gap: str, lower: bool) -> None:
    text = format_nr3(x) + gap + (prefix + unit).lower() if lower else format_nr3(x) + gap + prefix + unit
    mult = PREFIXES[prefix]
    if (prefix, unit) in (("M", "HZ"), ("M", "OHM")):
        mult = 1e6  # IEEE 488.2 special cases MHZ, MOHM (from memory)
    expected = float(format_nr3(x)) * mult
    assert parse_numeric(text, unit=unit) == pytest.approx(expected, rel=1e-12, abs=1e-300)


def test_format_list() -> None:
    # IEEE 488.2-1992 §8.4.3 (from memory): elements separated by ','.
    assert format_list([1.0, -0.25]) == "1.000000E+00,-2.500000E-01"
    assert format_list([]) == ""
    assert format_list(np.array([[1, 2]]), digits=2) == "1.0E+00,2.0E+00"
    text = format_list([math.nan, math.inf, -math.inf, 0.0])
    assert text == "9.910000E+37,9.900000E+37,-9.900000E+37,0.000000E+00"
    back = parse_response_list(text)
    assert math.isnan(back[0]) and back[1:] == [math.inf, -math.inf, 0.0]


@settings(max_examples=100, deadline=None)
@given(hnp.arrays(np.float64, st.integers(0, 200), elements=finite))
def test_format_list_round_trip_against_numpy(values: np.ndarray) -> None:
    # Reference: numpy's text parser reads our list; both agree within 7 digits.
    text = format_list(values)
    ours = np.array(parse_response_list(text))
    ref = np.fromstring(text, sep=",") if values.size else np.array([])
    np.testing.assert_array_equal(ours, ref)
    np.testing.assert_allclose(ours, values, rtol=5e-7, atol=1e-300)
