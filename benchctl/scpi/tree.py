"""The server-side command tree: command specifications, header matching and dispatch.

A :class:`CommandTree` is built from SCPI-1999 command specifications such as
``"[SOURce#]:VOLTage[:LEVel][:IMMediate][:AMPLitude]"``: ``[...]`` marks an optional
node, ``#`` where a numeric suffix may stand (absent = 1), capitals the short form.
Every spec is compiled once into a trie whose edges are keyed by both forms of each
mnemonic, with optional nodes expanded into extra edges, so matching a header is a few
dict lookups; headers resolved from the root are also cached.

:meth:`CommandTree.execute` runs one program message against an instrument object
(``context``), queueing SCPI errors on an :class:`~benchctl.scpi.errors.ErrorQueue`.
"""

from __future__ import annotations

import itertools
import re
from collections.abc import Callable
from dataclasses import dataclass

from benchctl.errors import ProtocolError
from benchctl.scpi.blocks import IncompleteBlock, parse_block_header
from benchctl.scpi.errors import ErrorQueue, ScpiError
from benchctl.scpi.message import ProgramUnit, parse_unit, split_units
from benchctl.scpi.mnemonic import mnemonic_forms, split_suffix
from benchctl.scpi.numbers import parse_boolean, parse_character, parse_numeric, parse_string

# IEEE 488.2-1992 §6.3.2.3 and §6.3.2.2 (from memory): a query whose response is
# abandoned because the controller sent a new message is INTERRUPTED (-410); a read with
# no query pending is UNTERMINATED (-420). Detecting them is the server's job.
INTERRUPTED_QUERY = -410
UNTERMINATED_QUERY = -420

# Numeric suffixes accepted on header nodes (SCPI-1999 Vol. 1 §6.2.5, from memory:
# suffixes start at 1).
MAX_HEADER_SUFFIX = 1_000_000

_SPEC_NODE = re.compile(r"(\[)?:?([A-Za-z][A-Za-z0-9_]*)(#)?(\])?")
_CACHE_LIMIT = 4096

SetHandler = Callable[["Call"], None]
QueryHandler = Callable[["Call"], "str | bytes"]


