"""SCPI error codes and the instrument error/event queue.

:class:`ScpiError` is the server side's way of saying "queue this SCPI error"; it is not
part of the :mod:`benchctl.errors` tree because it never leaves an instrument model: the
command tree catches it and pushes it onto an :class:`ErrorQueue`, and a client reads the
queue with ``SYSTem:ERRor?``.
"""

from __future__ import annotations

from collections import deque

# Standard error/event numbers and their messages.
# Source: SCPI-1999 Vol. 2 "Command Reference", ch. 21.8 (error/event queue) and
# IEEE 488.2-1992 section 11.5 (standard event status bits behind the classes); the
# numbers and wording are from memory of SCPI-1999 Vol. 2 §21.8.
STANDARD_ERRORS: dict[int, str] = {
    0: "No error",
    # Command errors (-100 .. -199): the parser found a problem (sets ESR bit 5, CME).
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -103: "Invalid separator",
    -104: "Data type error",
    -105: "GET not allowed",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -110: "Command header error",
    -111: "Header separator error",
    -112: "Program mnemonic too long",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -120: "Numeric data error",
    -121: "Invalid character in number",
    -123: "Exponent too large",
    -124: "Too many digits",
    -128: "Numeric data not allowed",
    -130: "Suffix error",
    -131: "Invalid suffix",
    -134: "Suffix too long",
    -138: "Suffix not allowed",
    -140: "Character data error",
    -141: "Invalid character data",
    -144: "Character data too long",
    -148: "Character data not allowed",
    -150: "String data error",
    -151: "Invalid string data",
    -158: "String data not allowed",
    -160: "Block data error",
    -161: "Invalid block data",
    -168: "Block data not allowed",
    -170: "Expression error",
    -171: "Invalid expression",
    -178: "Expression data not allowed",
    # Execution errors (-200 .. -299): valid command the device cannot carry out (EXE).
    -200: "Execution error",
    -210: "Trigger error",
    -211: "Trigger ignored",
    -213: "Init ignored",
    -220: "Parameter error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -223: "Too much data",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -240: "Hardware error",
    -241: "Hardware missing",
    # Device-specific errors (-300 .. -399) (DDE).
    -300: "Device-specific error",
    -310: "System error",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    # Query errors (-400 .. -499) (QYE), IEEE 488.2 §6.3 message exchange protocol.
    -400: "Query error",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
    -430: "Query DEADLOCKED",
    -440: "Query UNTERMINATED after indefinite response",
}

QUEUE_OVERFLOW = -350

# SCPI-1999 Vol. 2 §21.8 (from memory): the error/event string, info included, is at most
# 255 characters long.
MAX_ERROR_TEXT = 255


def error_message(code: int) -> str:
    """Return the standard message for ``code``, or a generic one for its class.

    Parameters
    ----------
    code : int
        SCPI error number (negative standard, positive device-specific).

    Returns
    -------
    str
        E.g. ``"Undefined header"`` for -113; ``"Command error"`` for an unlisted -1xx.

    References
    ----------
    SCPI-1999 Vol. 2 §21.8, error/event numbers and classes (from memory).
    """
    text = STANDARD_ERRORS.get(code)
    if text is not None:
        return text
    if -199 <= code <= -100:
        return STANDARD_ERRORS[-100]
    if -299 <= code <= -200:
        return STANDARD_ERRORS[-200]
    if -399 <= code <= -300:
        return STANDARD_ERRORS[-300]
    if -499 <= code <= -400:
        return STANDARD_ERRORS[-400]
    return "Device-specific error"


class ScpiError(Exception):
    """Raised inside a command handler or parser to mean "queue this SCPI error".

    Parameters
    ----------
    code : int
        SCPI error number, e.g. -222 for "Data out of range".
    info : str
        Optional device-dependent information, appended to the message after ``;``.

    References
    ----------
    SCPI-1999 Vol. 2 §21.8.1 (from memory): ``<code>,"<message>;<device info>"``.
    """

    def __init__(self, code: int, info: str = "") -> None:
        self.code = int(code)
        self.info = str(info)
        self.message = error_message(self.code)
        super().__init__(f"{self.code},{self.message}" + (f";{self.info}" if self.info else ""))


