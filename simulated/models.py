"""Simulated boards: oscillator, amplifier and table-driven models, read from TOML.

A board file describes one board family with one or more revisions (parameter sets).
A unit (one serial number) draws its own small spread from a generator seeded by a hash
of (board, revision, serial), so the same serial is always the same unit.

Models register by ``kind`` with :func:`register_kind`; :func:`load_board` validates a
file completely (every key known, every value of the right type and range) and raises
:class:`benchctl.errors.ConfigError` naming the file and the key.

Physics (our own choices, documented here and in the board files)
-----------------------------------------------------------------
Oscillator amplitude (Vpp of the fundamental) against the rail ``r``:

* ``r < dropout_v``: no oscillation. A stopped board starts only when ``r >= startup_v``
  (hysteresis); a running board keeps going down to ``dropout_v``.
* ``dropout_v <= r < linear_lo_v`` (onset): ``lin(r) - c (linear_lo_v - r)**2`` with
  ``c`` chosen so the amplitude at dropout is ``onset_vpp_v``; value and slope join the
  linear law at ``linear_lo_v``.
* ``linear_lo_v <= r <= linear_hi_v``: exactly linear, ``intercept + slope * r``.
* ``r > linear_hi_v`` (compression): ``lin(hi) + slope * h * tanh((r - hi) / h)`` with
  ``h = compression_v``; value and slope join at ``linear_hi_v``.

Start-up: the amplitude grows from ``seed_vpp_v`` with a logistic law in
``u = (a / A)**p``: ``logit(u)`` rises at ``1 / tau_env`` where ``tau_env`` is the envelope
time constant (``1 / (2 pi envelope_bandwidth_hz)``) and ``p = tau_grow / tau_env``. For
small amplitudes this is an exponential envelope ``a ~ exp(t / tau_grow)``; near the final
amplitude it is the first-order envelope response. ``tau_grow`` scales with the excess
rail: ``growth_tau_s * (nominal_rail_v - dropout_v) / (r - dropout_v)``.
"""

from __future__ import annotations

import csv
import hashlib
import math
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from benchctl.errors import ConfigError

BOARDS_DIR = Path(__file__).with_name("boards")
BUILTIN_BOARDS = ("beacon", "buffer", "replay")

_KINDS: dict[str, type[BoardModel]] = {}


def register_kind(name: str) -> Callable[[type[BoardModel]], type[BoardModel]]:
    """Register a board model class under ``kind = name`` in board files."""

    def deco(cls: type[BoardModel]) -> type[BoardModel]:
        for attr in ("PARAMS", "from_params", "truth"):
            if not hasattr(cls, attr):
                raise TypeError(f"board kind {name!r}: class {cls.__name__} lacks {attr}")
        if name in _KINDS:
            raise TypeError(f"board kind {name!r} registered twice")
        cls.kind = name
        _KINDS[name] = cls
        return cls

    return deco


def board_kinds() -> tuple[str, ...]:
    """Names of the registered board kinds."""
    return tuple(_KINDS)


# --------------------------------------------------------------------------------------
# Parameter declarations and validation
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Param:
    """One numeric board parameter: name, unit, lower bound, whether it may be missing."""

    name: str
    unit: str
    minimum: float | None = None
    exclusive_min: bool = False
    default: float | None = None


def _check_number(file: str, key: str, value: Any, p: Param) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ConfigError(file, key, f"must be a number ({p.unit}), got {value!r}")
    x = float(value)
    if not math.isfinite(x):
        raise ConfigError(file, key, f"must be finite, got {value!r}")
    if p.minimum is not None:
        bad = x <= p.minimum if p.exclusive_min else x < p.minimum
        if bad:
            op = ">" if p.exclusive_min else ">="
            raise ConfigError(file, key, f"must be {op} {p.minimum:g} {p.unit}, got {x:g}")
    return x


def unit_rng(board: str, revision: str, serial: str) -> np.random.Generator:
    """Random generator of one unit: a pure function of (board, revision, serial)."""
    digest = hashlib.blake2b(f"{board}\x00{revision}\x00{serial}".encode(), digest_size=16).digest()
    return np.random.default_rng(int.from_bytes(digest, "big"))