class Call:
    """What a handler receives for one program message unit.

    Attributes
    ----------
    header : str
        The canonical spec the unit matched, e.g. ``"[SOURce#]:VOLTage[:LEVel]"``.
    suffixes : tuple of int
        One value per ``#`` in the spec, 1 where the suffix was absent.
    params : tuple of str
        Raw parameter tokens.
    context : object
        The instrument object passed to :meth:`CommandTree.execute`.
    errors : ErrorQueue
        The queue passed to :meth:`CommandTree.execute` (for ``*CLS``,
        ``SYSTem:ERRor?``).
    query : bool
        True for the ``?`` form.
    """

    __slots__ = ("header", "suffixes", "params", "context", "errors", "query", "_used", "_checked")

    def __init__(
        self,
        header: str,
        suffixes: tuple[int, ...],
        params: tuple[str, ...],
        context: object,
        errors: ErrorQueue,
        query: bool = False,
    ) -> None:
        self.header = header
        self.suffixes = suffixes
        self.params = params
        self.context = context
        self.errors = errors
        self.query = query
        self._used = 0
        self._checked = False

    def __repr__(self) -> str:
        return f"Call({self.header!r}, suffixes={self.suffixes}, params={self.params})"

    @property
    def suffix(self) -> int:
        """The first (usually the only) numeric suffix; 1 when absent or the spec has none.

        References
        ----------
        SCPI-1999 Vol. 1 §6.2.5 numeric suffixes, absent = 1 (from memory).
        """
        return self.suffixes[0] if self.suffixes else 1

    def _token(self, i: int) -> str:
        if i >= len(self.params):
            raise ScpiError(-109, f"parameter {i + 1} of {self.header}")
        self._used = max(self._used, i + 1)
        return self.params[i]

    def has(self, i: int) -> bool:
        """Return True if parameter ``i`` (0-based) was sent; marks it as looked at.

        Use it for optional parameters, so that the unit does not end with -108.

        References
        ----------
        IEEE 488.2-1992 §7.4.2 program data separators (from memory).
        """
        if i < len(self.params):
            self._used = max(self._used, i + 1)
            return True
        return False

    def expect(self, n_min: int, n_max: int | None = None) -> None:
        """Check the parameter count: raise -109 if below ``n_min``, -108 above ``n_max``.

        ``n_max`` None means exactly ``n_min``.

        References
        ----------
        IEEE 488.2-1992 §11.5.1.1.4 command errors; SCPI-1999 Vol. 2 §21.8.9 -108
        "Parameter not allowed", -109 "Missing parameter" (from memory).
        """
        n_max = n_min if n_max is None else n_max
        n = len(self.params)
        if n < n_min:
            raise ScpiError(-109, f"{self.header} needs {n_min}, got {n}")
        if n > n_max:
            raise ScpiError(-108, f"{self.header} takes at most {n_max}, got {n}")
        self._checked = True

    def numeric(self, i: int = 0, **kw: object) -> float:
        """Return parameter ``i`` as a number.

        Parameters
        ----------
        i : int
            0-based parameter index; -109 if it was not sent.
        **kw
            ``unit``, ``minimum``, ``maximum``, ``default`` as for
            :func:`~benchctl.scpi.parse_numeric`.

        References
        ----------
        IEEE 488.2-1992 §7.7.2-7.7.4 numeric program data; SCPI-1999 Vol. 1 §7.2
        (from memory).
        """
        return parse_numeric(self._token(i), **kw)  # type: ignore[arg-type]

    def integer(self, i: int = 0, **kw: object) -> int:
        """Return parameter ``i`` rounded to the nearest integer (half to even).

        References
        ----------
        IEEE 488.2-1992 §7.7.2.5 (from memory): a device rounds a decimal number where it
        needs an integer.
        """
        return round(parse_numeric(self._token(i), **kw))  # type: ignore[arg-type]

    def boolean(self, i: int = 0) -> bool:
        """Return parameter ``i`` as a boolean (``ON``/``OFF``/<NRf>).

        References
        ----------
        SCPI-1999 Vol. 1 §7.3 Boolean program data (from memory).
        """
        return parse_boolean(self._token(i))

    def choice(self, i: int, choices: tuple[str, ...] | list[str]) -> str:
        """Return parameter ``i`` as one of ``choices``, as declared.

        See :func:`~benchctl.scpi.parse_character` (``#`` choices take a suffix).

        References
        ----------
        IEEE 488.2-1992 §7.7.1 character program data (from memory).
        """
        return parse_character(self._token(i), tuple(choices))

    def string(self, i: int = 0) -> str:
        """Return parameter ``i`` as string data, quotes removed.

        References
        ----------
        IEEE 488.2-1992 §7.7.5 string program data (from memory).
        """
        return parse_string(self._token(i))

    def block(self, i: int = 0) -> bytes:
        """Parameter ``i`` as the payload bytes of an arbitrary block.

        References
        ----------
        IEEE 488.2-1992 §7.7.6 arbitrary block program data (from memory).
        """
        token = self._token(i)
        if not token.startswith("#"):
            raise ScpiError(-104, f"block expected in {self.header}")
        try:
            raw = token.encode("latin-1")
        except UnicodeEncodeError:
            raise ScpiError(-161, "block payload is not bytes") from None
        try:
            start, length = parse_block_header(raw)
        except IncompleteBlock:
            raise ScpiError(-161, "incomplete block header") from None
        except ProtocolError:
            raise ScpiError(-161, "malformed block header") from None
        if length is None:
            end = len(raw)
            if raw.endswith(b"\n"):  # NL^END ends an indefinite block; a CR is payload
                end -= 1
            return raw[start:end]
        if len(raw) != start + length:
            raise ScpiError(-161, f"block declares {length} bytes, {len(raw) - start} present")
        return raw[start:]


@dataclass(frozen=True, slots=True)
class _Entry:
    spec: str
    handler: Callable
    n_suffixes: int


