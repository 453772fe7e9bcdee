"""Dialect files: the mapping from benchctl's instrument operations to SCPI text.

A dialect file (TOML, parsed with :mod:`tomllib` only) gives, for each operation a driver
performs, a command template with ``{placeholders}`` and, for queries, the name of the
parser that turns the reply into a value. The file format is documented at the top of the
shipped ``dialects/scpi1999.toml``.

:data:`OPERATIONS` is the catalogue: for each role the operations a driver may use, which
placeholders each one takes, and whether a dialect must define it. Loading a dialect checks
every template against that catalogue, so a missing operation or a wrong placeholder is an
error at load time that names the file and the key (:class:`~benchctl.errors.ConfigErrors`).

References
----------
SCPI-1999, volume 1 (syntax and style), section 7 (numeric suffixes, response data).
IEEE 488.2-1992, section 8.7 (response data: NR1/NR2/NR3, strings) and 10.14 (*IDN?).
"""

from __future__ import annotations

import math
import re
import string
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchctl.errors import ConfigError, ConfigErrors, ProtocolError

__all__ = [
    "OPERATIONS",
    "ROLES",
    "Dialect",
    "Identity",
    "Operation",
    "OpSpec",
    "load_dialect",
    "register_dialect",
    "reply_parser",
    "shipped_dialects",
]

DIALECT_DIR = Path(__file__).with_name("dialects")
ROLES = ("supply", "generator", "scope")


# ---------------------------------------------------------------------------- identity
@dataclass(frozen=True)
class Identity:
    """The parsed ``*IDN?`` reply: four comma-separated fields (IEEE 488.2, 10.14)."""

    maker: str
    model: str
    serial: str
    firmware: str
    raw: str = ""

    def __str__(self) -> str:
        return f"{self.maker} {self.model} s/n {self.serial} fw {self.firmware}"


# ---------------------------------------------------------------------------- reply parsers
ReplyParser = Callable[[str, "Operation"], Any]
_PARSERS: dict[str, ReplyParser] = {}


def reply_parser(name: str) -> Callable[[ReplyParser], ReplyParser]:
    """Register a reply parser under ``name`` (the value of an operation's ``reply`` key)."""

    def deco(func: ReplyParser) -> ReplyParser:
        if name in _PARSERS:
            raise ValueError(f"reply parser {name!r} registered twice")
        _PARSERS[name] = func
        return func

    return deco