# --------------------------------------------------------------------------------------
# Base class and truth containers
# --------------------------------------------------------------------------------------
class BoardModel:
    """A simulated board. Subclasses implement the physics for one ``kind``."""

    kind = ""
    PARAMS: tuple[Param, ...] = ()
    is_oscillator = False

    name: str
    revision: str
    serial: str
    noise_v_rms: float

    def current_at(self, rail_v: float | np.ndarray, oscillating: bool | np.ndarray = True):
        """Supply current drawn at ``rail_v``, A."""
        raise NotImplementedError

    def truth(self):  # pragma: no cover - abstract
        raise NotImplementedError


_KNEE_V = 0.7
"""Rail below which a board's current ramps in linearly from 0 (see :func:`_ramp_in`), V."""


def _ramp_in(rail_v, knee_v: float = _KNEE_V):
    """0 at 0 V rising linearly to 1 at ``knee_v``: a board draws nothing without a rail."""
    return np.clip(np.asarray(rail_v, dtype=float) / knee_v, 0.0, 1.0)


@dataclass(frozen=True)
class OscillatorTruth:
    """Analytic ground truth of a simulated oscillator board (for tests).

    Attributes
    ----------
    dropout_v, startup_v : float
        Rail below which a running board stops; rail at which a stopped board starts, V.
    linear_lo_v, linear_hi_v : float
        The true linear region of amplitude against rail, V.
    slope_vpp_per_v : float
        Supply sensitivity in the linear region, Vpp per V.
    intercept_vpp : float
        Linear law ``vpp = intercept_vpp + slope_vpp_per_v * rail_v`` in the region, Vpp.
    pushing_hz_per_v : float
        Frequency pushing (d f / d rail) in the linear region, Hz per V.
    nominal_rail_v : float
        Nominal rail, V.
    """

    dropout_v: float
    startup_v: float
    linear_lo_v: float
    linear_hi_v: float
    slope_vpp_per_v: float
    intercept_vpp: float
    pushing_hz_per_v: float
    nominal_rail_v: float
    model: OscillatorBase = field(repr=False, compare=False)

    def vpp_at(self, rail_v):
        """Steady amplitude (peak-to-peak of the fundamental) of a running board, V."""
        return self.model.vpp_at(rail_v)

    def freq_at(self, rail_v):
        """Oscillation frequency at ``rail_v``, Hz."""
        return self.model.freq_at(rail_v)

    def current_at(self, rail_v, oscillating=True):
        """Supply current at ``rail_v``, A."""
        return self.model.current_at(rail_v, oscillating)

    def startup_time_s(self, rail_v: float) -> float:
        """Time from an ideal rail step to ``rail_v`` until 90 % of the final amplitude, s.

        With a slewing supply the growth starts when the rail crosses ``startup_v``.
        """
        return self.model.startup_time_s(rail_v)

    def modulation_index(self, rail_v: float, gen_vpp_v: float) -> float:
        """Quasi-static AM index for a sine of ``gen_vpp_v`` summed onto the rail ``rail_v``.

        ``m = (vpp(r + a) - vpp(r - a)) / (vpp(r + a) + vpp(r - a))`` with ``a = gen_vpp_v / 2``
        (in the linear region this is ``slope * a / vpp(r)``).
        """
        a = gen_vpp_v / 2.0
        hi = float(self.model.vpp_at(rail_v + a))
        lo = float(self.model.vpp_at(rail_v - a))
        return (hi - lo) / (hi + lo)


@dataclass(frozen=True)
class AmplifierTruth:
    """Analytic ground truth of a simulated amplifier board.

    Attributes
    ----------
    min_rail_v : float
        Below this rail the amplifier gives no output, V.
    gain_nominal : float
        Voltage gain at ``nominal_rail_v``, V/V.
    gain_per_v : float
        Change of gain per rail volt, (V/V) per V.
    headroom_v : float
        The output swings to within this of each rail, V.
    nominal_rail_v : float
        Nominal rail, V.
    """

    min_rail_v: float
    gain_nominal: float
    gain_per_v: float
    headroom_v: float
    nominal_rail_v: float
    model: AmplifierModel = field(repr=False, compare=False)

    def gain_at(self, rail_v):
        """Small-signal voltage gain at ``rail_v``, V/V."""
        return self.model.gain_at(rail_v)

    def swing_vpp_at(self, rail_v):
        """Largest output swing before clipping at ``rail_v``, Vpp."""
        return self.model.swing_vpp_at(rail_v)

    def current_at(self, rail_v, oscillating=True):
        """Supply current at ``rail_v``, A."""
        return self.model.current_at(rail_v, oscillating)


