"""Points-table cell codec: lossless round trips, checked bit for bit."""

from __future__ import annotations

import math
import struct

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from benchctl.store import cells

# Text without lone surrogates (they cannot be written as UTF-8 at all).
TEXT = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=40)


def _bits(x: float) -> bytes:
    # IEEE 754 binary64 bit pattern, via the standard library (struct, format "<d").
    return struct.pack("<d", x)


@settings(max_examples=300, deadline=None)
@given(st.floats(allow_nan=True, allow_infinity=True))
def test_float_round_trip_is_bit_identical(x):
    # Python's repr() gives the shortest string that float() maps back to the same double
    # (Python documentation, "Floating Point Arithmetic: Issues and Limitations").
    back = cells.decode(cells.encode(x))
    assert isinstance(back, float)
    if math.isnan(x):
        assert math.isnan(back)  # NaN sign/payload are documented as not kept
    else:
        assert _bits(back) == _bits(x)


@settings(max_examples=300, deadline=None)
@given(TEXT)
def test_any_string_reads_back_as_the_same_string(text):
    cell = cells.encode(text)
    assert "\n" not in cell and "\r" not in cell  # one record = one physical line
    back = cells.decode(cell)
    assert isinstance(back, str)
    assert back == text


@settings(max_examples=200, deadline=None)
@given(TEXT)
def test_point_keys_round_trip(text):
    cell = cells.encode_key(text)
    assert "\n" not in cell and "\r" not in cell
    assert cells.decode_text(cell) == text


@given(st.integers(min_value=-(2**70), max_value=2**70))
def test_integers_round_trip(n):
    back = cells.decode(cells.encode(n))
    assert type(back) is int and back == n


def test_strings_that_look_like_other_types_stay_strings():
    for text in ["", "true", "false", "1.5", "nan", "-inf", "42", "\\", "\\n", "1e5"]:
        back = cells.decode(cells.encode(text))
        assert back == text and isinstance(back, str), text


def test_none_bool_and_numpy_scalars():
    assert cells.encode(None) == "" and cells.decode("") is None
    assert cells.decode(cells.encode(True)) is True
    assert cells.decode(cells.encode(np.bool_(False))) is False
    # numpy 2 repr of np.float64 is "np.float64(...)": the codec must write the plain float.
    x = np.float64(0.1) + np.float64(0.2)
    assert cells.encode(x) == repr(float(x))
    assert _bits(cells.decode(cells.encode(x))) == _bits(float(x))
    assert cells.decode(cells.encode(np.int64(-7))) == -7


def test_unstorable_types_are_refused():
    for bad in ([1.0], {"a": 1}, np.zeros(3)):
        try:
            cells.encode(bad)
        except TypeError as exc:
            assert "points table" in str(exc)
        else:  # pragma: no cover - the check must fail loudly
            raise AssertionError(f"{bad!r} was accepted")
