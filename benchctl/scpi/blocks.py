"""IEEE 488.2 arbitrary block data: ``#<n><length><bytes>`` and ``#0<bytes><NL>``.

Encoding and decoding go through numpy without per-sample Python work:
``ndarray.astype('>i2', copy=False)`` + one ``b"".join`` to build, ``numpy.frombuffer``
(a read-only view on the received buffer, no copy) to read.
"""

from __future__ import annotations

from typing import Literal

import numpy as np

from benchctl.errors import ProtocolError

BlockDtype = Literal["int8", "uint8", "int16", "uint16", "int32", "float32", "float64"]

# IEEE 488.2-1992 §7.7.6.2 / §8.7.9 (from memory): one non-zero digit says how many
# length digits follow, so the length has at most 9 digits.
MAX_DEFINITE_LENGTH = 999_999_999

_DTYPES = {
    "int8": "i1",
    "uint8": "u1",
    "int16": "i2",
    "uint16": "u2",
    "int32": "i4",
    "float32": "f4",
    "float64": "f8",
}


class IncompleteBlock(ProtocolError):
    """The buffer is too short to hold the whole block header (read more, then retry)."""


def block_dtype(dtype: str | np.dtype, *, big_endian: bool = True) -> np.dtype:
    """Return the numpy dtype with explicit byte order for a block element type.

    Parameters
    ----------
    dtype : str or numpy.dtype
        ``"int8"``, ``"int16"``, ``"float32"`` (also ``"uint8"``, ``"uint16"``,
        ``"int32"``, ``"float64"``) or a numpy dtype of one of those kinds.
    big_endian : bool
        True for the IEEE 488.2 / SCPI ``FORMat:BORDer NORMal`` order (most significant
        byte first), False for ``SWAPped``.

    Returns
    -------
    numpy.dtype
        E.g. ``dtype('>i2')``.

    References
    ----------
    SCPI-1999 Vol. 2 §9 FORMat:BORDer NORMal|SWAPped (from memory).
    """
    if isinstance(dtype, str) and dtype in _DTYPES:
        code = _DTYPES[dtype]
    else:
        try:
            nd = np.dtype(dtype)
        except TypeError:
            raise ValueError(f"{dtype=} is not a block element type") from None
        code = f"{nd.kind}{nd.itemsize}"
        if code not in _DTYPES.values():
            raise ValueError(f"{dtype=} is not a block element type")
    return np.dtype(("<" if not big_endian else ">") + code)


def _convert(data: np.ndarray, wire: np.dtype) -> np.ndarray:
    """Cast to the wire type; refuse integer targets that would change a value."""
    if wire.kind in "iu" and not np.can_cast(data.dtype, wire, casting="safe"):
        if data.dtype.kind == "f" and not np.isfinite(data).all():
            raise ValueError(f"non-finite values cannot be sent as {wire.name}")
        if data.size:
            info = np.iinfo(wire)
            if data.min() < info.min or data.max() > info.max:
                raise ValueError(f"values outside {info.min}..{info.max} cannot be sent as "
                                 f"{wire.name}")
            if data.dtype.kind == "f" and not np.array_equal(data, np.round(data)):
                raise ValueError(f"non-integral values cannot be sent as {wire.name}")
    return data.astype(wire, copy=False)


def encode_block(
    data: bytes | bytearray | memoryview | np.ndarray,
    *,
    dtype: str | None = None,
    big_endian: bool = True,
    indefinite: bool = False,
) -> bytes:
    """Encode data as IEEE 488.2 arbitrary block program/response data.

    Parameters
    ----------
    data : bytes or numpy.ndarray
        Raw bytes (sent as they are, already in wire order) or an array of samples.
    dtype : str, optional
        Element type on the wire: ``"int8"``, ``"int16"``, ``"float32"`` (or another
        :func:`block_dtype` name). Default: the array's own kind and size (raw bytes
        for bytes input).
    big_endian : bool
        Byte order of multi-byte elements (True = ``NORMal``).
    indefinite : bool
        False: definite form ``#<n><length><bytes>``. True: indefinite form
        ``#0<bytes>`` followed by the NL terminator that ends it.

    Returns
    -------
    bytes
        The whole block.

    Raises
    ------
    ValueError
        If the payload is longer than 999 999 999 bytes (definite form), the dtype is
        not a block element type, or an integer element type cannot hold a value
        exactly (out of range, non-integral or non-finite; integers never wrap).
        Float to float32 conversion rounds as numpy does.

    References
    ----------
    IEEE 488.2-1992 §7.7.6 <ARBITRARY BLOCK PROGRAM DATA> and §8.7.9 <DEFINITE LENGTH
    ARBITRARY BLOCK RESPONSE DATA> / §8.7.10 indefinite form (from memory).
    """
    if isinstance(data, np.ndarray):
        wire = block_dtype(dtype if dtype is not None else data.dtype, big_endian=big_endian)
        payload = memoryview(np.ascontiguousarray(_convert(data, wire))).cast("B")
    else:
        payload = memoryview(data).cast("B")
        if dtype is not None:  # bytes are already on the wire; check they are whole elements
            size = block_dtype(dtype).itemsize
            if payload.nbytes % size:
                raise ValueError(f"{payload.nbytes} bytes are not whole {dtype} elements")
    n = payload.nbytes
    if indefinite:
        return b"".join((b"#0", payload, b"\n"))
    if n > MAX_DEFINITE_LENGTH:
        raise ValueError(f"block payload of {n} bytes exceeds {MAX_DEFINITE_LENGTH}")
    length = str(n).encode("ascii")
    return b"".join((b"#", str(len(length)).encode("ascii"), length, payload))