# --------------------------------------------------------------------------------------
# Oscillators
# --------------------------------------------------------------------------------------
_OSC_COMMON = (
    Param("nominal_rail_v", "V", 0.0, True),
    Param("dropout_v", "V", 0.0, True),
    Param("startup_v", "V", 0.0, True),
    Param("freq_nominal_hz", "Hz", 0.0, True),
    Param("pushing_hz_per_v", "Hz/V", None, default=0.0),
    Param("harmonic2_dbc", "dBc", None, default=-60.0),
    Param("harmonic3_dbc", "dBc", None, default=-60.0),
    Param("harmonic_per_compression", "1", 0.0, default=0.0),
    Param("current_idle_a", "A", 0.0),
    Param("current_idle_a_per_v", "A/V", 0.0, default=0.0),
    Param("current_osc_a", "A", 0.0),
    Param("current_osc_a_per_v", "A/V", 0.0, default=0.0),
    Param("noise_v_rms", "V", 0.0, default=0.0),
    Param("envelope_bandwidth_hz", "Hz", 0.0, True),
    Param("growth_tau_s", "s", 0.0, True),
    Param("seed_vpp_v", "V", 0.0, True, default=1e-5),
)


class OscillatorBase(BoardModel):
    """Shared physics of oscillator boards: hysteresis, start-up, pushing, current."""

    is_oscillator = True

    def __init__(self, name: str, revision: str, serial: str, p: dict[str, float]) -> None:
        self.name, self.revision, self.serial = name, revision, serial
        self.p = dict(p)
        for key, value in p.items():
            setattr(self, key, value)
        self.tau_env_s = 1.0 / (2.0 * math.pi * self.envelope_bandwidth_hz)

    # -- laws ------------------------------------------------------------------------
    def vpp_at(self, rail_v):  # pragma: no cover - abstract
        raise NotImplementedError

    def freq_at(self, rail_v):
        """Frequency, Hz: linear pushing about the nominal rail."""
        r = np.asarray(rail_v, dtype=float)
        f = self.freq_nominal_hz + self.pushing_hz_per_v * (r - self.nominal_rail_v)
        return f if f.ndim else float(f)

    def current_at(self, rail_v, oscillating=True):
        """Supply current, A: idle law when stopped, oscillating law when running."""
        if isinstance(rail_v, (float, int)) and isinstance(oscillating, (bool, np.bool_)):
            r = float(rail_v)  # one readback: the same law in floats
            if r <= 0:
                return 0.0
            if oscillating:
                base = self.current_osc_a + self.current_osc_a_per_v * r
            else:
                base = self.current_idle_a + self.current_idle_a_per_v * r
            return base * min(r / _KNEE_V, 1.0)
        r = np.asarray(rail_v, dtype=float)
        idle = self.current_idle_a + self.current_idle_a_per_v * r
        run = self.current_osc_a + self.current_osc_a_per_v * r
        i = np.where(np.asarray(oscillating, dtype=bool), run, idle) * _ramp_in(r)
        i = np.where(r > 0, i, 0.0)
        return i if i.ndim else float(i)

    def compression_at(self, rail_v):
        """Fractional amplitude lost to compression (0 in and below the linear region)."""
        r = np.asarray(rail_v, dtype=float)
        lin = self.intercept_vpp + self.slope_vpp_per_v * r
        c = np.where(r > self.linear_hi_v, 1.0 - self.vpp_at(r) / np.maximum(lin, 1e-12), 0.0)
        return np.clip(c, 0.0, 1.0)

    def harmonics_at(self, rail_v):
        """Relative amplitudes (to the fundamental) of the 2nd and 3rd harmonics."""
        c = self.compression_at(rail_v)
        h2 = 10 ** (self.harmonic2_dbc / 20) + self.harmonic_per_compression * c
        h3 = 10 ** (self.harmonic3_dbc / 20) + self.harmonic_per_compression * c
        return h2, h3

    def growth_tau_at(self, rail_v: float) -> float:
        """Small-signal growth time constant of the envelope, s."""
        excess = max(float(rail_v) - self.dropout_v, 1e-6)
        return self.growth_tau_s * (self.nominal_rail_v - self.dropout_v) / excess

    def growth_factor(self, elapsed_s, rail_v: float):
        """Start-up envelope relative to the final amplitude, after ``elapsed_s`` since start.

        ``g = sigmoid(L0 + t / tau_env) ** (1 / p)``; ``g = 1`` for ``elapsed_s = inf``.
        """
        t = np.asarray(elapsed_s, dtype=float)
        final = float(self.vpp_at(rail_v))
        if final <= 0:
            return np.zeros_like(t)
        p = max(self.growth_tau_at(rail_v) / self.tau_env_s, 1.0)
        ratio = min(self.seed_vpp_v / final, 0.999)
        lu0 = p * math.log(ratio)  # log u0
        l0 = lu0 - math.log(-math.expm1(lu0))  # logit u0
        x = l0 + np.where(np.isfinite(t), np.maximum(t, 0.0), 1e300) / self.tau_env_s
        log_u = -np.logaddexp(0.0, -x)
        return np.exp(log_u / p)

    def startup_time_s(self, rail_v: float, fraction: float = 0.9) -> float:
        """Closed form of the time :meth:`growth_factor` takes to reach ``fraction``, s."""
        if rail_v < self.startup_v:
            return math.inf
        final = float(self.vpp_at(rail_v))
        p = max(self.growth_tau_at(rail_v) / self.tau_env_s, 1.0)
        ratio = min(self.seed_vpp_v / final, 0.999)
        lu0 = p * math.log(ratio)
        l0 = lu0 - math.log(-math.expm1(lu0))
        lu9 = p * math.log(fraction)
        l9 = lu9 - math.log(-math.expm1(lu9))
        return (l9 - l0) * self.tau_env_s

    def check(self, file: str, prefix: str) -> None:
        """Cross-parameter checks, after the unit spread is applied."""
        if not self.startup_v > self.dropout_v:
            raise ConfigError(file, f"{prefix}.startup_v",
                              f"must exceed dropout_v ({self.startup_v:g} <= {self.dropout_v:g})")

    def truth(self) -> OscillatorTruth:
        """The unit's ground truth."""
        return OscillatorTruth(
            dropout_v=self.dropout_v, startup_v=self.startup_v,
            linear_lo_v=self.linear_lo_v, linear_hi_v=self.linear_hi_v,
            slope_vpp_per_v=self.slope_vpp_per_v, intercept_vpp=self.intercept_vpp,
            pushing_hz_per_v=self.pushing_hz_per_v, nominal_rail_v=self.nominal_rail_v,
            model=self)

    @classmethod
    def from_params(cls, name, revision, serial, params, *, file, prefix):  # pragma: no cover
        raise NotImplementedError


