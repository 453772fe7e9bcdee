"""Instrument base class: identify, reset, clear, operation-complete sync, error queue.

A driver never holds instrument-specific Python: it asks its :class:`~.dialect.Dialect`
for the text of each operation and for the parser of each reply.

Error-queue policy
------------------
``strict=True``: the error queue is read after every command (in the same message when the
dialect allows compound messages, so it costs no extra round trip) and an error becomes
:class:`~benchctl.errors.InstrumentError` naming that command.
``strict=False`` (fast): commands go out unchecked and the queue is drained at points of
consequence (output switched, acquisition done, settling finished, ...); the error then
names the commands sent since the last check.

References
----------
IEEE 488.2-1992, 10.14 (*IDN?), 10.18/10.19 (*OPC, *OPC?), 10.3 (*CLS), 10.32 (*RST).
SCPI-1999 vol. 2, 21.8 (SYSTem:ERRor[:NEXT]?: the queue is read until it answers 0).
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, ClassVar

from benchctl.errors import (
    ConfigError,
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    ProtocolError,
)

from .dialect import OPERATIONS, Dialect, Identity, Operation
from .transport import Transport

_PLAIN_REPLIES = frozenset({"number", "integer", "boolean"})
"""Reply parsers whose text cannot hold a ';' (so a compound reply splits at the first)."""

__all__ = ["DRIVERS", "Identity", "Instrument", "register_driver"]

#: role -> driver class, filled by :func:`register_driver`.
DRIVERS: dict[str, type[Instrument]] = {}

#: Error-queue entries read at most per check (the queue holds 16 in the simulated bench).
MAX_ERRORS_PER_CHECK = 32


def compound(*texts: str) -> str:
    """One program message of several: each after the first starts again at the root
    (``;:``), a common command (``*OPC?``) needs only the ``;`` (the compound-command
    rule of SCPI-1999 vol. 1, from memory)."""
    message = texts[0]
    for text in texts[1:]:
        message += (";" if text.startswith("*") else ";:") + text
    return message


def register_driver(role: str) -> Callable[[type[Instrument]], type[Instrument]]:
    """Register a driver class for ``role``; fails loudly on a second or ill-formed one."""

    def deco(cls: type[Instrument]) -> type[Instrument]:
        if role not in OPERATIONS:
            raise ValueError(f"{role=} is not a known role ({', '.join(OPERATIONS)})")
        if role in DRIVERS:
            raise ValueError(f"a driver for role {role!r} is already registered: {DRIVERS[role].__name__}")
        unknown = [op for op in cls.uses if op not in OPERATIONS[role]]
        if unknown:
            raise ValueError(f"{cls.__name__} uses operations the catalogue lacks: {unknown}")
        cls.role = role
        DRIVERS[role] = cls
        return cls

    return deco


class Instrument:
    """Common behaviour of every driver.

    Parameters
    ----------
    transport : Transport
        The open session.
    dialect : Dialect
        The validated dialect for this role.
    strict : bool
        Error-queue policy (see the module docstring).
    clock : callable
        Monotonic clock, s (injected for tests).
    sleep : callable
        Sleep function, s (injected for tests).
    query_retries : int
        Resends of an idempotent query after a timeout.
    """

    role: ClassVar[str] = ""
    #: Operations this driver uses beyond the common ones (checked at registration).
    uses: ClassVar[tuple[str, ...]] = ()

    def __init__(
        self,
        transport: Transport,
        dialect: Dialect,
        *,
        strict: bool = False,
        clock: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
        query_retries: int = 1,
    ) -> None:
        if dialect.role != self.role:
            raise ValueError(f"dialect for {dialect.role!r} given to a {self.role!r} driver")
        self.transport = transport
        self.dialect = dialect
        self.strict = strict
        self.clock = clock
        self.sleep = sleep
        self.query_retries = int(query_retries)
        self.identity: Identity | None = None
        self._unchecked: deque[str] = deque(maxlen=8)
        self._error_op = dialect.op("error")
        self._error_text = self._error_op.render()

    @property
    def resource(self) -> str:
        """VISA resource string of the instrument."""
        return self.transport.resource

    # ------------------------------------------------------------------ primitives
    def command(self, op: str, /, **values: Any) -> str:
        """Render and send the write operation ``op``; return the text sent."""
        text = (self.dialect.operations.get(op) or self.dialect.op(op)).render(**values)
        self._write(text)
        return text

    def command_checked(self, op: str, /, **values: Any) -> str:
        """:meth:`command`, then the error queue: one message when the dialect allows
        compound ones; return the text sent.

        The reply also tells that the instrument has taken the command, so a caller that
        goes on with other work does not hold the instrument up (a command sent without a
        query may wait for a CPU the caller is using). The check covers every command sent
        since the last one.

        Raises
        ------
        InstrumentError
            The queue held an error (it is then read empty).
        """
        text = (self.dialect.operations.get(op) or self.dialect.op(op)).render(**values)
        if self.strict:
            self._write(text)  # strict mode checks every command already
        elif not self.dialect.compound:
            self._write(text)
            self.check_errors()
        else:
            self._unchecked.append(text)
            reply = self.transport.query(compound(text, self._error_text))
            suspects = "; ".join(self._unchecked)
            self._unchecked.clear()
            self._raise_if_error(self._parse(self._error_op, reply), suspects, more=True)
        return text

    def ask(self, op: str, /, **values: Any) -> Any:
        """Render the query ``op``, send it and return its parsed reply."""
        operation = self.dialect.operations.get(op) or self.dialect.op(op)
        text = operation.render(**values)
        try:
            reply = self.transport.query(text, retries=self.query_retries if operation.idempotent else 0)
        except InstrumentTimeout:
            # A query the instrument rejected gets no reply: say why if the queue knows.
            self._unchecked.append(text)
            try:
                self.check_errors()
            except (InstrumentTimeout, ConnectionLost, ProtocolError):
                pass  # the queue cannot tell: the timeout is the news
            raise
        if self.strict:
            self._unchecked.append(text)
            self.check_errors()
        return self._parse(operation, reply)

    def ask_many(self, *ops: str, **values: Any) -> list[Any]:
        """Several queries, one message when the dialect allows compound ones; their parsed
        replies in order.

        Only for replies that cannot hold a ';' (numbers, integers, booleans); otherwise,
        and in strict mode, one :meth:`ask` each. ``values`` go to every query.
        """
        operations = [self.dialect.operations.get(op) or self.dialect.op(op) for op in ops]
        if (len(operations) < 2 or self.strict or not self.dialect.compound
                or any(o.reply not in _PLAIN_REPLIES for o in operations)):
            return [self.ask(op, **values) for op in ops]
        message = compound(*(o.render(**values) for o in operations))
        retries = self.query_retries if all(o.idempotent for o in operations) else 0
        try:
            reply = self.transport.query(message, retries=retries)
        except InstrumentTimeout:
            self._unchecked.append(message)  # a rejected query gets no reply: say why
            try:
                self.check_errors()
            except (InstrumentTimeout, ConnectionLost, ProtocolError):
                pass
            raise
        parts = reply.split(";")
        if len(parts) != len(operations):
            self.transport.mark_suspect()
            raise ProtocolError(f"{self.resource}: {len(operations)} replies expected to {message!r}", reply)
        return [self._parse(o, part) for o, part in zip(operations, parts, strict=True)]

    def ask_checked(self, op: str, /, *, before: str = "", **values: Any) -> Any:
        """:meth:`ask`, then the error queue: one message when the dialect allows compound ones.

        For a point of consequence (an acquisition done, the rail settled): the reply and the
        queue's first entry come back together, so the check costs no round trip of its own.
        ``before`` is a rendered command sent first (in the same message when compound).

        Raises
        ------
        InstrumentError
            The queue held an error (it is then read empty).
        """
        operation = self.dialect.operations.get(op) or self.dialect.op(op)
        if self.strict or not self.dialect.compound or operation.reply not in _PLAIN_REPLIES:
            if before:
                self._write(before)
            value = self.ask(op, **values)
            if not self.strict:
                self.check_errors()
            return value
        text = operation.render(**values)
        if before:
            self._unchecked.append(before)
            text = compound(before, text)
        self._unchecked.append(text)
        try:
            reply = self.transport.query(compound(text, self._error_text))
        except InstrumentTimeout:
            try:  # a rejected query gets no reply: say why if the queue knows
                self.check_errors()
            except (InstrumentTimeout, ConnectionLost, ProtocolError):
                pass
            raise
        head, sep, tail = reply.partition(";")
        if not sep:
            raise ProtocolError(f"the reply to {text!r} lacks the error queue's entry", reply)
        value = self._parse(operation, head)
        suspects = "; ".join(self._unchecked)
        self._unchecked.clear()
        self._raise_if_error(self._parse(self._error_op, tail), suspects, more=True)
        return value

    def _parse(self, operation: Operation, reply: str) -> Any:
        try:
            return operation.parse(reply)
        except ProtocolError as exc:
            self.transport.mark_suspect()  # a reply that does not fit may be a late one
            exc.add_note(f"reply to {operation.name} from {self.resource}")
            raise

    def _write(self, text: str) -> None:
        if self.strict:
            if self.dialect.compound:
                reply = self.transport.query(compound(text, self._error_text))
                self._raise_if_error(self._parse(self._error_op, reply), text, more=True)
            else:
                self.transport.write(text)
                self._unchecked.append(text)
                self.check_errors()
        else:
            self.transport.write(text)
            self._unchecked.append(text)

    def check_errors(self) -> None:
        """Drain the error queue; raise InstrumentError for the first entry found.

        The error names the command (strict mode) or the commands sent since the last check
        (fast mode).
        """
        suspects = "; ".join(self._unchecked)
        self._unchecked.clear()
        first: tuple[int, str] | None = None
        count = 0
        for _ in range(MAX_ERRORS_PER_CHECK):
            code, message = self._parse(self._error_op, self.transport.query(self._error_text))
            if code == 0:
                break
            count += 1
            if first is None:
                first = (code, message)
        if first is not None:
            extra = f" (+{count - 1} more)" if count > 1 else ""
            raise InstrumentError(first[0], first[1] + extra, suspects, self.resource)

    def drain_errors(self) -> list[tuple[int, str]]:
        """Read the error queue empty and return its entries (nothing is raised)."""
        entries: list[tuple[int, str]] = []
        for _ in range(MAX_ERRORS_PER_CHECK):
            code, message = self._parse(self._error_op, self.transport.query(self._error_text))
            if code == 0:
                break
            entries.append((code, message))
        self._unchecked.clear()
        return entries

    def _raise_if_error(self, entry: tuple[int, str], command: str, *, more: bool) -> None:
        code, message = entry
        if code != 0:
            if more:  # empty the rest of the queue so the next check starts clean
                try:
                    self.check_errors()
                except InstrumentError:
                    pass
            raise InstrumentError(code, message, command, self.resource)

    @contextmanager
    def timeout(self, timeout_s: float) -> Iterator[None]:
        """Use another I/O timeout inside the ``with`` block; restored in ``finally``."""
        old_s = self.transport.timeout_s
        self.transport.timeout_s = timeout_s
        try:
            yield
        finally:
            self.transport.timeout_s = old_s

    # ------------------------------------------------------------------ IEEE 488.2
    def identify(self) -> Identity:
        """Ask ``*IDN?`` and return it parsed into maker, model, serial, firmware."""
        self.identity = self.ask("identify")
        return self.identity

    def reset(self) -> None:
        """``*RST`` then wait for completion."""
        self.command("reset")
        self.sync()

    def clear(self) -> None:
        """``*CLS``: clear the status structure and the error queue."""
        self.transport.write(self.dialect.op("clear").render())
        self._unchecked.clear()

    def sync(self, *, timeout_s: float | None = None) -> None:
        """Wait for pending operations with ``*OPC?`` (the reply comes when all are done)."""
        if timeout_s is None:
            self.ask("opc")
        else:
            with self.timeout(timeout_s):
                self.ask("opc")

    def require(self, op: str) -> None:
        """Raise ConfigError naming the dialect file if it lacks ``op``."""
        if not self.dialect.has(op):
            raise ConfigError(self.dialect.source, f"{self.role}.{op}", "this procedure needs it; the dialect does not define it")

    def close(self) -> None:
        """Close the session."""
        self.transport.close()

    def __enter__(self) -> Instrument:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.resource!r}, dialect={self.dialect.name!r})"
