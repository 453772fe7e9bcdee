"""Lexer for program messages: units separated by ``;``, a header, parameters split by ``,``.

The lexer knows nothing of which headers exist; it cuts a message into
:class:`ProgramUnit` items and reports lexical errors as
:class:`~benchctl.scpi.errors.ScpiError` items. Quoted strings (either quote, doubled to
escape), definite blocks ``#<n><len><bytes>`` (skipped by their declared length, so their
bytes may contain ``;`` ``,`` or newlines), indefinite blocks ``#0...`` (to the end of the
message, less its terminator) and parenthesised expression data are kept whole.

Messages are ``str``; a server that receives bytes decodes them as latin-1 so that every
byte becomes one character and block payloads survive unchanged.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from benchctl.scpi.errors import ScpiError
from benchctl.scpi.mnemonic import MAX_MNEMONIC_CHARS

# IEEE 488.2-1992 §7.4.1.2 (from memory): <white space> is any of the bytes 00-09 and
# 0B-20 hex; NL (0A) is the terminator, taken here as white space where it can only end
# the message.
_WS = "".join(chr(c) for c in range(33))
_SLOW_CHARS = re.compile(r"[\"'#(]")
_SPECIAL = re.compile(r"[\"';#()]")
_HEADER = re.compile(
    r"[\x00-\x20]*(:?)(\*?)([A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*)(\?)?"
)
_INFO_CHARS = 40


def _short(text: str, limit: int = _INFO_CHARS) -> str:
    text = text.strip(_WS).replace("\r", "\\r").replace("\n", "\\n")
    return text if len(text) <= limit else text[: limit - 3] + "..."


@dataclass(frozen=True, slots=True)
class ProgramUnit:
    """One program message unit.

    Attributes
    ----------
    header : str
        Header as typed, without a leading ``:`` or ``*`` and without ``?``
        (``"sour2:volt"``, ``"IDN"``).
    rooted : bool
        The header began with ``:`` (resolve from the root, not the current path).
    common : bool
        An IEEE 488.2 common command (``*IDN?``); it does not change the current path.
    query : bool
        The header ended with ``?``.
    params : tuple of str
        Parameter tokens, white space trimmed; strings keep their quotes and blocks their
        ``#`` header.
    text : str
        The unit as typed, shortened, for error messages.
    """

    header: str
    rooted: bool
    common: bool
    query: bool
    params: tuple[str, ...]
    text: str


def _skip_string(text: str, i: int) -> int:
    """Return the index just past the quoted string starting at ``text[i]``."""
    q = text[i]
    k = i + 1
    while True:
        k = text.find(q, k)
        if k < 0:
            raise ScpiError(-151, f"unterminated string {_short(text[i:])}")
        if k + 1 < len(text) and text[k + 1] == q:
            k += 2
            continue
        return k + 1


def _skip_block(text: str, i: int) -> int:
    """Return the index just past the block starting at ``text[i] == '#'`` (a digit follows)."""
    n = ord(text[i + 1]) - 0x30
    if n == 0:
        return len(text)
    digits = text[i + 2 : i + 2 + n]
    if len(digits) < n or not digits.isdigit() or not digits.isascii():
        raise ScpiError(-161, f"bad block header {_short(text[i : i + 2 + n])}")
    end = i + 2 + n + int(digits)
    if end > len(text):
        raise ScpiError(
            -161, f"block declares {int(digits)} bytes, {len(text) - i - 2 - n} present"
        )
    return end


def _skip_expression(text: str, i: int) -> int:
    """Return the index just past the parenthesised expression starting at ``text[i]``."""
    depth = 0
    k = i
    n = len(text)
    while k < n:
        c = text[k]
        if c == "(":
            depth += 1
        elif c == ")":
            depth -= 1
            if depth == 0:
                return k + 1
        elif c in "\"'":
            k = _skip_string(text, k)
            continue
        k += 1
    raise ScpiError(-171, f"unbalanced parentheses {_short(text[i:])}")


def split_units(message: str) -> tuple[list[str], ScpiError | None]:
    """Cut a program message at the ``;`` that separate its units.

    Returns
    -------
    units : list of str
        The units before any lexical error, as typed.
    error : ScpiError or None
        The lexical error that stopped the cut (the rest of the message is lost).

    References
    ----------
    IEEE 488.2-1992 §7.3.3 <PROGRAM MESSAGE UNIT SEPARATOR> ``;`` and §7.7.5 / §7.7.6
    (strings and blocks are opaque to it), from memory.
    """
    if _SLOW_CHARS.search(message) is None:
        return message.split(";"), None
    units: list[str] = []
    start = pos = 0
    try:
        while True:
            m = _SPECIAL.search(message, pos)
            if m is None:
                units.append(message[start:])
                return units, None
            c = m.group()
            i = m.start()
            if c == ";":
                units.append(message[start:i])
                start = pos = i + 1
            elif c in "\"'":
                pos = _skip_string(message, i)
            elif c == "#":
                if i + 1 < len(message) and "0" <= message[i + 1] <= "9":
                    pos = _skip_block(message, i)
                else:
                    pos = i + 1
            elif c == "(":
                pos = _skip_expression(message, i)
            else:  # ")" without "("
                raise ScpiError(-171, f"unbalanced parentheses {_short(message[start:])}")
    except ScpiError as exc:
        return units, exc


def split_params(text: str) -> tuple[str, ...]:
    """Split the parameter part of a unit at its ``,`` separators.

    Parameters
    ----------
    text : str
        What follows the header separator (white space) of one unit.

    Returns
    -------
    tuple of str
        Trimmed tokens; a definite block token ends exactly at its last declared byte.

    Raises
    ------
    ScpiError
        -102 a missing parameter between or after commas; -103 two parameters not
        separated by a comma; -151 / -161 / -171 broken strings, blocks, expressions.

    References
    ----------
    IEEE 488.2-1992 §7.4.2 <PROGRAM DATA SEPARATOR> ``,`` with optional white space
    (from memory).
    """
    if _SLOW_CHARS.search(text) is None:
        tokens = tuple(t.strip(_WS) for t in text.split(","))
        if "" in tokens:
            raise ScpiError(-102, f"empty parameter in {_short(text)}")
        return tokens
    tokens_l: list[str] = []
    n = len(text)
    pos = 0
    while True:
        while pos < n and text[pos] in _WS:
            pos += 1
        if pos >= n:
            raise ScpiError(-102, f"empty parameter in {_short(text)}")
        c = text[pos]
        if c in "\"'":
            end = _skip_string(text, pos)
        elif c == "#" and pos + 1 < n and "0" <= text[pos + 1] <= "9":
            end = _skip_block(text, pos)
        elif c == "(":
            end = _skip_expression(text, pos)
        else:
            end = text.find(",", pos)
            if end < 0:
                end = n
            token = text[pos:end].rstrip(_WS)
            if not token:
                raise ScpiError(-102, f"empty parameter in {_short(text)}")
            tokens_l.append(token)
            pos = end
            if pos >= n:
                return tuple(tokens_l)
            pos += 1
            continue
        tokens_l.append(text[pos:end])
        pos = end
        while pos < n and text[pos] in _WS:
            pos += 1
        if pos >= n:
            return tuple(tokens_l)
        if text[pos] != ",":
            raise ScpiError(-103, f"expected ',' after {_short(tokens_l[-1])}")
        pos += 1


def parse_unit(text: str) -> ProgramUnit | None:
    """Parse one program message unit; None when it is only white space.

    Raises
    ------
    ScpiError
        -102 malformed header; -112 a mnemonic longer than 12 characters; -111 a header
        not followed by white space, ``;`` or the end; parameter errors from
        :func:`split_params`.

    References
    ----------
    IEEE 488.2-1992 §7.6 program headers (compound ``:``, common ``*``, query ``?``) and
    §7.4.3 <PROGRAM HEADER SEPARATOR> (white space), from memory; SCPI-1999 Vol. 1 §6.2.
    """
    m = _HEADER.match(text)
    if m is None:
        if not text.strip(_WS):
            return None
        raise ScpiError(-102, f"bad header {_short(text)}")
    rooted, star, header, query = m.groups()
    if star and (rooted or ":" in header):
        raise ScpiError(-102, f"bad common command header {_short(text)}")
    for node in header.split(":"):
        if len(node) > MAX_MNEMONIC_CHARS:
            raise ScpiError(-112, _short(node))
    rest = text[m.end() :]
    params: tuple[str, ...] = ()
    if rest:
        if rest[0] not in _WS:
            raise ScpiError(-111, f"{_short(text)}")
        body = rest.lstrip(_WS)
        if body:
            params = split_params(body)
    return ProgramUnit(header, bool(rooted), bool(star), bool(query), params, _short(text))
