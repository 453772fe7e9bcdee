"""IEEE 488.2 arbitrary blocks, checked against pyvisa.util as the reference library."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from pyvisa import util as pvu

from benchctl.errors import ProtocolError
from benchctl.scpi import IncompleteBlock, decode_block, encode_block, parse_block_header

# dtype name -> struct format character used by pyvisa.util (struct module codes).
STRUCT_CODE = {"int8": "b", "int16": "h", "float32": "f"}


def arrays(dtype: str):
    if dtype == "float32":
        elements = st.floats(width=32, allow_nan=False)
    else:
        info = np.iinfo(dtype)
        elements = st.integers(int(info.min), int(info.max))
    return hnp.arrays(np.dtype(dtype), st.integers(0, 300), elements=elements)


def test_definite_header_layout() -> None:
    # IEEE 488.2-1992 §8.7.9 (from memory): '#', one digit n, n digits of length, bytes.
    assert encode_block(b"hello") == b"#15hello"
    assert encode_block(b"") == b"#10"
    assert encode_block(b"x" * 1234)[:6] == b"#41234"
    assert parse_block_header(b"#41234....") == (6, 1234)
    assert parse_block_header(b"#0abc") == (2, None)


def test_indefinite_form() -> None:
    # IEEE 488.2-1992 §8.7.10 (from memory): '#0' then bytes, ended by NL^END.
    blk = encode_block(np.array([1, -2], dtype=np.int16), indefinite=True)
    assert blk == b"#0\x00\x01\xff\xfe\n"
    np.testing.assert_array_equal(decode_block(blk, dtype="int16"), [1, -2])
    # pyvisa's reader agrees once the terminator is removed (it keeps every byte).
    assert pvu.from_ieee_block(blk[:-1], "h", True) == [1, -2]
    # Payload bytes that look like terminators survive: only the final NL is removed.
    for tail in ([13], [10], [13, 10]):
        data = np.array([5, *tail], dtype=np.int8)
        blk = encode_block(data, indefinite=True)
        np.testing.assert_array_equal(decode_block(blk, dtype="int8"), data)
    mv = memoryview(encode_block(np.array([1.5], dtype=np.float32)))
    assert decode_block(mv, dtype="float32")[0] == 1.5


def test_byte_orders() -> None:
    # SCPI-1999 Vol. 2 FORMat:BORDer (from memory): NORMal = big-endian, SWAPped = little.
    a = np.array([0x0102], dtype=np.int16)
    assert encode_block(a, big_endian=True)[3:] == b"\x01\x02"
    assert encode_block(a, big_endian=False)[3:] == b"\x02\x01"
    assert encode_block(np.array([2, -3]), dtype="int8") == b"#12\x02\xfd"  # values kept
    # Values that int8 cannot hold are refused, never wrapped (0x0102 would become 2).
    with pytest.raises(ValueError, match="outside"):
        encode_block(a, dtype="int8")
    with pytest.raises(ValueError, match="non-integral"):
        encode_block(np.array([0.5]), dtype="int16")
    with pytest.raises(ValueError, match="non-finite"):
        encode_block(np.array([np.nan]), dtype="int16")
    assert encode_block(np.array([0.1]), dtype="float32") == b"#14" + np.float32(0.1).tobytes()[::-1]


def test_decode_is_zero_copy() -> None:
    buf = encode_block(np.arange(1000, dtype=np.int16))
    out = decode_block(buf, dtype="int16")
    assert np.shares_memory(out, np.frombuffer(buf, dtype=np.uint8))
    ba = bytearray(buf)
    out2 = decode_block(ba, dtype="int16")
    ba[6] = 0x7F  # first payload byte (header "#42000" is 6 bytes); the view follows it
    assert out2[0] == 0x7F00


def test_length_mismatch_is_an_error_not_a_truncation() -> None:
    blk = encode_block(b"abcdef")
    with pytest.raises(ProtocolError, match="declares 6 bytes but 5 arrived"):
        decode_block(blk[:-1], dtype="int8")
    with pytest.raises(ProtocolError, match="declares 6 bytes but 7 arrived"):
        decode_block(blk + b"x", dtype="int8")
    # a terminator after the payload is allowed
    assert decode_block(blk + b"\r\n", dtype="int8").tobytes() == b"abcdef"
    with pytest.raises(ProtocolError, match="whole number"):
        decode_block(b"#13abc", dtype="int16")


def test_header_errors() -> None:
    for short in (b"", b"#", b"#4", b"#412"):
        with pytest.raises(IncompleteBlock):
            parse_block_header(short)
    # IncompleteBlock is a ProtocolError (the interface says so).
    assert issubclass(IncompleteBlock, ProtocolError)
    for bad in (b"x15hello", b"#A5hello", b"#2x5hello"):
        with pytest.raises(ProtocolError) as info:
            parse_block_header(bad)
        assert not isinstance(info.value, IncompleteBlock)
    with pytest.raises(ProtocolError):
        decode_block(b"#4", dtype="int8")


def test_bad_dtype_is_refused() -> None:
    with pytest.raises(ValueError):
        encode_block(np.zeros(2, dtype=np.complex64))
    with pytest.raises(ValueError):
        decode_block(b"#10", dtype="complex64")


@pytest.mark.parametrize("dtype", ["int8", "int16", "float32"])
@pytest.mark.parametrize("big_endian", [True, False])
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_encode_decode_round_trip(dtype: str, big_endian: bool, data) -> None:
    values = data.draw(arrays(dtype))
    blk = encode_block(values, big_endian=big_endian)
    back = decode_block(blk, dtype=dtype, big_endian=big_endian)
    np.testing.assert_array_equal(back, values)
    back_i = decode_block(encode_block(values, big_endian=big_endian, indefinite=True),
                          dtype=dtype, big_endian=big_endian)
    np.testing.assert_array_equal(back_i, values)


@pytest.mark.parametrize("dtype", ["int8", "int16", "float32"])
@pytest.mark.parametrize("big_endian", [True, False])
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_matches_pyvisa_ieee_block_helpers(dtype: str, big_endian: bool, data) -> None:
    # Reference library: pyvisa 1.16.2 pyvisa.util.to_ieee_block(iterable, datatype,
    # is_big_endian) and from_ieee_block(block, datatype, is_big_endian, container).
    values = data.draw(arrays(dtype))
    code = STRUCT_CODE[dtype]
    ours = encode_block(values, big_endian=big_endian)
    theirs = pvu.to_ieee_block(values.tolist(), code, big_endian)
    assert ours == theirs
    ref = pvu.from_ieee_block(ours, code, big_endian, container=np.array)
    got = decode_block(theirs, dtype=dtype, big_endian=big_endian)
    np.testing.assert_array_equal(got, ref.astype(dtype))
    offset, length = pvu.parse_ieee_block_header(ours)
    assert parse_block_header(ours) == (offset, length)