def parse_block_header(buf: bytes | bytearray | memoryview) -> tuple[int, int | None]:
    """Parse the header at the start of ``buf``.

    Parameters
    ----------
    buf : bytes-like
        Received bytes beginning with ``#``.

    Returns
    -------
    header_length : int
        Bytes taken by the header (``2 + n``).
    payload_length : int or None
        Declared payload bytes; None for the indefinite form ``#0``.

    Raises
    ------
    IncompleteBlock
        If ``buf`` ends before the header does.
    ProtocolError
        If the header is malformed (no ``#``, a non-digit count or length).

    References
    ----------
    IEEE 488.2-1992 §7.7.6.2 and §8.7.9 (from memory).
    """
    mv = memoryview(buf).cast("B") if not isinstance(buf, bytes) else buf
    if len(mv) < 2:
        if len(mv) == 1 and mv[0] != 0x23:
            raise ProtocolError("block does not start with '#'", bytes(mv[:20]))
        raise IncompleteBlock("incomplete block header", bytes(mv[:20]))
    if mv[0] != 0x23:  # '#'
        raise ProtocolError("block does not start with '#'", bytes(mv[:20]))
    digit = mv[1]
    if not 0x30 <= digit <= 0x39:
        raise ProtocolError("block length-of-length is not a digit", bytes(mv[:20]))
    n = digit - 0x30
    if n == 0:
        return 2, None
    if len(mv) < 2 + n:
        raise IncompleteBlock("incomplete block header", bytes(mv[:20]))
    digits = bytes(mv[2 : 2 + n])
    if not digits.isdigit():
        raise ProtocolError("block length is not decimal digits", bytes(mv[: 2 + n + 8]))
    return 2 + n, int(digits)


def decode_block(
    buf: bytes | bytearray | memoryview,
    *,
    dtype: str | np.dtype,
    big_endian: bool = True,
) -> np.ndarray:
    """Decode one complete block into a numpy array (a view on ``buf``, no copy).

    Parameters
    ----------
    buf : bytes-like
        The whole block: header, payload and optionally the response terminator
        (``\\n`` or ``\\r\\n``) after a definite payload. An indefinite ``#0`` block runs
        to the end of ``buf``, less one trailing ``\\n`` (its terminator).
    dtype : str or numpy.dtype
        Element type (see :func:`block_dtype`).
    big_endian : bool
        Byte order of multi-byte elements.

    Returns
    -------
    numpy.ndarray
        One-dimensional, read-only when ``buf`` is immutable bytes.

    Raises
    ------
    ProtocolError
        If the header is malformed or incomplete, if fewer or more bytes follow the
        header than it declares (only a terminator may follow), or if the payload is not
        a whole number of elements.

    References
    ----------
    IEEE 488.2-1992 §8.7.9 definite and §8.7.10 indefinite length arbitrary block
    response data (from memory).
    """
    wire = block_dtype(dtype, big_endian=big_endian)
    if isinstance(buf, memoryview):
        buf = buf.cast("B")
    try:
        start, length = parse_block_header(buf)
    except IncompleteBlock as exc:
        raise ProtocolError("block header incomplete", exc.text) from None
    total = len(buf)
    if length is None:
        # IEEE 488.2 §8.7.10 (from memory): the indefinite form ends with NL^END only; a
        # CR before it is payload, so only one trailing NL is removed.
        end = total
        if end > start and buf[end - 1 : end] == b"\n":
            end -= 1
        length = end - start
    else:
        extra = total - start - length
        if extra < 0:
            raise ProtocolError(
                f"block declares {length} bytes but {total - start} arrived",
                bytes(buf[: min(total, start + 8)]),
            )
        if extra > 0:
            tail = bytes(buf[start + length :])
            if tail not in (b"\n", b"\r\n"):
                raise ProtocolError(
                    f"block declares {length} bytes but {total - start} arrived",
                    bytes(buf[:start]) + b"..." + tail[:16],
                )
    if length % wire.itemsize:
        raise ProtocolError(
            f"block payload of {length} bytes is not a whole number of {wire.itemsize}-byte "
            "elements",
            bytes(buf[:start]),
        )
    return np.frombuffer(buf, dtype=wire, count=length // wire.itemsize, offset=start)