_NUMBER_RE = re.compile(r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z%]*)\s*$")
_SI_PREFIX = {"p": 1e-12, "n": 1e-9, "u": 1e-6, "m": 1e-3, "k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9}
# SCPI-1999 vol. 1, 7.2.1.5: 9.91E37 is "not a number", +/-9.9E37 are +/- infinity.
_SCPI_NAN = 9.91e37
_SCPI_INF = 9.9e37


def _number(text: str, unit: str = "") -> float:
    # fast path: a plain NR1/NR2/NR3 number (float() would also take "nan", "inf" or "1_0",
    # which are not SCPI numbers: those end in a letter or hold "_" and take the slow path)
    if text[-1:].isdigit() and "_" not in text:
        try:
            value = float(text)
        except ValueError:
            pass
        else:
            if abs(value) < _SCPI_INF:
                return value
    m = _NUMBER_RE.match(text)
    if not m:
        raise ProtocolError("reply is not a number", text)
    value = float(m.group(1))
    suffix = m.group(2)
    if suffix:
        if not unit:
            raise ProtocolError("unexpected unit suffix in numeric reply", text)
        if suffix.lower() == unit.lower():
            pass
        elif len(suffix) > 1 and suffix[0] in _SI_PREFIX and suffix[1:].lower() == unit.lower():
            value *= _SI_PREFIX[suffix[0]]
        else:
            raise ProtocolError(f"unit suffix {suffix!r} is not {unit!r}", text)
    if abs(value) >= _SCPI_INF:
        if math.isclose(value, _SCPI_NAN, rel_tol=1e-6):
            return math.nan
        return math.copysign(math.inf, value)
    return value


@reply_parser("number")
def _parse_number(text: str, op: Operation) -> float:
    return _number(text, op.unit)


@reply_parser("integer")
def _parse_integer(text: str, op: Operation) -> int:
    value = _number(text, op.unit)
    if not math.isfinite(value) or value != int(value):
        raise ProtocolError("reply is not an integer", text)
    return int(value)


@reply_parser("boolean")
def _parse_boolean(text: str, op: Operation) -> bool:
    word = text.strip().upper()
    if word in ("1", "ON", "+1", op.true_word.upper()):
        return True
    if word in ("0", "OFF", "+0", op.false_word.upper()):
        return False
    raise ProtocolError("reply is not a boolean", text)


@reply_parser("string")
def _parse_string(text: str, op: Operation) -> str:
    text = text.strip()
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "\"'":
        return text[1:-1].replace(text[0] * 2, text[0])
    return text


@reply_parser("text")
def _parse_text(text: str, op: Operation) -> str:
    return text


@reply_parser("list")
def _parse_list(text: str, op: Operation) -> list[float] | dict[str, float]:
    parts = [p for p in text.strip().split(op.separator)]
    if parts == [""]:
        parts = []
    values = [_number(p, op.unit) for p in parts]
    if op.fields:
        if len(values) != len(op.fields):
            raise ProtocolError(f"expected {len(op.fields)} values ({', '.join(op.fields)})", text)
        return dict(zip(op.fields, values, strict=True))
    return values


_ERROR_RE = re.compile(r'^\s*([+-]?\d+)\s*(?:,\s*"?(.*?)"?)?\s*$', re.DOTALL)


@reply_parser("error")
def _parse_error(text: str, op: Operation) -> tuple[int, str]:
    m = _ERROR_RE.match(text)
    if not m:
        raise ProtocolError("reply is not an error-queue entry", text)
    return int(m.group(1)), (m.group(2) or "").strip()


@reply_parser("idn")
def _parse_idn(text: str, op: Operation) -> Identity:
    parts = [p.strip() for p in text.strip().split(",")]
    if len(parts) != 4 or not parts[0]:
        raise ProtocolError("*IDN? reply is not maker,model,serial,firmware", text)
    return Identity(parts[0], parts[1], parts[2], parts[3], raw=text.strip())


@reply_parser("block")
def _parse_block(text: str, op: Operation) -> str:  # the transport reads blocks itself
    raise ProtocolError("a block reply is read with Transport.read_block", text)


# ---------------------------------------------------------------------------- catalogue
@dataclass(frozen=True)
class OpSpec:
    """What benchctl expects of one operation.

    Attributes
    ----------
    kind : str
        ``"write"`` or ``"query"``.
    required : tuple of str
        Placeholders a template must use.
    optional : tuple of str
        Placeholders a template may use.
    reply : str
        Default reply parser for queries.
    needed : bool
        True if every dialect for the role must define it.
    idempotent : bool
        Queries that may be resent after a timeout.
    """

    kind: str
    required: tuple[str, ...] = ()
    optional: tuple[str, ...] = ()
    reply: str = "number"
    needed: bool = True
    idempotent: bool = True


def _w(*required: str, optional: tuple[str, ...] = (), needed: bool = True) -> OpSpec:
    return OpSpec("write", required, optional, "", needed)


def _q(reply: str = "number", *required: str, optional: tuple[str, ...] = (), needed: bool = True, idempotent: bool = True) -> OpSpec:
    return OpSpec("query", required, optional, reply, needed, idempotent)


_CH = ("channel",)

#: Placeholder name -> kind: "number", "integer", "state" (boolean word) or a words table.
PLACEHOLDERS: dict[str, str] = {
    "channel": "integer",
    "points": "integer",
    "voltage_v": "number",
    "current_a": "number",
    "freq_hz": "number",
    "vpp_v": "number",
    "offset_v": "number",
    "range_v": "number",
    "factor": "number",
    "window_s": "number",
    "level_v": "number",
    "state": "state",
    "shape": "shape",
    "coupling": "coupling",
    "slope": "slope",
}

#: Words tables a dialect must give, with our canonical keys.
WORDS: dict[str, tuple[str, ...]] = {
    "shape": ("sine", "square", "triangle", "dc"),
    "coupling": ("ac", "dc"),
    "slope": ("rising", "falling"),
}

_COMMON: dict[str, OpSpec] = {
    "identify": _q("idn"),
    "reset": _w(),
    "clear": _w(),
    "opc": _q("boolean", idempotent=False),
    "error": _q("error", idempotent=False),
    "version": _q("string", needed=False),
}

#: role -> operation -> spec. "common" operations are part of every role.
OPERATIONS: dict[str, dict[str, OpSpec]] = {
    "supply": {
        "set_voltage": _w("voltage_v", optional=_CH),
        "get_voltage": _q("number", optional=_CH),
        "set_current_limit": _w("current_a", optional=_CH),
        "get_current_limit": _q("number", optional=_CH),
        "set_ovp": _w("voltage_v", optional=_CH),
        "get_ovp": _q("number", optional=_CH),
        "ovp_tripped": _q("boolean", optional=_CH),
        "ovp_clear": _w(optional=_CH),
        "output": _w("state", optional=_CH),
        "get_output": _q("boolean", optional=_CH),
        "measure_voltage": _q("number", optional=_CH),
        "measure_current": _q("number", optional=_CH),
        "questionable": _q("integer", optional=_CH, needed=False),
    },
    "generator": {
        "set_shape": _w("shape", optional=_CH),
        "get_shape": _q("text", optional=_CH, needed=False),
        "set_frequency": _w("freq_hz", optional=_CH),
        "get_frequency": _q("number", optional=_CH, needed=False),
        "set_amplitude": _w("vpp_v", optional=_CH),
        "get_amplitude": _q("number", optional=_CH, needed=False),
        "set_offset": _w("offset_v", optional=_CH),
        "get_offset": _q("number", optional=_CH, needed=False),
        "output": _w("state", optional=_CH),
        "get_output": _q("boolean", optional=_CH, needed=False),
    },
    "scope": {
        "set_range": _w("channel", "range_v"),
        "get_range": _q("number", "channel", needed=False),
        "set_offset": _w("channel", "offset_v"),
        "set_coupling": _w("channel", "coupling"),
        "set_probe": _w("channel", "factor", needed=False),
        "channel_state": _w("channel", "state"),
        "set_window": _w("window_s"),
        "set_points": _w("points"),
        "get_interval": _q("number", needed=False),
        "trigger_free": _w(),
        "trigger_edge": _w("channel"),
        "set_trigger_level": _w("level_v"),
        "set_trigger_slope": _w("slope"),
        "arm": _w(),
        "abort": _w(needed=False),
        "format_int8": _w(needed=False),
        "format_int16": _w(needed=False),
        "format_ascii": _w(needed=False),
        "fetch_block": _q("block", "channel", needed=False),
        "fetch_ascii": _q("list", "channel", needed=False),
        "scaling": _q("list", "channel"),
        "clipped": _q("integer", "channel", needed=False),
        "measure_ptpeak": _q("number", "channel", needed=False),
        "measure_rms": _q("number", "channel", needed=False),
        "measure_frequency": _q("number", "channel", needed=False),
    },
}
for _ops in OPERATIONS.values():
    for _k, _v in _COMMON.items():
        _ops.setdefault(_k, _v)

#: Fields the scope's ``scaling`` reply must provide (names of its ``fields`` list).
SCALING_FIELDS = ("points", "dt_s", "t0_s", "dy_v", "y0_v")
_DIALECT_KEYS = {
    "name", "description", "extends", "read_termination", "write_termination",
    "compound", "true", "false", "number_format", "int16_big_endian",
}
_OP_KEYS = {"write", "query", "reply", "unit", "fields", "separator"}
_FORMATTER = string.Formatter()
_IDENT_RE = re.compile(r"^[a-z_][a-z0-9_]*$")


# ---------------------------------------------------------------------------- operations
@dataclass(frozen=True)
class Operation:
    """One operation of a loaded dialect: a template and, for a query, its reply parser."""

    name: str
    kind: str
    template: str
    reply: str = ""
    unit: str = ""
    fields: tuple[str, ...] = ()
    separator: str = ","
    idempotent: bool = True
    true_word: str = "ON"
    false_word: str = "OFF"
    number_format: str = ".10g"
    words: Mapping[str, Mapping[str, str]] = field(default_factory=dict)
    #: The command text when the template has no placeholders (rendered once).
    _static: str | None = field(default=None, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if all(f is None for _, f, _, _ in _FORMATTER.parse(self.template)):
            object.__setattr__(self, "_static", self.template.format_map({}))

    def render(self, **values: Any) -> str:
        """Return the command text with the placeholders filled in.

        Numbers use the dialect's ``number_format``; booleans (``state``) use its
        ``true``/``false`` words; ``shape``/``coupling``/``slope`` go through its words
        tables. A placeholder with its own format spec (``{freq_hz:.3f}``) uses that.
        """
        if not values and self._static is not None:
            return self._static
        out = {}
        for key, value in values.items():
            kind = PLACEHOLDERS.get(key, "number")
            if kind == "state":
                out[key] = self.true_word if value else self.false_word
            elif kind in WORDS:
                try:
                    out[key] = self.words[kind][value]
                except KeyError:
                    raise ValueError(f"{key}={value!r} is not one of {WORDS[kind]}") from None
            elif kind == "integer":
                out[key] = int(value)
            else:
                out[key] = _FormattedNumber(float(value), self.number_format)
        return self.template.format_map(out)

    def parse(self, text: str) -> Any:
        """Parse a reply with this operation's parser (ProtocolError if it does not fit)."""
        return _PARSERS[self.reply](text, self)


class _FormattedNumber(float):
    """A float whose empty format spec means the dialect's number format."""

    _spec: str

    def __new__(cls, value: float, spec: str) -> _FormattedNumber:
        obj = super().__new__(cls, value)
        obj._spec = spec
        return obj

    def __format__(self, spec: str) -> str:
        return format(float(self), spec or self._spec)


@dataclass(frozen=True)
class Dialect:
    """A loaded, validated dialect for one role."""

    name: str
    role: str
    source: str
    operations: Mapping[str, Operation]
    read_termination: str = "\n"
    write_termination: str = "\n"
    compound: bool = True
    int16_big_endian: bool = True
    description: str = ""

    def has(self, op: str) -> bool:
        """True if the dialect defines operation ``op``."""
        return op in self.operations

    def op(self, name: str) -> Operation:
        """Return operation ``name``; ConfigError naming the dialect if it lacks it."""
        try:
            return self.operations[name]
        except KeyError:
            raise ConfigError(self.source, f"{self.role}.{name}", "operation not defined by this dialect") from None


# ---------------------------------------------------------------------------- registry
_SHIPPED: dict[str, Path] = {}


def register_dialect(name: str, path: str | Path) -> None:
    """Register a dialect file under a short name (shipped ones register at import)."""
    if not re.match(r"^[a-z][a-z0-9_\-]*$", name):
        raise ValueError(f"{name=} must be lower-case letters, digits, '-' or '_'")
    _SHIPPED[name] = Path(path)


def shipped_dialects() -> dict[str, Path]:
    """Return registered dialect names and their files."""
    return dict(_SHIPPED)


for _path in sorted(DIALECT_DIR.glob("*.toml")):
    register_dialect(_path.stem, _path)


def _resolve(name_or_path: str | Path, relative_to: Path | None = None) -> Path:
    text = str(name_or_path)
    if text in _SHIPPED:
        return _SHIPPED[text]
    path = Path(text).expanduser()
    if not path.is_absolute() and relative_to is not None:
        path = relative_to / path
    return path


def _read_toml(path: Path, key: str, origin: str) -> dict[str, Any]:
    try:
        with path.open("rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        known = ", ".join(sorted(_SHIPPED)) or "none"
        raise ConfigErrors([ConfigError(origin, key, f"no dialect {str(path)!r} (shipped: {known})")]) from None
    except OSError as exc:
        raise ConfigErrors([ConfigError(str(path), "", f"cannot read: {exc.strerror}")]) from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigErrors([ConfigError(str(path), "", f"not valid TOML: {exc}")]) from None


def _merged(path: Path, chain: tuple[Path, ...] = ()) -> tuple[dict[str, Any], list[ConfigError]]:
    """Return the dialect table with its ``extends`` chain merged in (child wins)."""
    data = _read_toml(path, "", str(path))
    errors: list[ConfigError] = []
    head = data.get("dialect", {})
    parent = head.get("extends") if isinstance(head, dict) else None
    if not parent:
        return data, errors
    if not isinstance(parent, str):
        return data, [ConfigError(str(path), "dialect.extends", f"must be a string, not {parent!r}")]
    parent_path = _resolve(parent, path.parent).resolve()
    if parent_path in chain or parent_path == path.resolve():
        return data, [ConfigError(str(path), "dialect.extends", f"circular extends via {parent!r}")]
    try:
        base, errors = _merged(parent_path, (*chain, path.resolve()))
    except ConfigErrors as exc:
        return data, [ConfigError(str(path), "dialect.extends", e.reason) for e in exc.errors]
    merged = {k: (dict(v) if isinstance(v, dict) else v) for k, v in base.items()}
    for section, table in data.items():
        if isinstance(table, dict) and isinstance(merged.get(section), dict):
            target = merged[section]
            for key, value in table.items():
                if key == "words" and isinstance(value, dict) and isinstance(target.get("words"), dict):
                    words = {k: dict(v) if isinstance(v, dict) else v for k, v in target["words"].items()}
                    for wk, wv in value.items():
                        if isinstance(wv, dict) and isinstance(words.get(wk), dict):
                            words[wk].update(wv)
                        else:
                            words[wk] = wv
                    target["words"] = words
                else:
                    target[key] = value
        else:
            merged[section] = table
    merged["dialect"] = {**merged.get("dialect", {}), **head}
    return merged, errors


def load_dialect(name_or_path: str | Path, role: str, *, relative_to: str | Path | None = None) -> Dialect:
    """Load and validate a dialect for ``role``.

    Parameters
    ----------
    name_or_path : str or Path
        A shipped dialect name (``"scpi1999"``, ``"simbench"``) or a path to a TOML file.
    role : {"supply", "generator", "scope"}
        Which section to validate and return (plus the ``[common]`` section).
    relative_to : path, optional
        Folder that relative paths are taken from (the bench file's folder).

    Raises
    ------
    ConfigErrors
        One :class:`ConfigError` per problem, each naming the file and the key: unknown
        keys, a missing operation the role needs, a template using a placeholder the
        operation does not take (or not using one it must), an unknown reply parser,
        missing words.
    """
    if role not in OPERATIONS:
        raise ValueError(f"{role=} must be one of {ROLES}")
    path = _resolve(name_or_path, Path(relative_to) if relative_to else None)
    data, errors = _merged(path)
    src = str(path)
    head = data.get("dialect", {})
    if not isinstance(head, dict):
        raise ConfigErrors([ConfigError(src, "dialect", "must be a table")])
    for key in head:
        if key not in _DIALECT_KEYS:
            errors.append(ConfigError(src, f"dialect.{key}", f"unknown key (known: {', '.join(sorted(_DIALECT_KEYS))})"))
    for section in data:
        if section not in ("dialect", "common", *ROLES):
            errors.append(ConfigError(src, section, "unknown section (known: dialect, common, supply, generator, scope)"))

    true_word = _get_str(head, "true", "ON", src, "dialect", errors)
    false_word = _get_str(head, "false", "OFF", src, "dialect", errors)
    number_format = _get_str(head, "number_format", ".10g", src, "dialect", errors)
    try:
        format(1.5, number_format)
    except ValueError:
        errors.append(ConfigError(src, "dialect.number_format", f"{number_format!r} is not a number format"))
        number_format = ".10g"
    rterm = _get_str(head, "read_termination", "\n", src, "dialect", errors)
    wterm = _get_str(head, "write_termination", "\n", src, "dialect", errors)
    if not rterm:
        errors.append(ConfigError(src, "dialect.read_termination", "must not be empty"))
    compound = head.get("compound", True)
    big_endian = head.get("int16_big_endian", True)
    for key, value in (("compound", compound), ("int16_big_endian", big_endian)):
        if not isinstance(value, bool):
            errors.append(ConfigError(src, f"dialect.{key}", f"must be true or false, not {value!r}"))

    catalogue = OPERATIONS[role]
    table: dict[str, Any] = {}
    for section in ("common", role):
        sect = data.get(section, {})
        if not isinstance(sect, dict):
            errors.append(ConfigError(src, section, "must be a table"))
            continue
        for key, value in sect.items():
            if key == "words":
                continue
            if key not in catalogue or (section == "common" and key not in _COMMON):
                errors.append(ConfigError(src, f"{section}.{key}", "unknown operation"))
                continue
            table[key] = (section, value)
    words = _words(data.get(role, {}), src, role, errors)

    ops: dict[str, Operation] = {}
    for name, spec in catalogue.items():
        if name not in table:
            if spec.needed:
                errors.append(ConfigError(src, f"{role}.{name}", "missing: every dialect for this role must define it"))
            continue
        section, entry = table[name]
        op = _operation(name, spec, entry, f"{section}.{name}", src, errors,
                        true_word, false_word, number_format, words)
        if op is not None:
            ops[name] = op
    if role == "scope":
        if not ({"fetch_block", "fetch_ascii"} & set(table)):
            errors.append(ConfigError(src, "scope.fetch_block", "missing: a scope needs fetch_block or fetch_ascii"))
        if "fetch_block" in table and not ({"format_int8", "format_int16"} & set(table)):
            errors.append(ConfigError(src, "scope.format_int16", "missing: fetch_block needs format_int8 or format_int16"))
        if "scaling" in ops and set(ops["scaling"].fields) != set(SCALING_FIELDS):
            errors.append(ConfigError(src, "scope.scaling.fields", f"must name exactly {', '.join(SCALING_FIELDS)}"))
    if errors:
        raise ConfigErrors(errors)
    return Dialect(
        name=str(head.get("name", path.stem)),
        role=role,
        source=src,
        operations=ops,
        read_termination=rterm,
        write_termination=wterm,
        compound=bool(compound),
        int16_big_endian=bool(big_endian),
        description=str(head.get("description", "")),
    )


def _get_str(table: Mapping[str, Any], key: str, default: str, src: str, where: str, errors: list[ConfigError]) -> str:
    value = table.get(key, default)
    if not isinstance(value, str):
        errors.append(ConfigError(src, f"{where}.{key}", f"must be a string, not {value!r}"))
        return default
    return value


def _words(section: Any, src: str, role: str, errors: list[ConfigError]) -> dict[str, dict[str, str]]:
    needed = {"generator": ("shape",), "scope": ("coupling", "slope")}.get(role, ())
    raw = section.get("words", {}) if isinstance(section, dict) else {}
    out: dict[str, dict[str, str]] = {}
    if not isinstance(raw, dict):
        errors.append(ConfigError(src, f"{role}.words", "must be a table"))
        return out
    for kind, table in raw.items():
        if kind not in WORDS:
            errors.append(ConfigError(src, f"{role}.words.{kind}", f"unknown words table (known: {', '.join(WORDS)})"))
            continue
        if not isinstance(table, dict):
            errors.append(ConfigError(src, f"{role}.words.{kind}", "must be a table"))
            continue
        for key, value in table.items():
            if key not in WORDS[kind]:
                errors.append(ConfigError(src, f"{role}.words.{kind}.{key}", f"unknown (known: {', '.join(WORDS[kind])})"))
            elif not isinstance(value, str) or not value.strip():
                errors.append(ConfigError(src, f"{role}.words.{kind}.{key}", f"must be a non-empty string, not {value!r}"))
        out[kind] = {k: v for k, v in table.items() if isinstance(v, str)}
    for kind in needed:
        missing = [k for k in WORDS[kind] if k not in out.get(kind, {})]
        if missing:
            errors.append(ConfigError(src, f"{role}.words.{kind}", f"missing {', '.join(missing)}"))
    return out


def _operation(
    name: str,
    spec: OpSpec,
    entry: Any,
    key: str,
    src: str,
    errors: list[ConfigError],
    true_word: str,
    false_word: str,
    number_format: str,
    words: Mapping[str, Mapping[str, str]],
) -> Operation | None:
    if isinstance(entry, str):  # shorthand: a bare template
        entry = {spec.kind: entry}
    if not isinstance(entry, dict):
        errors.append(ConfigError(src, key, f"must be a table like {{ {spec.kind} = \"...\" }}, not {entry!r}"))
        return None
    n_before = len(errors)
    for k in entry:
        if k not in _OP_KEYS:
            errors.append(ConfigError(src, f"{key}.{k}", f"unknown key (known: {', '.join(sorted(_OP_KEYS))})"))
    other = "query" if spec.kind == "write" else "write"
    if other in entry:
        errors.append(ConfigError(src, f"{key}.{other}", f"this operation is a {spec.kind}, not a {other}"))
    template = entry.get(spec.kind)
    if not isinstance(template, str) or not template.strip():
        errors.append(ConfigError(src, f"{key}.{spec.kind}", "missing or empty command template"))
        return None
    used: set[str] = set()
    try:
        for _literal, fname, fspec, conv in _FORMATTER.parse(template):
            if fname is None:
                continue
            if not _IDENT_RE.match(fname):
                errors.append(ConfigError(src, f"{key}.{spec.kind}", f"bad placeholder {{{fname}}} in {template!r}"))
                continue
            if conv:
                errors.append(ConfigError(src, f"{key}.{spec.kind}", f"conversion !{conv} not allowed in {template!r}"))
            allowed = spec.required + spec.optional
            if fname not in allowed:
                takes = ", ".join(f"{{{a}}}" for a in allowed) or "none"
                errors.append(ConfigError(src, f"{key}.{spec.kind}", f"placeholder {{{fname}}} not taken by {name} (takes: {takes})"))
                continue
            if fspec:
                try:
                    sample = 1 if PLACEHOLDERS[fname] == "integer" else 1.5
                    if PLACEHOLDERS[fname] in ("number", "integer"):
                        format(sample, fspec)
                    else:
                        format("x", fspec)
                except ValueError:
                    errors.append(ConfigError(src, f"{key}.{spec.kind}", f"bad format {fspec!r} for {{{fname}}}"))
            used.add(fname)
    except ValueError as exc:
        errors.append(ConfigError(src, f"{key}.{spec.kind}", f"malformed template {template!r}: {exc}"))
        return None
    for fname in spec.required:
        if fname not in used:
            errors.append(ConfigError(src, f"{key}.{spec.kind}", f"template must use {{{fname}}}: {template!r}"))
    reply = ""
    unit = ""
    fields: tuple[str, ...] = ()
    separator = ","
    if spec.kind == "query":
        reply = entry.get("reply", spec.reply)
        if reply not in _PARSERS:
            errors.append(ConfigError(src, f"{key}.reply", f"unknown parser {reply!r} (known: {', '.join(sorted(_PARSERS))})"))
        if (reply == "block") != (spec.reply == "block"):
            errors.append(ConfigError(src, f"{key}.reply", f"{name} needs reply = {spec.reply!r}"))
        unit = entry.get("unit", "")
        separator = entry.get("separator", ",")
        raw_fields = entry.get("fields", [])
        if not isinstance(unit, str):
            errors.append(ConfigError(src, f"{key}.unit", f"must be a string, not {unit!r}"))
            unit = ""
        if not isinstance(separator, str) or not separator:
            errors.append(ConfigError(src, f"{key}.separator", "must be a non-empty string"))
            separator = ","
        if not isinstance(raw_fields, list) or not all(isinstance(f, str) for f in raw_fields):
            errors.append(ConfigError(src, f"{key}.fields", "must be a list of names"))
        else:
            fields = tuple(raw_fields)
        if name == "scaling" and not fields:
            fields = SCALING_FIELDS
    else:
        for k in ("reply", "unit", "fields", "separator"):
            if k in entry:
                errors.append(ConfigError(src, f"{key}.{k}", "only a query has a reply"))
    if len(errors) > n_before:
        return None
    return Operation(
        name=name,
        kind=spec.kind,
        template=template,
        reply=reply,
        unit=unit,
        fields=fields,
        separator=separator,
        idempotent=spec.idempotent,
        true_word=true_word,
        false_word=false_word,
        number_format=number_format,
        words=words,
    )