class _Node:
    __slots__ = ("long", "children", "entries", "parent")

    def __init__(self, long: str, parent: _Node | None) -> None:
        self.long = long
        self.parent = parent
        self.children: dict[str, tuple[_Node, str]] = {}
        # query flag -> list of (entry, slot map per depth from the root: suffix index or -1)
        self.entries: dict[bool, list[tuple[_Entry, tuple[int, ...]]]] = {}

    def child(self, declared: str) -> _Node:
        short, long = mnemonic_forms(declared)
        hit = self.children.get(long)
        if hit is not None:
            if hit[0].long != long:
                raise ValueError(f"{declared!r} clashes with {hit[1]!r} at the same level")
            return hit[0]
        for form in (short, long):
            other = self.children.get(form)
            if other is not None and other[0].long != long:
                raise ValueError(f"{declared!r} clashes with {other[1]!r} at the same level")
        node = _Node(long, self)
        self.children[short] = (node, declared)
        self.children[long] = (node, declared)
        return node


def _compile_spec(spec: str) -> list[tuple[str, bool, bool]]:
    """Split a spec into ``(declared mnemonic, optional, has_suffix)`` nodes."""
    nodes = []
    pos = 0
    text = spec.strip()
    if not text:
        raise ValueError("empty command spec")
    while pos < len(text):
        m = _SPEC_NODE.match(text, pos)
        if m is None or not m.group(0):
            raise ValueError(f"cannot read command spec {spec!r} at {text[pos:]!r}")
        opening, name, hash_, closing = m.groups()
        if bool(opening) != bool(closing):
            raise ValueError(f"unbalanced [ ] in command spec {spec!r}")
        if pos > 0 and ":" not in m.group(0):
            raise ValueError(f"missing ':' between nodes in command spec {spec!r}")
        mnemonic_forms(name)  # validates capitals
        if name[-1].isdigit():
            raise ValueError(f"node {name!r} in {spec!r} ends in a digit; mark a suffix with '#'")
        nodes.append((name, bool(opening), bool(hash_)))
        pos = m.end()
    if all(optional for _, optional, _ in nodes):
        raise ValueError(f"command spec {spec!r} needs at least one mandatory node")
    return nodes