def _printable(text: str) -> str:
    out = []
    for ch in text:
        o = ord(ch)
        if ch == '"':
            out.append("'")
        elif 32 <= o < 127:
            out.append(ch)
        elif ch in "\r\n\t":
            out.append(" ")
        else:
            out.append("?")
    return "".join(out)


class ErrorQueue:
    """First-in first-out SCPI error/event queue with the standard overflow rule.

    Parameters
    ----------
    capacity : int
        Maximum number of entries, >= 2. When an error arrives while the queue is full,
        the most recent entry is replaced by ``-350,"Queue overflow"``, so the oldest
        errors are kept and the last entry says that some were lost.

    Notes
    -----
    Reading an empty queue gives ``(0, "No error")``. ``*CLS`` clears the queue
    (the command handler calls :meth:`clear`). Error text (message + ``;`` + info) is cut
    to 255 characters and made printable ASCII with double quotes replaced by single
    quotes, so :meth:`format_next` always gives one well-formed response line.

    References
    ----------
    SCPI-1999 Vol. 2 §21.8 error/event queue: FIFO, overflow replaces the most recent
    entry with -350, empty reads 0,"No error" (from memory). IEEE 488.2-1992 §10.3
    ``*CLS`` clears the status data structures including the queue (from memory).
    """

    __slots__ = ("_capacity", "_entries")

    def __init__(self, capacity: int = 16) -> None:
        if capacity < 2:
            raise ValueError(f"{capacity=} must be >= 2")
        self._capacity = int(capacity)
        self._entries: deque[tuple[int, str]] = deque()

    @property
    def capacity(self) -> int:
        """Maximum number of entries."""
        return self._capacity

    def push(self, code: int, info: str = "") -> None:
        """Queue error ``code`` with optional device-dependent ``info``.

        Parameters
        ----------
        code : int
            SCPI error number; 0 ("No error") is ignored.
        info : str
            Extra text, appended to the standard message after ``;``.

        References
        ----------
        SCPI-1999 Vol. 2 §21.8 (from memory).
        """
        code = int(code)
        if code == 0:
            return
        text = error_message(code)
        if info:
            text = f"{text};{info}"
        text = _printable(text)
        if len(text) > MAX_ERROR_TEXT:
            text = text[: MAX_ERROR_TEXT - 3] + "..."
        if len(self._entries) < self._capacity:
            self._entries.append((code, text))
        else:
            self._entries[-1] = (QUEUE_OVERFLOW, STANDARD_ERRORS[QUEUE_OVERFLOW])

    def pop(self) -> tuple[int, str]:
        """Remove and return the oldest entry as ``(code, text)``; ``(0, "No error")`` if empty.

        References
        ----------
        SCPI-1999 Vol. 2 §21.8 (from memory): FIFO; an empty queue reads 0,"No error".
        """
        if self._entries:
            return self._entries.popleft()
        return 0, STANDARD_ERRORS[0]

    def peek(self) -> tuple[int, str]:
        """Return the oldest entry without removing it; ``(0, "No error")`` if empty.

        References
        ----------
        SCPI-1999 Vol. 2 §21.8 (from memory).
        """
        if self._entries:
            return self._entries[0]
        return 0, STANDARD_ERRORS[0]

    def format_next(self) -> str:
        """Pop the oldest entry and format it as a ``SYSTem:ERRor?`` response.

        Returns
        -------
        str
            ``<NR1>,"<text>"``, e.g. ``-113,"Undefined header;FOO:BAR"``.

        References
        ----------
        SCPI-1999 Vol. 2 §21.8.8 SYSTem:ERRor[:NEXT]? response format (from memory);
        IEEE 488.2-1992 §8.7.8 string response data (from memory).
        """
        code, text = self.pop()
        return f'{code},"{text}"'

    def clear(self) -> None:
        """Remove every entry (what ``*CLS`` does to the queue).

        References
        ----------
        IEEE 488.2-1992 §10.3 ``*CLS`` (from memory).
        """
        self._entries.clear()

    def codes(self) -> list[int]:
        """Return the queued codes, oldest first, without removing them.

        References
        ----------
        SCPI-1999 Vol. 2 §21.8.6 SYSTem:ERRor:COUNt? reports ``len`` of this (from memory).
        """
        return [code for code, _ in self._entries]

    def __len__(self) -> int:
        return len(self._entries)

    def __repr__(self) -> str:
        return f"ErrorQueue(capacity={self._capacity}, entries={list(self._entries)!r})"