@register_kind("oscillator")
class OscillatorModel(OscillatorBase):
    """Analytic oscillator: smooth onset, exact linear region, soft compression."""

    PARAMS = _OSC_COMMON + (
        Param("linear_lo_v", "V", 0.0, True),
        Param("linear_hi_v", "V", 0.0, True),
        Param("slope_vpp_per_v", "Vpp/V", 0.0, True),
        Param("vpp_at_lo_v", "Vpp", 0.0, True),
        Param("onset_vpp_v", "Vpp", 0.0, True),
        Param("compression_v", "V", 0.0, True),
    )

    def __init__(self, name, revision, serial, p):
        super().__init__(name, revision, serial, p)
        self.intercept_vpp = self.vpp_at_lo_v - self.slope_vpp_per_v * self.linear_lo_v
        span = self.linear_lo_v - self.dropout_v
        lin_drop = self.intercept_vpp + self.slope_vpp_per_v * self.dropout_v
        self.onset_c = (lin_drop - self.onset_vpp_v) / span**2 if span > 0 else 0.0

    @classmethod
    def from_params(cls, name, revision, serial, params, *, file, prefix):
        return cls(name, revision, serial, params)

    def check(self, file, prefix):
        super().check(file, prefix)
        if not self.dropout_v < self.linear_lo_v < self.linear_hi_v:
            raise ConfigError(file, f"{prefix}.linear_lo_v",
                              "need dropout_v < linear_lo_v < linear_hi_v, got "
                              f"{self.dropout_v:g}, {self.linear_lo_v:g}, {self.linear_hi_v:g}")
        if self.onset_c < 0 or self.onset_vpp_v <= 0:
            raise ConfigError(file, f"{prefix}.onset_vpp_v",
                              f"must lie between 0 and the linear law at dropout, got "
                              f"{self.onset_vpp_v:g}")
        if self.startup_v >= self.linear_lo_v:
            raise ConfigError(file, f"{prefix}.startup_v",
                              f"must be below linear_lo_v, got {self.startup_v:g}")

    def vpp_at(self, rail_v):
        r = np.asarray(rail_v, dtype=float)
        lin = self.intercept_vpp + self.slope_vpp_per_v * r
        onset = lin - self.onset_c * (self.linear_lo_v - r) ** 2
        h = self.compression_v
        top = self.intercept_vpp + self.slope_vpp_per_v * self.linear_hi_v
        comp = top + self.slope_vpp_per_v * h * np.tanh((r - self.linear_hi_v) / h)
        v = np.where(r < self.linear_lo_v, onset, np.where(r > self.linear_hi_v, comp, lin))
        v = np.where(r >= self.dropout_v, v, 0.0)
        return v if v.ndim else float(v)


