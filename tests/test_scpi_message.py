"""The program-message lexer: units, headers, parameter tokens, strings, blocks."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchctl.scpi import (
    ScpiError,
    encode_block,
    mnemonic_forms,
    parse_numeric,
    parse_string,
    parse_unit,
    split_params,
    split_units,
)


def test_units_split_at_semicolons_outside_data() -> None:
    # IEEE 488.2-1992 §7.3.3 unit separator ';'; strings and blocks are opaque (from memory).
    assert split_units("A 1;B 2;*C?") == (["A 1", "B 2", "*C?"], None)
    units, err = split_units('A "x;y";B \'p;q\'')
    assert err is None and units == ['A "x;y"', "B 'p;q'"]
    block = encode_block(b";;\n;").decode("latin-1")
    units, err = split_units(f"A {block};B")
    assert err is None and units == [f"A {block}", "B"]
    units, err = split_units("A #0;;;\n")  # an indefinite block takes the rest
    assert err is None and units == ["A #0;;;\n"]
    units, err = split_units("A (@1;2);B")
    assert err is None and units == ["A (@1;2)", "B"]


def test_lexical_errors_keep_the_units_before_them() -> None:
    units, err = split_units('A 1;B "open;C 3')
    assert units == ["A 1"] and err is not None and err.code == -151
    units, err = split_units("A 1;B #15ab")
    assert units == ["A 1"] and err.code == -161
    units, err = split_units("A 1;B (1,2;C")
    assert units == ["A 1"] and err.code == -171


def test_parse_unit_fields() -> None:
    u = parse_unit("  :sour2:volt:lev?  MAX ")
    assert (u.header, u.rooted, u.common, u.query, u.params) == ("sour2:volt:lev", True, False,
                                                                 True, ("MAX",))
    u = parse_unit("*IDN?")
    assert (u.header, u.common, u.query, u.params) == ("IDN", True, True, ())
    u = parse_unit("CONF 1.5 V , 'a,b' , #13xyz,(@1,2)")
    assert u.params == ("1.5 V", "'a,b'", "#13xyz", "(@1,2)")
    assert parse_numeric(u.params[0], unit="V") == 1.5
    assert parse_string(u.params[1]) == "a,b"
    assert parse_unit("   ") is None


@pytest.mark.parametrize(("text", "code"), [
    ("VOLT,1", -111),  # IEEE 488.2 §7.4.3 header separator is white space (from memory)
    ("1VOLT", -102),
    ("VOLT 1,,2", -102),
    ("VOLT 1,", -102),
    ('VOLT "a" "b"', -103),
    ("ABCDEFGHIJKLM 1", -112),  # IEEE 488.2 §7.6.1.2: at most 12 characters (from memory)
    ("*IDN:X?", -102),
])
def test_unit_errors(text: str, code: int) -> None:
    with pytest.raises(ScpiError) as info:
        parse_unit(text)
    assert info.value.code == code


def test_twelve_character_mnemonic_is_allowed() -> None:
    assert parse_unit("ABCDEFGHIJKL 1").header == "ABCDEFGHIJKL"


def test_unicode_digits_are_not_digits() -> None:
    # IEEE 488.2-1992 §7.7.2 (from memory): digits are the ASCII characters 0-9 only.
    with pytest.raises(ScpiError):
        parse_numeric("\u0663")  # ARABIC-INDIC DIGIT THREE, which Python's float() takes
    # SUPERSCRIPT TWO is not a block length digit: the token is not a block, and it is
    # not a valid non-decimal number either.
    assert split_params("#\u00b2ab, 1") == ("#\u00b2ab", "1")
    with pytest.raises(ScpiError):
        parse_numeric("#\u00b2ab")
    units, err = split_units("A #\u0663abc;B")
    assert err is None and units == ["A #\u0663abc", "B"]


def test_mnemonic_forms() -> None:
    # SCPI-1999 Vol. 1 §6.2.1 (from memory): the short form is the capitalised prefix.
    assert mnemonic_forms("VOLTage") == ("VOLT", "VOLTAGE")
    assert mnemonic_forms("PTPeak") == ("PTP", "PTPEAK")
    assert mnemonic_forms("CH") == ("CH", "CH")
    for bad in ("voltage", "VOLTage2x!", "vOLT", "VOLtAge"):
        with pytest.raises(ValueError):
            mnemonic_forms(bad)


tokens = st.one_of(
    st.from_regex(r"[+-]?[0-9]{1,5}(\.[0-9]{0,3})?([eE][+-]?[0-9]{1,2})?", fullmatch=True),
    st.from_regex(r"[A-Za-z][A-Za-z0-9_]{0,11}", fullmatch=True),
    st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=126), max_size=20).map(
        lambda t: '"' + t.replace('"', '""') + '"'),
    st.binary(max_size=40).map(lambda b: encode_block(b).decode("latin-1")),
)


@settings(max_examples=200, deadline=None)
@given(st.lists(tokens, min_size=1, max_size=8), st.sampled_from([",", " ,", ", ", " , "]))
def test_split_params_recovers_the_tokens(params: list[str], sep: str) -> None:
    # Property: joining well-formed tokens with any legal separator and splitting again
    # gives the same tokens back (IEEE 488.2-1992 §7.4.2, from memory).
    assert list(split_params(sep.join(params))) == params
    units, err = split_units("A " + sep.join(params) + ";B")
    assert err is None and units[-1] == "B" and len(units) == 2


def test_control_characters_are_white_space() -> None:
    # IEEE 488.2-1992 §7.4.1.2 (from memory): bytes 00-09 and 0B-20 are white space.
    u = parse_unit("\x00\x0bVOLT\x01\x1f5\x02,\x7f")
    assert u.header == "VOLT" and u.params[0] == "5"
    assert u.params[1] == "\x7f"  # DEL (7F) is not white space
