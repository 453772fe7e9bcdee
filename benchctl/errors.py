"""One exception tree for the whole project.

Every error benchctl raises on purpose derives from :class:`BenchError`. Errors from
pyvisa and the operating system are converted into these at the transport edge
(``benchctl.drivers.transport``); nothing above the drivers sees a pyvisa exception.
"""

from __future__ import annotations

_MAX_TEXT = 80


def shorten(text: str | bytes, limit: int = _MAX_TEXT) -> str:
    """Return ``text`` as a printable one-line string of at most ``limit`` characters."""
    if isinstance(text, bytes | bytearray | memoryview):
        text = bytes(text).decode("ascii", errors="backslashreplace")
    text = text.replace("\r", "\\r").replace("\n", "\\n")
    return text if len(text) <= limit else text[: limit - 3] + "..."


class BenchError(Exception):
    """Root of every error benchctl raises on purpose."""


class ConfigError(BenchError):
    """A plan, bench, dialect or board file is wrong.

    Parameters
    ----------
    file : str
        The file (or ``"<string>"``) that holds the problem.
    key : str
        Dotted key path inside the file, e.g. ``"steps[2].params.stop_v"``.
    reason : str
        What is wrong, with the bad value shown.
    """

    def __init__(self, file: str, key: str, reason: str) -> None:
        self.file = str(file)
        self.key = key
        self.reason = reason
        super().__init__(f"{self.file}: {key}: {reason}" if key else f"{self.file}: {reason}")


class ConfigErrors(BenchError):
    """Several :class:`ConfigError` found in one validation pass, reported together."""

    def __init__(self, errors: list[ConfigError]) -> None:
        self.errors = list(errors)
        super().__init__("\n".join(str(e) for e in self.errors))


class ProtocolError(BenchError):
    """A malformed SCPI message, reply or block; ``text`` is the offending text, shortened."""

    def __init__(self, reason: str, text: str | bytes = "") -> None:
        self.reason = reason
        self.text = shorten(text) if text else ""
        super().__init__(f"{reason}: {self.text!r}" if self.text else reason)


class InstrumentError(BenchError):
    """The instrument reported an error, or a request was refused before being sent.

    Parameters
    ----------
    code : int
        SCPI error code (negative standard codes, positive device codes; 0 if none).
    message : str
        The instrument's (or our) message.
    command : str
        The command that caused it, if known.
    resource : str
        The VISA resource string of the instrument, if known.
    """

    def __init__(self, code: int, message: str, command: str = "", resource: str = "") -> None:
        self.code = int(code)
        self.message = message
        self.command = command
        self.resource = resource
        where = f" [{resource}]" if resource else ""
        after = f" after {shorten(command)!r}" if command else ""
        super().__init__(f"instrument error {self.code}, {message!r}{after}{where}")


class InstrumentTimeout(BenchError):
    """No (complete) reply within the timeout."""

    def __init__(self, message: str, command: str = "", resource: str = "", timeout_s: float | None = None) -> None:
        self.command = command
        self.resource = resource
        self.timeout_s = timeout_s
        parts = [message]
        if command:
            parts.append(f"command {shorten(command)!r}")
        if timeout_s is not None:
            parts.append(f"timeout {timeout_s:g} s")
        if resource:
            parts.append(f"[{resource}]")
        super().__init__(", ".join(parts))


class ConnectionLost(BenchError):
    """The connection to an instrument was refused, reset or closed."""

    def __init__(self, message: str, command: str = "", resource: str = "") -> None:
        self.command = command
        self.resource = resource
        parts = [message]
        if command:
            parts.append(f"command {shorten(command)!r}")
        if resource:
            parts.append(f"[{resource}]")
        super().__init__(", ".join(parts))


class SafetyError(InstrumentError):
    """A request would break a safety limit; refused before anything is sent."""

    def __init__(self, message: str, command: str = "", resource: str = "") -> None:
        super().__init__(0, message, command, resource)


class AbortRequested(BenchError):
    """The operator (Ctrl-C) or the system (SIGTERM) asked the run to stop."""


class MeasurementError(BenchError):
    """A record cannot give the asked estimate (clipped, too short, no signal); ``reason`` says why."""

    def __init__(self, reason: str) -> None:
        self.reason = reason
        super().__init__(reason)