@register_kind("table")
class TableOscillatorModel(OscillatorBase):
    """Oscillator replayed from a measured table ``rail_v,vpp_v[,freq_hz][,current_a]``.

    Amplitude, frequency and current are linearly interpolated in rail (held at the table
    ends). The linear region comes from ``linear_lo_v``/``linear_hi_v`` when given, else
    from the widest run of table segments whose slope is within 10 % of the median slope
    of the rows above start-up.
    """

    PARAMS = tuple(p for p in _OSC_COMMON if p.name not in ("freq_nominal_hz",)) + (
        Param("freq_nominal_hz", "Hz", 0.0, True, default=1.0e6),
        Param("linear_lo_v", "V", 0.0, default=math.nan),
        Param("linear_hi_v", "V", 0.0, default=math.nan),
    )
    EXTRA_KEYS = ("table",)

    def __init__(self, name, revision, serial, p, table: dict[str, np.ndarray]):
        super().__init__(name, revision, serial, p)
        self.table = table
        self.t_rail = table["rail_v"]
        self.t_vpp = table["vpp_v"]
        lo, hi = self.linear_lo_v, self.linear_hi_v
        if not (math.isfinite(lo) and math.isfinite(hi)):
            lo, hi = self._find_linear()
        self.linear_lo_v, self.linear_hi_v = lo, hi
        sel = (self.t_rail >= lo - 1e-12) & (self.t_rail <= hi + 1e-12)
        slope, icpt = np.polyfit(self.t_rail[sel], self.t_vpp[sel], 1)
        self.slope_vpp_per_v, self.intercept_vpp = float(slope), float(icpt)
        if "freq_hz" in table:
            fsel = (self.t_rail >= lo) & (self.t_rail <= hi)
            self.pushing_hz_per_v = float(np.polyfit(self.t_rail[fsel], table["freq_hz"][fsel], 1)[0])

    def _find_linear(self) -> tuple[float, float]:
        r, v = self.t_rail, self.t_vpp
        keep = r >= self.startup_v
        r, v = r[keep], v[keep]
        if len(r) < 3:
            return float(r[0]), float(r[-1])
        s = np.diff(v) / np.diff(r)
        med = float(np.median(s))
        ok = np.abs(s - med) <= 0.1 * abs(med)
        best, start, cur = (0, 0), None, 0
        for i, good in enumerate(ok):
            if good:
                start = i if start is None else start
                cur = i - start + 1
                if cur > best[1] - best[0]:
                    best = (start, i + 1)
            else:
                start = None
        return float(r[best[0]]), float(r[best[1]])

    @classmethod
    def from_params(cls, name, revision, serial, params, *, file, prefix, table_path=None):
        return cls(name, revision, serial, params, read_table(table_path, file=file))

    def check(self, file, prefix):
        super().check(file, prefix)
        if self.slope_vpp_per_v <= 0:
            raise ConfigError(file, f"{prefix}.table", "amplitude must rise with rail in the "
                              f"linear region, slope {self.slope_vpp_per_v:g} Vpp/V")

    def vpp_at(self, rail_v):
        r = np.asarray(rail_v, dtype=float)
        v = np.interp(r, self.t_rail, self.t_vpp)
        v = np.where(r >= self.dropout_v, v, 0.0)
        return v if v.ndim else float(v)

    def freq_at(self, rail_v):
        if "freq_hz" not in self.table:
            return super().freq_at(rail_v)
        f = np.interp(np.asarray(rail_v, dtype=float), self.t_rail, self.table["freq_hz"])
        return f if f.ndim else float(f)

    def current_at(self, rail_v, oscillating=True):
        if "current_a" not in self.table:
            return super().current_at(rail_v, oscillating)
        r = np.asarray(rail_v, dtype=float)
        run = np.interp(r, self.t_rail, self.table["current_a"])
        idle = (self.current_idle_a + self.current_idle_a_per_v * r) * _ramp_in(r)
        i = np.where(np.asarray(oscillating, dtype=bool), run, idle)
        i = np.where(r > 0, i, 0.0)
        return i if i.ndim else float(i)


