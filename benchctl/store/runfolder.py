"""The run folder: one directory per run, append-only while the run goes on.

Layout (see DEVELOPERS.md, "Run folder")::

    DIR/run.json                          metadata (status, times, host, version, ...)
    DIR/plan.toml, DIR/bench.toml         the files as run
    DIR/points/NN-<step>.csv              one table per step, one row per point
    DIR/points/NN-<step>.csv.torn         line numbers of torn lines (only after a crash)
    DIR/waveforms/NN-<step>/<point>.npz   records referenced from the points tables
    DIR/parameters.json                   derived parameters
    DIR/log.txt                           the run's log

Points files are only ever appended to. Each row is written in one ``write`` call, then
flushed and fsync'd, so a crash leaves at most one incomplete last line. Such a torn line
is detected when the folder is opened or read, skipped when reading and reported
(:attr:`RunFolder.damage`, and a log warning). Before the next row is appended (resume)
the fragment is closed with a line break and its line number recorded in the ``.torn``
side file, so it is never merged with the next row and stays skipped.
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as _dt
import io
import json
import logging
import math
import os
import re
import socket
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from benchctl import __version__
from benchctl.errors import ConfigError, shorten
from benchctl.store import cells
from benchctl.store.atomic import write_atomic, write_json_atomic, write_text_atomic

log = logging.getLogger("benchctl.store")

RUN_FILE = "run.json"
PARAMETERS_FILE = "parameters.json"
POINTS_DIR = "points"
WAVEFORMS_DIR = "waveforms"
TORN_SUFFIX = ".torn"

STATUSES = ("running", "complete", "aborted", "failed")
VERDICTS = ("pass", "fail", None)
PARAMETER_FIELDS: dict[str, Any] = {
    "value": None,
    "unit": "",
    "uncertainty": None,
    "method": "",
    "step": None,
    "low": None,
    "high": None,
    "note": "",
    "spec": None,
    "verdict": None,
}

_UNSAFE = re.compile(r"[^A-Za-z0-9_-]")
_UNSAFE_KEY = re.compile(r"[^A-Za-z0-9._-]")
_POINTS_NAME = re.compile(r"([0-9]+)-([A-Za-z0-9_-]+)\.csv")


def sanitise_name(name: str) -> str:
    """Return ``name`` fit for a file name: letters, digits, ``-`` and ``_`` only.

    Every other character becomes ``_``; an empty name becomes ``step``.
    """
    return _UNSAFE.sub("_", str(name)) or "step"


def sanitise_key(key: str) -> str:
    """Return a point key fit for a file name (letters, digits, ``.``, ``-``, ``_``).

    Other characters become ``_`` and leading dots are replaced, so the name can never be
    hidden, ``.`` or ``..``.
    """
    safe = _UNSAFE_KEY.sub("_", str(key))
    stripped = safe.lstrip(".")
    safe = "_" * (len(safe) - len(stripped)) + stripped
    return safe or "point"


@dataclass(frozen=True)
class Damage:
    """A line of a points file that is skipped when reading.

    Attributes
    ----------
    file : str
        Path relative to the run folder, e.g. ``points/01-sweep.csv``.
    line : int
        1-based physical line number.
    text : str
        The line, shortened for display.
    reason : str
        Why it is skipped ("torn last line", "torn line (recorded)", "malformed: ...").
    """

    file: str
    line: int
    text: str
    reason: str

    def __str__(self) -> str:
        return f"{self.file}:{self.line}: {self.reason}: {self.text!r}"


@dataclass
class _Table:
    header: list[str] | None
    rows: list[tuple[int, list[str]]]
    damage: list[Damage]
    ends_torn: bool
    line_count: int


class RunFolder:
    """One run's folder: create or open it, append points, store waveforms and parameters.

    Use :meth:`create` for a new run and :meth:`open` for an existing one; the constructor
    is internal.
    """

    def __init__(self, path: Path, meta: dict[str, Any]) -> None:
        self._path = Path(path)
        self._meta = meta
        self._prepared: dict[Path, list[str]] = {}
        self._damage: dict[tuple[str, int], Damage] = {}
        self._warned_extra: set[Path] = set()

    # ------------------------------------------------------------------ create / open
    @classmethod
    def create(
        cls,
        path: str | os.PathLike[str],
        *,
        plan_text: str,
        bench_text: str,
        meta: Mapping[str, Any],
        now: Callable[[], _dt.datetime] | None = None,
    ) -> RunFolder:
        """Create a new run folder and write ``plan.toml``, ``bench.toml`` and ``run.json``.

        Parameters
        ----------
        path : path-like
            The folder; parents are created. It must not exist or be empty.
        plan_text, bench_text : str
            The plan and bench files as run, stored verbatim.
        meta : mapping
            Metadata to store (board, instruments' ``*IDN?``, seed, ...). ``status`` is set
            to ``"running"``; ``started`` (ISO 8601 UTC), ``software_version`` and ``host``
            are added unless ``meta`` gives them.
        now : callable, optional
            Clock returning an aware datetime (injected for tests); UTC now by default.

        Raises
        ------
        ConfigError
            The folder exists and is not empty, or is not a directory.
        """
        folder = Path(path)
        if folder.exists():
            if not folder.is_dir():
                raise ConfigError(str(folder), "", "exists and is not a directory")
            if any(folder.iterdir()):
                raise ConfigError(str(folder), "", "folder exists and is not empty; choose a new one")
        folder.mkdir(parents=True, exist_ok=True)
        (folder / POINTS_DIR).mkdir(exist_ok=True)
        stamp = (now or _utc_now)().astimezone(_dt.UTC)
        record = _jsonable(dict(meta))
        record.setdefault("started", _iso(stamp))
        record.setdefault("software_version", __version__)
        record.setdefault("host", socket.gethostname())
        record["status"] = "running"
        write_text_atomic(folder / "plan.toml", plan_text)
        write_text_atomic(folder / "bench.toml", bench_text)
        write_json_atomic(folder / RUN_FILE, record)
        return cls(folder, record)

    @classmethod
    def open(cls, path: str | os.PathLike[str]) -> RunFolder:
        """Open an existing run folder (to resume it or to read it).

        Torn lines in the points files are detected here and listed in :attr:`damage`.

        Raises
        ------
        ConfigError
            ``path`` is not a run folder: missing, not a directory, no readable ``run.json``.
        """
        folder = Path(path)
        if not folder.exists():
            raise ConfigError(str(folder), "", "no such folder")
        if not folder.is_dir():
            raise ConfigError(str(folder), "", "not a directory, so not a run folder")
        run_file = folder / RUN_FILE
        if not run_file.is_file():
            raise ConfigError(str(folder), "", f"not a run folder: no {RUN_FILE}")
        try:
            meta = json.loads(run_file.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise ConfigError(str(run_file), "", f"unreadable run metadata: {shorten(str(exc))}") from exc
        if not isinstance(meta, dict):
            raise ConfigError(str(run_file), "", f"expected a JSON object, got {type(meta).__name__}")
        rf = cls(folder, meta)
        for index, name in rf.steps():
            rf._read_table(rf._points_path(index, name))
        return rf

    # ------------------------------------------------------------------ metadata
    @property
    def path(self) -> Path:
        """The run folder."""
        return self._path

    @property
    def meta(self) -> dict[str, Any]:
        """A copy of ``run.json`` as last written or read."""
        return json.loads(json.dumps(self._meta))

    def update_meta(self, **fields: Any) -> None:
        """Merge ``fields`` into ``run.json`` and rewrite it atomically.

        Raises
        ------
        ConfigError
            ``status`` is not one of running, complete, aborted, failed.
        """
        status = fields.get("status", self._meta.get("status"))
        if "status" in fields and status not in STATUSES:
            raise ConfigError(str(self._path / RUN_FILE), "status", f"{status!r} is not one of {STATUSES}")
        merged = dict(self._meta)
        merged.update(_jsonable(fields))
        write_json_atomic(self._path / RUN_FILE, merged)
        self._meta = merged

    @property
    def log_path(self) -> Path:
        """``DIR/log.txt``, the run's log."""
        return self._path / "log.txt"

    @property
    def damage(self) -> tuple[Damage, ...]:
        """Lines of points files skipped so far (torn or malformed), in the order found."""
        return tuple(self._damage.values())

    # ------------------------------------------------------------------ points
    def points_file(self, step_index: int, step_name: str) -> Path:
        """Path of the points table of a step (which may not exist yet)."""
        return self._points_path(step_index, step_name)

    def append_point(
        self, step_index: int, step_name: str, row: Mapping[str, Any], columns: Sequence[str]
    ) -> None:
        """Append one point to ``points/NN-<step>.csv``, durably.

        Parameters
        ----------
        step_index : int
            Position of the step in the plan (0 or more), the ``NN`` of the file name.
        step_name : str
            Step name; sanitised for the file name.
        row : mapping
            The point: ``row["point"]`` (a string key) and values for ``columns``. Missing
            columns are stored as empty (None); keys that are not columns are dropped.
        columns : sequence of str
            Column names after ``point``; the header is written with the first row.

        Raises
        ------
        ConfigError
            The file exists with a different header (a resumed step declares other columns).
        TypeError
            A value is not None, bool, a number or a string.
        """
        if "point" not in row:
            raise ValueError(f"row has no 'point' key: {sorted(row)!r}")
        header = ["point", *[str(c) for c in columns if c != "point"]]
        path = self._points_path(step_index, step_name)
        write_header = self._prepare(path, header)
        extra = set(row) - set(header)
        if extra and path not in self._warned_extra:
            self._warned_extra.add(path)
            log.warning("%s: dropping keys that are not columns: %s", self._rel(path), sorted(extra))
        values = [cells.encode_key(str(row["point"]))]
        values += [cells.encode(row.get(name)) for name in header[1:]]
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        if write_header:
            writer.writerow(header)
        writer.writerow(values)
        data = buf.getvalue().encode("utf-8")
        fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            _write_all(fd, data)
            os.fsync(fd)
        finally:
            os.close(fd)
        self._prepared[path] = header

    def points(self, step_index: int, step_name: str) -> list[dict[str, Any]]:
        """Return the points of a step, typed back (float, int, bool, str, None).

        Torn and malformed lines are skipped and added to :attr:`damage`. A step with no
        file yet has no points.
        """
        return _typed_rows(self._read_table(self._points_path(step_index, step_name)))

    def points_frame(self, step_index: int, step_name: str):  # -> pandas.DataFrame
        """Return the points of a step as a pandas DataFrame (columns in file order)."""
        import pandas as pd

        table = self._read_table(self._points_path(step_index, step_name))
        return pd.DataFrame(_typed_rows(table), columns=table.header or ["point"])

    def steps(self) -> list[tuple[int, str]]:
        """Return ``(step_index, step_name)`` of every points file present, in order."""
        folder = self._path / POINTS_DIR
        if not folder.is_dir():
            return []
        found = []
        for entry in folder.iterdir():
            m = _POINTS_NAME.fullmatch(entry.name)
            if m and entry.is_file():
                found.append((int(m.group(1)), m.group(2)))
        return sorted(found)

    # ------------------------------------------------------------------ waveforms
    def save_waveform(self, step_index: int, step_name: str, point_key: str, **arrays: Any) -> str:
        """Store arrays and scalars of one point as ``waveforms/NN-<step>/<point>.npz``.

        The file is written compressed (``numpy.savez_compressed``) and atomically. Returns
        the path relative to the run folder, with ``/`` separators, for the points table.
        """
        if not arrays:
            raise ValueError("save_waveform needs at least one array or scalar")
        rel = f"{WAVEFORMS_DIR}/{step_index:02d}-{sanitise_name(step_name)}/{sanitise_key(point_key)}.npz"
        target = self._path / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        payload = {str(k): np.asarray(v) for k, v in arrays.items()}
        for key, value in payload.items():
            if value.dtype == object:
                raise TypeError(f"waveform field {key!r} is not numeric or text: {value.dtype}")
        write_atomic(target, lambda fh: np.savez_compressed(fh, **payload))
        return rel

    def load_waveform(self, relpath: str) -> dict[str, np.ndarray]:
        """Load a waveform file saved by :meth:`save_waveform` (no pickles).

        Raises
        ------
        ConfigError
            The path leaves the run folder, or the file is missing or not a numpy archive.
        """
        target = (self._path / relpath).resolve()
        root = self._path.resolve()
        if root not in target.parents:
            raise ConfigError(str(relpath), "", f"waveform path leaves the run folder {self._path}")
        try:
            with np.load(target, allow_pickle=False) as data:
                return {k: data[k] for k in data.files}
        except FileNotFoundError as exc:
            raise ConfigError(str(self._path / relpath), "", "waveform file missing") from exc
        except (OSError, ValueError) as exc:
            raise ConfigError(str(self._path / relpath), "", f"not a waveform file: {shorten(str(exc))}") from exc

    # ------------------------------------------------------------------ parameters
    def write_parameters(self, params: Mapping[str, Any]) -> None:
        """Write ``parameters.json`` atomically: name -> {value, unit, uncertainty, ...}.

        Each entry is a mapping (or a dataclass such as ``procedures.base.Result``) with
        any of value, unit, uncertainty, method, step, low, high, note, spec
        (``{"min": x, "max": y}`` or None) and verdict ("pass", "fail" or None); absent
        fields are filled with None / "". Unknown fields are kept.

        Raises
        ------
        ConfigError
            A verdict or spec of the wrong form.
        """
        where = str(self._path / PARAMETERS_FILE)
        out: dict[str, dict[str, Any]] = {}
        for name, entry in params.items():
            if dataclasses.is_dataclass(entry) and not isinstance(entry, type):
                entry = dataclasses.asdict(entry)
            if not isinstance(entry, Mapping):
                raise ConfigError(where, str(name), f"expected a mapping, got {type(entry).__name__}")
            item = {**PARAMETER_FIELDS, **_jsonable(dict(entry))}
            item.pop("name", None)
            if item["verdict"] not in VERDICTS:
                raise ConfigError(where, f"{name}.verdict", f"{item['verdict']!r} is not pass, fail or None")
            spec = item["spec"]
            if spec is not None:
                if not isinstance(spec, Mapping) or set(spec) - {"min", "max"}:
                    raise ConfigError(where, f"{name}.spec", f"expected {{min, max}} or None, got {spec!r}")
                item["spec"] = {"min": spec.get("min"), "max": spec.get("max")}
            out[str(name)] = item
        write_json_atomic(self._path / PARAMETERS_FILE, out)

    def parameters(self) -> dict[str, dict[str, Any]]:
        """Return ``parameters.json`` ({} when no parameters were written yet).

        Raises
        ------
        ConfigError
            The file is not valid JSON or not an object of objects.
        """
        path = self._path / PARAMETERS_FILE
        if not path.is_file():
            return {}
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise ConfigError(str(path), "", f"unreadable parameters: {shorten(str(exc))}") from exc
        if not isinstance(data, dict) or not all(isinstance(v, dict) for v in data.values()):
            raise ConfigError(str(path), "", "expected an object of name -> {value, unit, ...}")
        return data

    # ------------------------------------------------------------------ internals
    def _points_path(self, step_index: int, step_name: str) -> Path:
        if int(step_index) < 0:
            raise ValueError(f"{step_index=} must be >= 0")
        return self._path / POINTS_DIR / f"{int(step_index):02d}-{sanitise_name(step_name)}.csv"

    def _rel(self, path: Path) -> str:
        try:
            return path.relative_to(self._path).as_posix()
        except ValueError:
            return str(path)

    def _note(self, damage: Damage) -> None:
        key = (damage.file, damage.line)
        if key not in self._damage:
            self._damage[key] = damage
            log.warning("skipping %s", damage)

    def _prepare(self, path: Path, header: list[str]) -> bool:
        """Make ``path`` ready for appending; return True if the header must be written."""
        known = self._prepared.get(path)
        if known is not None:
            if known != header:
                raise ConfigError(self._rel(path), "", f"columns {header[1:]} differ from header {known[1:]}")
            return False
        path.parent.mkdir(parents=True, exist_ok=True)
        table = self._read_table(path)
        if table.ends_torn:
            # Close the fragment and record it, so it is never merged with the next row.
            torn_line = table.line_count
            side = path.with_name(path.name + TORN_SUFFIX)
            fd = os.open(side, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
            try:
                _write_all(fd, f"{torn_line}\n".encode("ascii"))
                os.fsync(fd)
            finally:
                os.close(fd)
            fd = os.open(path, os.O_WRONLY | os.O_APPEND)
            try:
                _write_all(fd, b"\n")
                os.fsync(fd)
            finally:
                os.close(fd)
        if table.header is None:
            return True
        if table.header != header:
            raise ConfigError(self._rel(path), "", f"columns {header[1:]} differ from header {table.header[1:]}")
        self._prepared[path] = header
        return False

    def _read_table(self, path: Path) -> _Table:
        rel = self._rel(path)
        if not path.is_file():
            return _Table(None, [], [], False, 0)
        data = path.read_bytes()
        torn = self._torn_lines(path)
        lines = data.split(b"\n")
        ends_torn = bool(data) and not data.endswith(b"\n")
        if not ends_torn:
            lines = lines[:-1]  # the empty piece after the final line break
        header: list[str] | None = None
        rows: list[tuple[int, list[str]]] = []
        damage: list[Damage] = []
        for number, raw in enumerate(lines, start=1):
            last = number == len(lines)
            if number in torn or (last and ends_torn):
                reason = "torn last line (incomplete write)" if last and ends_torn else "torn line (recorded)"
                damage.append(Damage(rel, number, shorten(raw), reason))
                continue
            try:
                fields = next(csv.reader([raw.decode("utf-8")]))
            except (UnicodeDecodeError, csv.Error, StopIteration) as exc:
                damage.append(Damage(rel, number, shorten(raw), f"malformed: {shorten(str(exc))}"))
                continue
            if header is None:
                header = fields
                continue
            if len(fields) != len(header):
                reason = f"malformed: {len(fields)} fields, header has {len(header)}"
                damage.append(Damage(rel, number, shorten(raw), reason))
                continue
            rows.append((number, fields))
        for item in damage:
            self._note(item)
        return _Table(header, rows, damage, ends_torn, len(lines))

    def _torn_lines(self, path: Path) -> set[int]:
        side = path.with_name(path.name + TORN_SUFFIX)
        if not side.is_file():
            return set()
        out = set()
        for n, text in enumerate(side.read_text(encoding="ascii", errors="replace").splitlines(), 1):
            text = text.strip()
            if not text:
                continue
            if not text.isdigit():
                raise ConfigError(self._rel(side), f"line {n}", f"expected a line number, got {shorten(text)!r}")
            out.add(int(text))
        return out


def _typed_rows(table: _Table) -> list[dict[str, Any]]:
    if table.header is None:
        return []
    out = []
    for _, fields in table.rows:
        record: dict[str, Any] = {"point": cells.decode_text(fields[0])}
        for name, cell in zip(table.header[1:], fields[1:], strict=True):
            record[name] = cells.decode(cell)
        out.append(record)
    return out


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        view = view[written:]


def _utc_now() -> _dt.datetime:
    return _dt.datetime.now(_dt.UTC)


def _iso(stamp: _dt.datetime) -> str:
    return stamp.isoformat(timespec="seconds").replace("+00:00", "Z")


def _jsonable(obj: Any) -> Any:
    """Convert numpy scalars/arrays, paths, tuples and dataclasses to plain JSON values."""
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_jsonable(v) for v in obj]
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return _jsonable(dataclasses.asdict(obj))
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, np.generic):
        return _jsonable(obj.item())
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if isinstance(obj, float) and not math.isfinite(obj):
        return obj  # json writes NaN / Infinity, which Python's json reads back
    return obj
