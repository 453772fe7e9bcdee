"""Program data (server side) and response data (client side) for numbers and words.

Server side: :func:`parse_numeric`, :func:`parse_boolean`, :func:`parse_character`,
:func:`parse_string` turn one parameter token of a program message into a value, or raise
:class:`~benchctl.scpi.errors.ScpiError` with the code the instrument must queue.

Formatting: :func:`format_nr1`, :func:`format_nr2`, :func:`format_nr3`,
:func:`format_list`, :func:`format_boolean`, :func:`format_string` make response data.

Client side: :func:`parse_response_number` and friends read an instrument's reply, or
raise :class:`~benchctl.errors.ProtocolError` naming the offending text.

Suffix units and multipliers
----------------------------
A numeric parameter may carry a suffix unit, separated from the number by optional white
space: ``"100 mV"``, ``"2.5KHZ"``, ``"1MHZ"``. The suffix is matched case-insensitively
against the unit the command declares; it may be preceded by one SI multiplier:
EX 1e18, PE 1e15, T 1e12, G 1e9, MA 1e6, K 1e3, M 1e-3, U 1e-6, N 1e-9, P 1e-12,
F 1e-15, A 1e-18. ``M`` alone is milli. The IEEE 488.2 special cases ``MHZ`` (megahertz)
and ``MOHM`` (megaohm) are mega. ``MA`` with the ampere unit is milliampere (the suffix
ends in the unit ``A`` and what precedes it, ``M``, is milli); mega-ampere is ``MAA``.
Seconds are spelled ``S`` only, so ``MS`` is a millisecond; ``MSEC`` is not a unit and
is refused with -131 rather than guessed.

NR3 resolution
--------------
:func:`format_nr3` writes 7 significant digits by default (``1.234567E+00``). That is
one more than a float32 guarantees (6) and well below the resolution of the instruments
modelled here (16-bit DACs, 8-bit scope ADC); pass ``digits=9`` to round-trip a float32
exactly, or ``digits=17`` for a float64.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache

import numpy as np

from benchctl.errors import ProtocolError
from benchctl.scpi.errors import ScpiError
from benchctl.scpi.mnemonic import MAX_MNEMONIC_CHARS, mnemonic_forms

# SCPI-1999 Vol. 1 §7.2.1 (from memory): 9.91E37 is "not a number", +/-9.9E37 is
# +/-infinity (overflow), as response data.
NAN_VALUE = 9.91e37
OVERFLOW_VALUE = 9.9e37

# IEEE 488.2-1992 §7.7.3.2 table 7-1 (from memory): suffix multipliers.
MULTIPLIERS: dict[str, float] = {
    "EX": 1e18,
    "PE": 1e15,
    "T": 1e12,
    "G": 1e9,
    "MA": 1e6,
    "K": 1e3,
    "M": 1e-3,
    "U": 1e-6,
    "N": 1e-9,
    "P": 1e-12,
    "F": 1e-15,
    "A": 1e-18,
}
# IEEE 488.2-1992 §7.7.3.2 (from memory): MHZ and MOHM are the two suffixes where a
# leading M means mega, kept for compatibility with common usage.
_MEGA_SPECIALS = {"HZ": "MHZ", "OHM": "MOHM"}

# IEEE 488.2-1992 §7.7.2.4 (from memory): mantissas of up to 255 digits (leading zeros
# excluded) and exponents of magnitude up to 32000 must be accepted.
MAX_MANTISSA_DIGITS = 255
MAX_EXPONENT = 32000
# IEEE 488.2-1992 §7.7.3.4 (from memory): a suffix is at most 12 characters.
MAX_SUFFIX_CHARS = 12

_DECIMAL = re.compile(
    r"([+-]?)(\d*)(?:\.(\d*))?"  # sign, integer part, fraction
    r"(?:[\x00-\x20]*[eE][\x00-\x20]*([+-]?\d+))?"  # exponent, white space allowed around E
    r"(?:[\x00-\x20]*([A-Za-z][A-Za-z/]*))?",  # suffix unit with optional multiplier
    re.ASCII,
)
_NONDECIMAL = re.compile(r"#([HhQqBb])([0-9A-Za-z]*)")
_NONDECIMAL_BASES = {"H": 16, "Q": 8, "B": 2}
_CHARDATA = re.compile(r"[A-Za-z][A-Za-z0-9_]*")
_SPECIAL_NUMERIC = {"MIN": "min", "MINIMUM": "min", "MAX": "max", "MAXIMUM": "max",
                    "DEF": "def", "DEFAULT": "def"}


def _token_kind(token: str) -> str:
    """Classify a parameter token: 'string', 'block', 'expr', 'nondecimal', 'char', 'number'."""
    if not token:
        return "empty"
    c = token[0]
    if c in "\"'":
        return "string"
    if c == "#":
        if len(token) > 1 and "0" <= token[1] <= "9":
            return "block"
        return "nondecimal"
    if c == "(":
        return "expr"
    if c.isalpha():
        return "char"
    return "number"


def _not_allowed(kind: str, what: str, token: str) -> ScpiError:
    code = {"string": -158, "block": -168, "expr": -178, "char": -148,
            "number": -128, "nondecimal": -128, "empty": -109}.get(kind, -104)
    if kind == "empty":
        return ScpiError(-109, f"{what} expected")
    return ScpiError(code, f"{what} expected, got {_short(token)}")


def _short(token: str, limit: int = 40) -> str:
    token = token.replace("\r", "\\r").replace("\n", "\\n")
    return token if len(token) <= limit else token[: limit - 3] + "..."


@lru_cache(maxsize=256)
def _suffix_multiplier(suffix_upper: str, unit_upper: str) -> float | None:
    if suffix_upper == unit_upper:
        return 1.0
    if _MEGA_SPECIALS.get(unit_upper) == suffix_upper:
        return 1e6
    if suffix_upper.endswith(unit_upper):
        return MULTIPLIERS.get(suffix_upper[: -len(unit_upper)])
    return None


def parse_numeric(
    token: str,
    *,
    unit: str | None = None,
    minimum: float | None = None,
    maximum: float | None = None,
    default: float | None = None,
) -> float:
    """Parse one numeric program data token (``<NRf>`` with optional suffix, or MIN/MAX/DEF).

    Parameters
    ----------
    token : str
        The parameter as received, white space trimmed: ``"5"``, ``"+1.5E-3"``, ``".5"``,
        ``"5."``, ``"100 mV"``, ``"2.5KHZ"``, ``"#H1F"``, ``"MAX"``.
    unit : str, optional
        The unit the command accepts as a suffix, e.g. ``"V"``, ``"A"``, ``"HZ"``,
        ``"S"``, ``"OHM"``; the value is returned in this unit. None: no suffix allowed.
    minimum, maximum : float, optional
        Accepted range (inclusive); also the values of ``MINimum`` / ``MAXimum``.
    default : float, optional
        The value of ``DEFault``.

    Returns
    -------
    float
        The value in ``unit`` (multiplier applied).

    Raises
    ------
    ScpiError
        -109 empty token; -120 malformed number; -121 bad digit in a non-decimal number;
        -123 exponent beyond +/-32000; -124 more than 255 mantissa digits; -131 suffix
        not the declared unit; -134 suffix too long; -138 suffix where none is allowed;
        -148 other character data; -158 / -168 / -178 string, block or expression data;
        -222 value outside ``[minimum, maximum]`` or not finite; -224 MIN/MAX/DEF with no
        value declared for it.

    References
    ----------
    IEEE 488.2-1992 §7.7.2 decimal numeric program data, §7.7.3 suffix program data
    (multipliers, MHZ/MOHM), §7.7.4 non-decimal numeric program data (#H, #Q, #B);
    SCPI-1999 Vol. 1 §7.2 <NRf> and MINimum/MAXimum/DEFault. All from memory.
    """
    kind = _token_kind(token)
    if kind == "char":
        word = token.upper()
        special = _SPECIAL_NUMERIC.get(word)
        if special is None:
            if len(token) > MAX_MNEMONIC_CHARS and _CHARDATA.fullmatch(token):
                raise ScpiError(-144, _short(token))
            raise _not_allowed(kind, "number", token)
        value = {"min": minimum, "max": maximum, "def": default}[special]
        if value is None:
            raise ScpiError(-224, f"{word} not available here")
        return float(value)
    if kind == "nondecimal":
        m = _NONDECIMAL.fullmatch(token)
        if m is None:
            raise ScpiError(-120, _short(token))
        base = _NONDECIMAL_BASES[m.group(1).upper()]
        digits = m.group(2)
        try:
            value = float(int(digits, base))
        except ValueError:
            raise ScpiError(-121, _short(token)) from None
        return _check_range(value, minimum, maximum, token)
    if kind != "number":
        raise _not_allowed(kind, "number", token)
    m = _DECIMAL.fullmatch(token)
    if m is None:
        raise ScpiError(-120, _short(token))
    sign, whole, frac, exponent, suffix = m.groups()
    frac = frac or ""
    if not whole and not frac:
        raise ScpiError(-120, _short(token))
    significant = (whole + frac).lstrip("0")
    if len(significant) > MAX_MANTISSA_DIGITS:
        raise ScpiError(-124, _short(token))
    exp = int(exponent) if exponent else 0
    if abs(exp) > MAX_EXPONENT:
        raise ScpiError(-123, _short(token))
    value = float(f"{sign}{whole or '0'}.{frac or '0'}e{exp}")
    if suffix:
        if len(suffix) > MAX_SUFFIX_CHARS:
            raise ScpiError(-134, _short(token))
        if unit is None:
            raise ScpiError(-138, _short(token))
        mult = _suffix_multiplier(suffix.upper(), unit.upper())
        if mult is None:
            raise ScpiError(-131, f"{_short(token)} (unit {unit})")
        value *= mult
    return _check_range(value, minimum, maximum, token)


def _check_range(value: float, minimum: float | None, maximum: float | None, token: str) -> float:
    if not math.isfinite(value):
        raise ScpiError(-222, f"{_short(token)} is not finite")
    if minimum is not None and value < minimum:
        raise ScpiError(-222, f"{_short(token)} below {minimum:g}")
    if maximum is not None and value > maximum:
        raise ScpiError(-222, f"{_short(token)} above {maximum:g}")
    return value


def parse_boolean(token: str) -> bool:
    """Parse boolean program data: ``ON``/``OFF`` or a number (non-zero after rounding = ON).

    Raises
    ------
    ScpiError
        -224 character data other than ON/OFF; -158 / -168 / -178 string, block or
        expression data; number errors as in :func:`parse_numeric`.

    References
    ----------
    SCPI-1999 Vol. 1 §7.3 Boolean program data: ON|OFF|<NRf>, a numeric value is rounded
    to an integer, non-zero means ON (from memory).
    """
    kind = _token_kind(token)
    if kind == "char":
        word = token.upper()
        if word == "ON":
            return True
        if word == "OFF":
            return False
        raise ScpiError(-224, f"ON or OFF expected, got {_short(token)}")
    if kind in ("number", "nondecimal"):
        return round(parse_numeric(token)) != 0
    raise _not_allowed(kind, "boolean", token)


@lru_cache(maxsize=512)
def _compile_choices(choices: tuple[str, ...]) -> dict[str, tuple[str, bool]]:
    table: dict[str, tuple[str, bool]] = {}
    for declared in choices:
        has_suffix = declared.endswith("#")
        short, long = mnemonic_forms(declared.rstrip("#"))
        for form in (short, long):
            previous = table.get(form)
            if previous is not None and previous[0] != declared:
                raise ValueError(f"choices {previous[0]!r} and {declared!r} share the form {form!r}")
            table[form] = (declared, has_suffix)
    return table


def parse_character(token: str, choices: tuple[str, ...] | list[str]) -> str:
    """Match character program data against declared choices (long or short form).

    Parameters
    ----------
    token : str
        The parameter as received, e.g. ``"sin"``, ``"SQUARE"``, ``"INT2"``.
    choices : sequence of str
        Declared choices with their short form in capitals, e.g.
        ``("SINusoid", "SQUare")``. A trailing ``#`` accepts a numeric suffix:
        ``"INTernal#"`` matches ``INT``, ``INT2``, ``INTERNAL1``...

    Returns
    -------
    str
        The choice as declared (``"SINusoid"``); for a ``#`` choice the ``#`` is
        replaced by the suffix, 1 when absent (``"INTernal2"``).

    Raises
    ------
    ScpiError
        -141 no choice matches; -144 longer than 12 characters; -128 numeric data;
        -158 / -168 / -178 string, block or expression data.

    References
    ----------
    IEEE 488.2-1992 §7.7.1 character program data; SCPI-1999 Vol. 1 §6.2.1 long and
    short forms, §7.3 discrete parameters (from memory).
    """
    kind = _token_kind(token)
    if kind != "char":
        raise _not_allowed(kind, "character data", token)
    if not _CHARDATA.fullmatch(token):
        raise ScpiError(-141, _short(token))
    if len(token) > MAX_MNEMONIC_CHARS:
        raise ScpiError(-144, _short(token))
    table = _compile_choices(tuple(choices))
    word = token.upper()
    hit = table.get(word)
    if hit is not None:
        declared, has_suffix = hit
        return declared.replace("#", "1") if has_suffix else declared
    stem = word.rstrip("0123456789")
    if stem != word:
        hit = table.get(stem)
        if hit is not None and hit[1]:
            return hit[0].replace("#", str(int(word[len(stem):])))
    raise ScpiError(-141, _short(token))


def parse_string(token: str) -> str:
    """Parse string program data: ``"..."`` or ``'...'`` with the quote doubled inside.

    Raises
    ------
    ScpiError
        -151 malformed quoting; -104 not string data.

    References
    ----------
    IEEE 488.2-1992 §7.7.5 string program data (either quote; a quote inside is doubled),
    from memory.
    """
    if not token or token[0] not in "\"'":
        raise ScpiError(-104, f"string expected, got {_short(token)}")
    q = token[0]
    if len(token) < 2 or token[-1] != q:
        raise ScpiError(-151, _short(token))
    inner = token[1:-1]
    if q in inner.replace(q + q, ""):
        raise ScpiError(-151, _short(token))
    return inner.replace(q + q, q)


# ----------------------------------------------------------------------------- formatting


def format_nr1(x: float) -> str:
    """Format an integer response (NR1), e.g. ``"5"``, ``"-12"``.

    Non-integral values are rounded half to even; NaN and infinities are sent as the
    SCPI sentinels 9.91E+37 and +/-9.9E+37 (NR3, the only form that can carry them).

    References
    ----------
    IEEE 488.2-1992 §8.7.2 <NR1 NUMERIC RESPONSE DATA>; SCPI-1999 Vol. 1 §7.2.1 NaN
    and infinity values (from memory).
    """
    if isinstance(x, bool | int | np.integer):
        return str(int(x))
    value = float(x)
    if not math.isfinite(value):
        return format_nr3(value)
    return str(round(value))


def format_nr2(x: float) -> str:
    """Format a fixed-point response (NR2) with the shortest digits that round-trip.

    E.g. ``1.5 -> "1.5"``, ``3 -> "3.0"``, ``1e-5 -> "0.00001"``. NaN and infinities are
    sent as the SCPI sentinels in NR3 form.

    References
    ----------
    IEEE 488.2-1992 §8.7.3 <NR2 NUMERIC RESPONSE DATA> (explicit decimal point, no
    exponent), from memory.
    """
    value = float(x)
    if not math.isfinite(value):
        return format_nr3(value)
    return np.format_float_positional(value, unique=True, trim="0")


def format_nr3(x: float, *, digits: int = 7) -> str:
    """Format a floating-point response (NR3), e.g. ``"1.234567E+00"``.

    Parameters
    ----------
    x : float
        Value; NaN is sent as 9.91E+37, +/-infinity as +/-9.9E+37.
    digits : int
        Significant digits, 1..17; 7 by default (see the module notes).

    References
    ----------
    IEEE 488.2-1992 §8.7.4 <NR3 NUMERIC RESPONSE DATA>; SCPI-1999 Vol. 1 §7.2.1 NaN and
    infinity (from memory).
    """
    if not 1 <= digits <= 17:
        raise ValueError(f"{digits=} must be in 1..17")
    value = float(x)
    if math.isnan(value):
        value = NAN_VALUE
    elif math.isinf(value):
        value = math.copysign(OVERFLOW_VALUE, value)
    return f"{value:.{digits - 1}E}"


def format_list(values, *, digits: int = 7) -> str:
    """Format numbers as a comma-separated list of NR3 responses.

    Parameters
    ----------
    values : sequence of float or numpy.ndarray
        The numbers; NaN and infinities become the SCPI sentinels.
    digits : int
        Significant digits of each element, as in :func:`format_nr3`.

    Returns
    -------
    str
        E.g. ``"1.000000E+00,-2.500000E-01"``; empty for no values.

    References
    ----------
    IEEE 488.2-1992 §8.4.3 <RESPONSE DATA SEPARATOR> ``,`` and §8.7.4 NR3 (from memory);
    SCPI-1999 Vol. 1 §7.2.1 NaN / infinity values (from memory).
    """
    if not 1 <= digits <= 17:
        raise ValueError(f"{digits=} must be in 1..17")
    arr = np.asarray(values, dtype=np.float64).ravel()
    if not np.isfinite(arr).all():
        arr = np.where(np.isnan(arr), NAN_VALUE, arr)
        arr = np.where(np.isinf(arr), np.copysign(OVERFLOW_VALUE, arr), arr)
    return ",".join(map(f"{{:.{digits - 1}E}}".format, arr.tolist()))


def format_boolean(b: bool) -> str:
    """Format a boolean response: ``"1"`` or ``"0"``.

    References
    ----------
    SCPI-1999 Vol. 1 §7.3 (Boolean responses are NR1 1 or 0), from memory.
    """
    return "1" if b else "0"


def format_string(text: str) -> str:
    """Format string response data: double-quoted, inner double quotes doubled.

    References
    ----------
    IEEE 488.2-1992 §8.7.8 <STRING RESPONSE DATA>, from memory.
    """
    return '"' + text.replace('"', '""') + '"'


# ----------------------------------------------------------------------- response parsing

_RESP_NUM = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_RESP_NUM_RE = re.compile(r"\s*(" + _RESP_NUM + r")\s*", re.ASCII)
_RESP_SPECIAL = {"NAN": math.nan, "INF": math.inf, "+INF": math.inf, "-INF": -math.inf,
                 "NINF": -math.inf}
_RESP_LIST_CHARS = re.compile(r"[0-9eE+\-., \t\r\n]*", re.ASCII)


def _sentinel(value: float) -> float:
    a = abs(value)
    if 9.9e37 * (1 - 1e-6) <= a <= 9.91e37 * (1 + 1e-6):
        if a >= 9.905e37:
            return math.nan
        return math.copysign(math.inf, value)
    return value


def parse_response_number(text: str | bytes) -> float:
    """Parse a numeric response (NR1, NR2 or NR3) into a float.

    9.91E37 becomes NaN, +/-9.9E37 becomes +/-infinity; ``NAN``, ``INF``, ``-INF`` and
    ``NINF`` are accepted too. Surrounding white space and terminators are ignored.

    Raises
    ------
    ProtocolError
        When the text is not a number.

    References
    ----------
    IEEE 488.2-1992 §8.7.2-8.7.4 NR1/NR2/NR3 response data; SCPI-1999 Vol. 1 §7.2.1
    NaN / infinity representation (from memory).
    """
    if isinstance(text, bytes | bytearray | memoryview):
        text = bytes(text).decode("ascii", errors="replace")
    m = _RESP_NUM_RE.fullmatch(text)
    if m is None:
        special = _RESP_SPECIAL.get(text.strip().upper())
        if special is not None:
            return special
        raise ProtocolError("not a numeric response", text)
    return _sentinel(float(m.group(1)))


def parse_response_list(text: str | bytes) -> list[float]:
    """Parse a comma-separated list of numeric responses; an empty reply is an empty list.

    Raises
    ------
    ProtocolError
        When any element is not a number (the text is quoted, shortened).

    References
    ----------
    IEEE 488.2-1992 §8.4.3 response data separator ``,``, §8.7.2-8.7.4 (from memory).
    """
    if isinstance(text, bytes | bytearray | memoryview):
        text = bytes(text).decode("ascii", errors="replace")
    if not text.strip():
        return []
    if _RESP_LIST_CHARS.fullmatch(text) is not None:
        # Within this character set float() accepts exactly the NR1/NR2/NR3 forms
        # (no letters but E, so no "inf"/"nan"; no "_"), so it validates as it converts.
        try:
            values = [float(t) for t in text.split(",")]
        except ValueError:
            pass
        else:
            if any(abs(v) >= 9.9e37 * (1 - 1e-6) for v in values):
                values = [_sentinel(v) for v in values]
            return values
    out = []
    for i, item in enumerate(text.split(",")):
        try:
            out.append(parse_response_number(item))
        except ProtocolError:
            raise ProtocolError(
                f"element {i + 1} of a numeric list is not a number ({item.strip()[:20]!r})", text
            ) from None
    return out


def parse_response_boolean(text: str | bytes) -> bool:
    """Parse a boolean response: ``1``/``0`` (also ``ON``/``OFF``, any NR form of 0 or 1).

    Raises
    ------
    ProtocolError
        When the text is neither.

    References
    ----------
    SCPI-1999 Vol. 1 §7.3 Boolean response is NR1 1|0 (from memory).
    """
    if isinstance(text, bytes | bytearray | memoryview):
        text = bytes(text).decode("ascii", errors="replace")
    word = text.strip().upper()
    if word in ("1", "ON"):
        return True
    if word in ("0", "OFF"):
        return False
    try:
        value = parse_response_number(word)
    except ProtocolError:
        raise ProtocolError("not a boolean response", text) from None
    if value == 1.0:
        return True
    if value == 0.0:
        return False
    raise ProtocolError("not a boolean response", text)


def parse_response_string(text: str | bytes) -> str:
    """Parse string response data: ``"..."`` with inner ``""`` meaning one quote.

    Raises
    ------
    ProtocolError
        When the text is not one well-formed double-quoted string.

    References
    ----------
    IEEE 488.2-1992 §8.7.8 <STRING RESPONSE DATA>, from memory.
    """
    if isinstance(text, bytes | bytearray | memoryview):
        text = bytes(text).decode("ascii", errors="replace")
    s = text.strip()
    if len(s) < 2 or s[0] != '"' or s[-1] != '"':
        raise ProtocolError("not a quoted string response", text)
    inner = s[1:-1]
    if '"' in inner.replace('""', ""):
        raise ProtocolError("stray quote in string response", text)
    return inner.replace('""', '"')


_ERROR_RE = re.compile(r"\s*([+-]?\d+)\s*,\s*(\".*\")\s*", re.DOTALL | re.ASCII)


def parse_error_response(text: str | bytes) -> tuple[int, str]:
    """Parse a ``SYSTem:ERRor?`` reply ``<code>,"<message>"`` into ``(code, message)``.

    Raises
    ------
    ProtocolError
        When the reply does not have that shape.

    References
    ----------
    SCPI-1999 Vol. 2 §21.8.8 SYSTem:ERRor[:NEXT]? (from memory).
    """
    if isinstance(text, bytes | bytearray | memoryview):
        text = bytes(text).decode("ascii", errors="replace")
    m = _ERROR_RE.fullmatch(text)
    if m is None:
        raise ProtocolError("not an error queue response", text)
    return int(m.group(1)), parse_response_string(m.group(2))