def read_table(path: Path | None, *, file: str) -> dict[str, np.ndarray]:
    """Read a board table CSV (``rail_v,vpp_v[,freq_hz][,current_a]``) with :mod:`csv`."""
    if path is None:
        raise ConfigError(file, "table", "missing (path of the CSV table)")
    where = str(path)
    allowed = ("rail_v", "vpp_v", "freq_hz", "current_a")
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            reader = csv.reader(fh)
            header = [h.strip() for h in next(reader, [])]
            rows = [row for row in reader if row and not row[0].lstrip().startswith("#")]
    except OSError as exc:
        raise ConfigError(file, "table", f"cannot read {where}: {exc.strerror or exc}") from exc
    if header[:2] != ["rail_v", "vpp_v"]:
        raise ConfigError(where, "header", f"must start with rail_v,vpp_v, got {','.join(header)!r}")
    for h in header:
        if h not in allowed:
            raise ConfigError(where, "header", f"unknown column {h!r} (allowed: {', '.join(allowed)})")
    if len(set(header)) != len(header):
        raise ConfigError(where, "header", "duplicate column")
    data: dict[str, list[float]] = {h: [] for h in header}
    for lineno, row in enumerate(rows, start=2):
        if len(row) != len(header):
            raise ConfigError(where, f"line {lineno}", f"has {len(row)} fields, expected {len(header)}")
        for h, cell in zip(header, row, strict=True):
            try:
                x = float(cell)
            except ValueError:
                raise ConfigError(where, f"line {lineno}.{h}", f"not a number: {cell!r}") from None
            if not math.isfinite(x):
                raise ConfigError(where, f"line {lineno}.{h}", f"not finite: {cell!r}")
            data[h].append(x)
    if len(data["rail_v"]) < 3:
        raise ConfigError(where, "rows", f"need at least 3 rows, got {len(data['rail_v'])}")
    arrays = {h: np.asarray(v, dtype=float) for h, v in data.items()}
    if np.any(np.diff(arrays["rail_v"]) <= 0):
        raise ConfigError(where, "rail_v", "must increase strictly from row to row")
    if np.any(arrays["vpp_v"] < 0):
        raise ConfigError(where, "vpp_v", "must be >= 0")
    return arrays