class CommandTree:
    """SCPI command tree: declare commands with :meth:`add`, run messages with :meth:`execute`.

    Notes
    -----
    Current-path rule: after a unit ``A:B:C``, a following unit in the same message that
    does not start with ``:`` or ``*`` is looked up under ``A:B`` ("SOUR:VOLT 1;CURR 0.1"
    sets SOUR:CURR). A leading ``:`` resolves from the root; common commands (``*IDN?``)
    leave the path alone; every message starts at the root. The lookup is strict: a
    root-level command after a compound one needs its ``:`` (``"SOUR:VOLT 1;:OUTP ON"``).

    After an error in one unit, execution goes on with the next unit of the same message
    (the parser resynchronises at the ``;`` separator). Handler errors other than
    :class:`~benchctl.scpi.errors.ScpiError` are bugs and propagate.

    A unit whose parameters the handler neither checked with :meth:`Call.expect` nor
    looked at queues -108 after the handler ran (and a query then gives no response).

    References
    ----------
    SCPI-1999 Vol. 1 §6.2 (mnemonics, optional nodes, numeric suffixes, header
    compounding and the current path, §6.2.4 from memory); IEEE 488.2-1992 §7.3-7.6
    program message syntax, §6.1.6 parser behaviour after a command error, §A.1 header
    compounding (from memory).
    """

    def __init__(self) -> None:
        self._root = _Node("", None)
        self._common: dict[tuple[str, bool], _Entry] = {}
        self._specs: list[str] = []
        # (path node, path suffixes, HEADER, query) -> (entry, suffixes, new path, suffixes)
        self._cache: dict[tuple, tuple[_Entry, tuple[int, ...], _Node, tuple]] = {}

    # ------------------------------------------------------------------ declaration
    def add(
        self,
        spec: str,
        *,
        set: SetHandler | None = None,  # the name the interface promises
        query: QueryHandler | None = None,
    ) -> None:
        """Declare a command and its handlers.

        Parameters
        ----------
        spec : str
            SCPI-1999 command specification, e.g.
            ``"[SOURce#]:VOLTage[:LEVel][:IMMediate][:AMPLitude]"``, ``"MEASure:VOLTage?"``
            (a trailing ``?`` is ignored) or a common command ``"*IDN"``.
        set : callable, optional
            ``set(call) -> None`` for the command form.
        query : callable, optional
            ``query(call) -> str | bytes`` for the ``?`` form; bytes (e.g. a block) are
            carried as latin-1 characters in the response.

        Raises
        ------
        ValueError
            On a malformed spec, a clash of mnemonic forms at one level, or a header
            that is already declared with the same form.

        References
        ----------
        SCPI-1999 Vol. 1 §6.2 command syntax notation ([optional], capitals = short
        form, numeric suffix), from memory.
        """
        if set is None and query is None:
            raise ValueError(f"command {spec!r} needs a set or a query handler")
        text = spec.strip()
        if text.endswith("?"):
            if set is not None:
                raise ValueError(f"query-only spec {spec!r} cannot take a set handler")
            text = text[:-1]
        if text.startswith("*"):
            name = text[1:].upper()
            if not re.fullmatch(r"[A-Z][A-Z0-9_]*", name):
                raise ValueError(f"bad common command spec {spec!r}")
            for is_query, handler in ((False, set), (True, query)):
                if handler is None:
                    continue
                key = (name, is_query)
                if key in self._common:
                    raise ValueError(f"{spec!r} is already declared")
                self._common[key] = _Entry(text, handler, 0)
            self._specs.append(text)
            return
        nodes = _compile_spec(text)
        n_suffixes = sum(1 for _, _, has in nodes if has)
        slot_of = []
        k = 0
        for _, _, has in nodes:
            slot_of.append(k if has else -1)
            k += has
        optional_idx = [i for i, (_, opt, _) in enumerate(nodes) if opt]
        # Plan every expansion first and check it, so a refused spec leaves no trace.
        plan: dict[tuple[_Node, bool], tuple[_Entry, tuple[int, ...]]] = {}
        for is_query, handler in ((False, set), (True, query)):
            if handler is None:
                continue
            entry = _Entry(text, handler, n_suffixes)
            for keep in itertools.product((True, False), repeat=len(optional_idx)):
                skip = {i for i, kept in zip(optional_idx, keep, strict=True) if not kept}
                node = self._root
                slots = []
                for i, (name, _, _) in enumerate(nodes):
                    if i in skip:
                        continue
                    node = node.child(name)
                    slots.append(slot_of[i])
                existing = node.entries.get(is_query)
                if existing:
                    raise ValueError(f"{spec!r} overlaps {existing[0][0].spec!r}")
                # two expansions of one spec may meet at one node (e.g. [A][:A]); keep one
                plan.setdefault((node, is_query), (entry, tuple(slots)))
        for (node, is_query), item in plan.items():
            node.entries[is_query] = [item]
        self._specs.append(text)
        self._cache.clear()

    def headers(self) -> list[str]:
        """Return the declared specs in declaration order (without ``?``).

        References
        ----------
        SCPI-1999 Vol. 1 §6.2 command syntax notation (from memory).
        """
        return list(self._specs)

    # ------------------------------------------------------------------ matching
    def _resolve(
        self, unit: ProgramUnit, start: _Node, start_vals: tuple
    ) -> tuple[_Entry, tuple[int, ...], _Node, tuple]:
        node = start
        vals = list(start_vals)
        prev_node, prev_vals = start, start_vals
        names = unit.header.split(":")
        for typed in names:
            parts = split_suffix(typed)
            if parts is None:
                raise ScpiError(-113, unit.header)
            letters, suffix = parts
            hit = node.children.get(letters)
            if hit is None:
                raise ScpiError(-113, unit.header)
            prev_node, prev_vals = node, tuple(vals)
            node = hit[0]
            vals.append(suffix)
        entries = node.entries.get(unit.query)
        if not entries:
            raise ScpiError(-113, unit.header + ("?" if unit.query else ""))
        entry, slots = entries[0]
        suffixes = [1] * entry.n_suffixes
        for depth, (slot, value) in enumerate(zip(slots, vals, strict=True)):
            if value is None:
                continue
            if slot < 0:
                raise ScpiError(-113, f"{unit.header} (no suffix allowed at node {depth + 1})")
            if not 1 <= value <= MAX_HEADER_SUFFIX:
                raise ScpiError(-114, unit.header)
            suffixes[slot] = value
        return entry, tuple(suffixes), prev_node, prev_vals

    # ------------------------------------------------------------------ execution
    def execute(
        self,
        message: str | bytes,
        *,
        context: object,
        errors: ErrorQueue,
    ) -> str | None:
        """Parse and run one program message.

        Parameters
        ----------
        message : str or bytes
            One program message, with or without its terminator (bytes are decoded as
            latin-1). An indefinite block ``#0`` ends at the final ``\\n``.
        context : object
            The instrument object handed to every handler as ``call.context``.
        errors : ErrorQueue
            Where SCPI errors are queued, in the order they occur.

        Returns
        -------
        str or None
            The responses of the queries, joined by ``;`` (every character < 256: encode
            with latin-1 before sending), or None when no query produced a response.

        References
        ----------
        IEEE 488.2-1992 §7 program messages, §8.4 response message (units joined by
        ``;``), §6.1.6 continue after a command error (from memory); SCPI-1999 Vol. 1
        §6.2.4 current path (from memory).
        """
        if not isinstance(message, str):
            message = bytes(message).decode("latin-1")
        responses: list[str] = []
        units, lex_error = split_units(message)
        path_node, path_vals = self._root, ()
        last = len(units) - 1
        for index, text in enumerate(units):
            try:
                unit = parse_unit(text)
                if unit is None:
                    if index == last and lex_error is None:
                        continue  # blank message, or a ';' just before the terminator
                    raise ScpiError(-102, "empty message unit")
                if unit.common:
                    entry = self._common.get((unit.header.upper(), unit.query))
                    if entry is None:
                        raise ScpiError(-113, "*" + unit.header + ("?" if unit.query else ""))
                    suffixes: tuple[int, ...] = ()
                else:
                    if unit.rooted:
                        path_node, path_vals = self._root, ()
                    key = (path_node, path_vals, unit.header.upper(), unit.query)
                    hit = self._cache.get(key)
                    if hit is None:
                        hit = self._resolve(unit, path_node, path_vals)
                        if len(self._cache) >= _CACHE_LIMIT:
                            self._cache.clear()
                        self._cache[key] = hit
                    entry, suffixes, path_node, path_vals = hit
                call = Call(entry.spec, suffixes, unit.params, context, errors, unit.query)
                result = entry.handler(call)
                if not call._checked and call._used < len(unit.params):
                    raise ScpiError(-108, f"{entry.spec} takes {call._used} parameter(s)")
                if unit.query:
                    if isinstance(result, bytes | bytearray | memoryview):
                        result = bytes(result).decode("latin-1")
                    responses.append("" if result is None else str(result))
            except ScpiError as exc:
                errors.push(exc.code, exc.info)
        if lex_error is not None:
            errors.push(lex_error.code, lex_error.info)
        return ";".join(responses) if responses else None

    def execute_bytes(
        self,
        message: bytes,
        *,
        context: object,
        errors: ErrorQueue,
    ) -> bytes | None:
        """Run one program message like :meth:`execute`, with bytes in and bytes out.

        Returns
        -------
        bytes or None
            The responses encoded with latin-1 (one byte per character), or None.

        References
        ----------
        IEEE 488.2-1992 §7 program messages and §8 response messages (from memory).
        """
        out = self.execute(message, context=context, errors=errors)
        return None if out is None else out.encode("latin-1")
