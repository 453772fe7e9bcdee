"""Cell codec of the points tables: Python values <-> CSV cell text, losslessly.

Rules (our own format, documented here and in DEVELOPERS.md "Run folder"):

- ``None`` is the empty cell.
- ``True`` / ``False`` are ``true`` / ``false``.
- integers are written in decimal (``-12``) and read back as ``int``.
- floats are written with ``repr()`` (shortest text that reads back to the same double),
  so they read back bit-identical; ``nan``, ``inf`` and ``-inf`` included. NaN reads back
  as the one quiet NaN: the sign bit and payload of a NaN are not kept.
- a string is written as it is when reading it back gives the same string; otherwise
  (empty, ``true``, ``1.5``, ``nan``, a leading backslash, a line break) it is written as a
  backslash followed by the string with ``\\`` -> ``\\\\``, CR -> ``\\r``, LF -> ``\\n``.
  So every record is one physical line, which is what makes a torn last line detectable.
"""

from __future__ import annotations

import math
import numbers
import re
from typing import Any

import numpy as np

Cell = float | int | bool | str | None

_INT = re.compile(r"[+-]?[0-9]+")
_FLOAT = re.compile(r"[+-]?(?:[0-9]+\.[0-9]*|\.[0-9]+|[0-9]+)(?:[eE][+-]?[0-9]+)?|[+-]?(?:nan|inf)")
_ESCAPE = "\\"


def encode(value: Any) -> str:
    """Return the cell text for ``value`` (None, bool, integer, real number or string).

    numpy scalars are accepted (``numpy.float64``, ``numpy.bool_``, ``numpy.int64``).

    Raises
    ------
    TypeError
        For any other type (lists, dicts, arrays: store those as waveforms).
    """
    if value is None:
        return ""
    if isinstance(value, bool | np.bool_):
        return "true" if value else "false"
    if isinstance(value, str):
        return encode_text(value)
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        x = float(value)
        return "nan" if math.isnan(x) else float.__repr__(x)
    raise TypeError(f"cannot store a {type(value).__name__} in a points table: {value!r}")


def encode_text(text: str) -> str:
    """Return the cell text of a string, escaped only when it would not read back as itself."""
    plain = text and not text.startswith(_ESCAPE) and "\n" not in text and "\r" not in text
    if plain and isinstance(_decode_plain(text), str):
        return text
    body = text.replace(_ESCAPE, _ESCAPE * 2).replace("\r", "\\r").replace("\n", "\\n")
    return _ESCAPE + body


def encode_key(text: str) -> str:
    """Return the cell text of a value that is always text (the ``point`` column)."""
    if text.startswith(_ESCAPE) or "\n" in text or "\r" in text:
        return _ESCAPE + text.replace(_ESCAPE, _ESCAPE * 2).replace("\r", "\\r").replace("\n", "\\n")
    return text


def decode(cell: str) -> Cell:
    """Return the Python value of a cell written by :func:`encode`."""
    if cell.startswith(_ESCAPE):
        return _unescape(cell[1:])
    return _decode_plain(cell)


def decode_text(cell: str) -> str:
    """Return the string of a cell that always holds text (the ``point`` column)."""
    return _unescape(cell[1:]) if cell.startswith(_ESCAPE) else cell


def _decode_plain(cell: str) -> Cell:
    if cell == "":
        return None
    if cell == "true":
        return True
    if cell == "false":
        return False
    if _INT.fullmatch(cell):
        return int(cell)
    if _FLOAT.fullmatch(cell):
        return float(cell)
    return cell


def _unescape(body: str) -> str:
    out: list[str] = []
    i = 0
    n = len(body)
    while i < n:
        ch = body[i]
        if ch == _ESCAPE and i + 1 < n:
            nxt = body[i + 1]
            out.append({"n": "\n", "r": "\r", _ESCAPE: _ESCAPE}.get(nxt, _ESCAPE + nxt))
            i += 2
        else:
            out.append(ch)
            i += 1
    return "".join(out)