# --------------------------------------------------------------------------------------
# Amplifier
# --------------------------------------------------------------------------------------
@register_kind("amplifier")
class AmplifierModel(BoardModel):
    """Amplifier: gain that follows the rail, soft clipping ``headroom_v`` from each rail.

    The output is AC-coupled (centred on 0 V); the swing limit is ``rail - 2 headroom``
    peak-to-peak; clipping is a tanh knee on the linear output.
    """

    PARAMS = (
        Param("nominal_rail_v", "V", 0.0, True),
        Param("min_rail_v", "V", 0.0, True),
        Param("gain_nominal", "V/V", 0.0, True),
        Param("gain_per_v", "V/V per V", None, default=0.0),
        Param("headroom_v", "V", 0.0),
        Param("current_idle_a", "A", 0.0),
        Param("current_idle_a_per_v", "A/V", 0.0, default=0.0),
        Param("noise_v_rms", "V", 0.0, default=0.0),
    )

    def __init__(self, name, revision, serial, p):
        self.name, self.revision, self.serial = name, revision, serial
        self.p = dict(p)
        for key, value in p.items():
            setattr(self, key, value)

    @classmethod
    def from_params(cls, name, revision, serial, params, *, file, prefix):
        return cls(name, revision, serial, params)

    def check(self, file, prefix):
        if self.min_rail_v <= 2 * self.headroom_v:
            raise ConfigError(file, f"{prefix}.min_rail_v", "must exceed twice headroom_v")

    def gain_at(self, rail_v):
        r = np.asarray(rail_v, dtype=float)
        g = np.where(r >= self.min_rail_v,
                     self.gain_nominal + self.gain_per_v * (r - self.nominal_rail_v), 0.0)
        return g if g.ndim else float(g)

    def swing_vpp_at(self, rail_v):
        r = np.asarray(rail_v, dtype=float)
        s = np.where(r >= self.min_rail_v, np.maximum(r - 2 * self.headroom_v, 0.0), 0.0)
        return s if s.ndim else float(s)

    def output(self, vin, rail_v):
        """Output voltage for input ``vin`` with the (instantaneous) rail ``rail_v``, V."""
        half = self.swing_vpp_at(rail_v) / 2.0
        lin = self.gain_at(rail_v) * np.asarray(vin, dtype=float)
        safe = np.where(half > 0, half, 1.0)
        return np.where(half > 0, safe * np.tanh(lin / safe), 0.0)

    def current_at(self, rail_v, oscillating=True):
        r = np.asarray(rail_v, dtype=float)
        i = (self.current_idle_a + self.current_idle_a_per_v * r) * _ramp_in(r)
        i = np.where(r > 0, i, 0.0)
        return i if i.ndim else float(i)

    def truth(self) -> AmplifierTruth:
        return AmplifierTruth(min_rail_v=self.min_rail_v, gain_nominal=self.gain_nominal,
                              gain_per_v=self.gain_per_v, headroom_v=self.headroom_v,
                              nominal_rail_v=self.nominal_rail_v, model=self)


# --------------------------------------------------------------------------------------
# Board files
# --------------------------------------------------------------------------------------
_BOARD_KEYS = {"name", "kind", "description", "default_revision", "default_serial"}
_REV_META = {"inherits", "spread"}


def resolve_board_path(board: str | Path) -> Path:
    """A built-in board name, or a path to a board TOML file."""
    if isinstance(board, str) and board in BUILTIN_BOARDS:
        return BOARDS_DIR / f"{board}.toml"
    return Path(board)


def load_board(board: str | Path = "beacon", *, revision: str | None = None,
               serial: str | None = None) -> BoardModel:
    """Load, validate and instantiate one unit of a board.

    Parameters
    ----------
    board : str or Path
        A built-in board (``"beacon"``, ``"buffer"``, ``"replay"``) or a board TOML path.
    revision : str, optional
        Revision (parameter set); the file's ``default_revision`` when omitted.
    serial : str, optional
        Unit serial number; the file's ``default_serial`` when omitted.

    Raises
    ------
    ConfigError
        Naming the file and the key of the first problem found.
    """
    path = resolve_board_path(board)
    file = str(path)
    try:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(file, "", "board file not found") from None
    except OSError as exc:
        raise ConfigError(file, "", f"cannot read: {exc.strerror or exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(file, "", f"not valid TOML: {exc}") from None
    return board_from_dict(doc, file=file, base_dir=path.parent, revision=revision, serial=serial)


def board_from_dict(doc: dict[str, Any], *, file: str, base_dir: Path | None = None,
                    revision: str | None = None, serial: str | None = None) -> BoardModel:
    """Validate a parsed board document and build one unit (see :func:`load_board`)."""
    for key in doc:
        if key not in ("board", "revisions"):
            raise ConfigError(file, key, "unknown key (expected [board] and [revisions.*])")
    head = doc.get("board")
    if not isinstance(head, dict):
        raise ConfigError(file, "board", "missing table [board]")
    for key in head:
        if key not in _BOARD_KEYS:
            raise ConfigError(file, f"board.{key}", "unknown key")
    for key in ("name", "kind"):
        if not isinstance(head.get(key), str) or not head.get(key):
            raise ConfigError(file, f"board.{key}", f"must be a non-empty string, got {head.get(key)!r}")
    for key in ("description", "default_revision", "default_serial"):
        if key in head and not isinstance(head[key], str):
            raise ConfigError(file, f"board.{key}", f"must be a string, got {head[key]!r}")
    kind = head["kind"]
    if kind not in _KINDS:
        raise ConfigError(file, "board.kind", f"unknown kind {kind!r} (known: {', '.join(_KINDS)})")
    cls = _KINDS[kind]
    revs = doc.get("revisions")
    if not isinstance(revs, dict) or not revs:
        raise ConfigError(file, "revisions", "missing: at least one [revisions.<name>] table")
    for rname, rtab in revs.items():
        if not isinstance(rtab, dict):
            raise ConfigError(file, f"revisions.{rname}", "must be a table")
    revision = revision or head.get("default_revision") or next(iter(revs))
    if revision not in revs:
        raise ConfigError(file, "revisions", f"no revision {revision!r} (have: {', '.join(revs)})")
    if not serial:
        default_rev = head.get("default_revision") or next(iter(revs))
        serial = head.get("default_serial") if revision == default_rev else None
        serial = serial or f"{revision}0001"
    # validate every revision, not only the one asked for, so a bad file fails early
    merged_all = {r: _merge_revision(file, revs, r, cls) for r in revs}
    values, spread, extras = merged_all[revision]
    rng = unit_rng(head["name"], revision, serial)
    params = {}
    for p in cls.PARAMS:
        x = values.get(p.name, p.default)
        if x is None:
            raise ConfigError(file, f"revisions.{revision}.{p.name}", f"missing ({p.unit})")
        sigma = spread.get(p.name, 0.0)
        if sigma > 0 and math.isfinite(x):
            x = x + sigma * float(np.clip(rng.standard_normal(), -3.0, 3.0))
        params[p.name] = x
    prefix = f"revisions.{revision}"
    kwargs: dict[str, Any] = {"file": file, "prefix": prefix}
    if "table" in getattr(cls, "EXTRA_KEYS", ()):
        if "table" not in extras:
            raise ConfigError(file, f"{prefix}.table", "missing (file name of the CSV table)")
        kwargs["table_path"] = (base_dir or Path(".")) / extras["table"]
    model = cls.from_params(head["name"], revision, serial, params, **kwargs)
    model.check(file, prefix)
    model.description = head.get("description", "")
    return model


def _merge_revision(file, revs, rname, cls, _seen=None):
    seen = _seen or []
    if rname in seen:
        raise ConfigError(file, f"revisions.{rname}.inherits", f"inheritance loop {' -> '.join(seen + [rname])}")
    tab = revs[rname]
    params = {p.name: p for p in cls.PARAMS}
    extra_keys = getattr(cls, "EXTRA_KEYS", ())
    values: dict[str, float] = {}
    spread: dict[str, float] = {}
    extras: dict[str, str] = {}
    parent = tab.get("inherits")
    if parent is not None:
        if not isinstance(parent, str) or parent not in revs:
            raise ConfigError(file, f"revisions.{rname}.inherits", f"no revision {parent!r}")
        values, spread, extras = (dict(x) for x in _merge_revision(file, revs, parent, cls, seen + [rname]))
    for key, value in tab.items():
        where = f"revisions.{rname}.{key}"
        if key == "inherits":
            continue
        if key == "spread":
            if not isinstance(value, dict):
                raise ConfigError(file, where, "must be a table of standard deviations")
            for sk, sv in value.items():
                if sk not in params:
                    raise ConfigError(file, f"{where}.{sk}", "unknown key (not a parameter)")
                spread[sk] = _check_number(file, f"{where}.{sk}", sv, Param(sk, params[sk].unit, 0.0))
            continue
        if key in extra_keys:
            if not isinstance(value, str) or not value:
                raise ConfigError(file, where, f"must be a file name, got {value!r}")
            extras[key] = value
            continue
        if key not in params:
            raise ConfigError(file, where, "unknown key")
        values[key] = _check_number(file, where, value, params[key])
    return values, spread, extras
