"""Measuring the board output at one rail point (bench side, shared by the procedures).

:func:`measure_output` autoscales the output channel, acquires K records, and estimates
Vpp (IEEE 1057 sine fit by default, robust record statistics on request -- the row says
which in ``vpp_method``), frequency, THD, oscillating-or-not with its evidence, and the
supply current. Clipped records are refused: the channel is re-autoscaled and the record
taken again, a bounded number of times.

:func:`probe_oscillation` is the cheap decision used by the threshold searches: the scope
set-up is fixed in advance (:class:`ScopeSetup`, found once at a running rail), so each
decision costs exactly one acquisition.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, replace
from typing import Any, Literal

import numpy as np

from benchctl import analysis
from benchctl.errors import InstrumentError, MeasurementError
from benchctl.procedures.base import Column
from benchctl.procedures.common import Vote, finite_or_none

VppMethod = Literal["fit", "robust"]

OUTPUT_COLUMNS: tuple[Column, ...] = (
    Column("rail_set_v", "V", "rail setpoint"),
    Column("rail_v", "V", "rail readback at the supply"),
    Column("current_a", "A", "supply current readback"),
    Column("oscillating", "", "the detector's verdict"),
    Column("osc_snr_db", "dB", "detector evidence: spectral peak above the noise floor"),
    Column("osc_evidence", "", "detector's reason, in words"),
    Column("vpp_v", "V", "output peak-to-peak (mean over the records)"),
    Column("u_vpp_v", "V", "standard uncertainty of vpp_v"),
    Column("vpp_method", "", "estimator used for vpp_v"),
    Column("freq_hz", "Hz", "output frequency"),
    Column("u_freq_hz", "Hz", "standard uncertainty of freq_hz"),
    Column("offset_v", "V", "output DC level (sine fit offset)"),
    Column("thd_db", "dB", "total harmonic distortion (IEEE 1241), dB re carrier"),
    Column("records", "", "records averaged"),
    Column("rescales", "", "re-autoscales after clipped records"),
)
"""Columns every procedure that measures the output records (rows from :func:`measure_output`)."""


@dataclass(frozen=True)
class ScopeSetup:
    """A fixed output-channel set-up: vertical scale/offset and timebase."""

    scale_v_div: float
    offset_v: float
    window_s: float
    sample_rate_hz: float
    coupling: str = "dc"

    def apply(self, scope: Any, channel: int) -> None:
        # unchecked: the acquisition that follows reads the error queue at its arm
        scope.setup_channel(channel, scale_v_div=self.scale_v_div, offset_v=self.offset_v,
                            coupling=self.coupling, probe=1.0, check=False)
        scope.set_timebase(window_s=self.window_s, sample_rate_hz=self.sample_rate_hz, check=False)
        scope.set_trigger(source="free")  # an earlier step may have left an edge trigger


@dataclass(frozen=True)
class MeasureOptions:
    """How :func:`measure_output` measures.

    records : int -- K records per point (mean and its standard error).
    cycles : float -- carrier cycles per record wanted from autoscale.
    vpp_method : "fit" | "robust".
    max_rescales : int -- re-autoscales allowed after clipped records.
    band_hz : (lo, hi) or None -- expected carrier band for the detector.
    timeout_s : float -- per acquisition.
    """

    records: int = 2
    cycles: float = 200.0
    vpp_method: VppMethod = "fit"
    max_rescales: int = 3
    band_hz: tuple[float, float] | None = None
    timeout_s: float = 5.0
    first_window_s: float | None = None

    def __post_init__(self) -> None:
        if self.records < 1:
            raise ValueError(f"records={self.records!r} must be >= 1")
        if self.vpp_method not in ("fit", "robust"):
            raise ValueError(f"vpp_method={self.vpp_method!r} must be 'fit' or 'robust'")


def _fs(wf: Any) -> float:
    return 1.0 / float(wf.dt_s)


def _detect(volts: np.ndarray, fs_hz: float, band_hz: tuple[float, float] | None,
            **thresholds: float) -> Any:
    kw: dict[str, Any] = {"fs_hz": fs_hz, **thresholds}
    if band_hz is not None:
        kw["band_hz"] = band_hz
    return analysis.detect_oscillation(volts, **kw)


def acquire_output(ctx: Any, *, timeout_s: float,
                   meanwhile: Callable[[], None] | None = None) -> Any:
    """One acquisition; returns the output channel's Waveform.

    ``meanwhile`` runs after the scope is armed and before its completion is awaited:
    work that does not need this record (supply readbacks, the analysis of the previous
    record) overlaps the acquisition instead of following it.
    """
    scope = ctx.bench.scope
    arm, wait = getattr(scope, "arm", None), getattr(scope, "wait_complete", None)
    channel = ctx.bench.wiring.output_channel
    if meanwhile is not None and arm is not None and wait is not None:
        arm()
        meanwhile()
        wait_and_fetch = getattr(scope, "wait_and_fetch", None)
        if wait_and_fetch is not None:  # the completion and the record in one exchange
            return wait_and_fetch(channel, timeout_s=timeout_s)
        wait(timeout_s=timeout_s)
    else:  # a scope without split arm/wait: the work follows the acquisition
        scope.acquire(timeout_s=timeout_s)
        if meanwhile is not None:
            meanwhile()
    return scope.fetch(channel)


FALLBACK_SETUP = ScopeSetup(scale_v_div=0.5, offset_v=0.0, window_s=1e-3, sample_rate_hz=1e7)
"""Set-up used when autoscale finds no periodic signal (a board that is off): 4 V full screen,
1 ms at 10 MS/s -- a stopped board reads as noise/flat, a running one would be seen."""


@dataclass
class ScopeMemory:
    """The set-up autoscale last chose in this step, tried first at the next point.

    At a sweep's next point the output has changed little, so one record taken with the
    remembered set-up usually shows the signal on 40-95 % of the screen, unclipped, with
    about the wanted number of cycles: then it is kept as the first of the K records and
    autoscale (several records) is skipped. A record that shows no oscillation at all is
    kept too (a stopped board: one record decides). Anything else autoscales. A kept
    record whose span fills more than 85 % or less than 55 % of the screen retunes the
    remembered scale to 75 % of it for the next point (``retunes``), so a slowly growing or
    shrinking amplitude does not run into an autoscale.
    """

    setup: ScopeSetup | None = None
    autoscales: int = 0
    reused: int = 0
    retunes: int = 0
    applied: ScopeSetup | None = None
    channel: int | None = None

    def apply(self, scope: Any, channel: int) -> None:
        """Apply the remembered set-up unless it is what this memory last applied.

        Only :func:`measure_output` touches the scope between points of a step, and every
        other change of the scope (autoscale, the fallback) forgets what was applied, so
        an unchanged set-up is not sent again.
        """
        assert self.setup is not None
        if self.applied != self.setup or self.channel != channel:
            self.setup.apply(scope, channel)
            self.applied, self.channel = self.setup, channel

    def forget_applied(self) -> None:
        self.applied = None


def _autoscale(scope: Any, channel: int, opts: MeasureOptions,
               memory: ScopeMemory | None = None) -> bool:
    """Autoscale; False when it found no periodic signal to scale on (the board is off).

    The driver's autoscale raises MeasurementError when it does not settle, and a noise-only
    record can drive its timebase out of the instrument's range (SCPI error -222, data out
    of range); both mean "nothing to scale on", and :data:`FALLBACK_SETUP` is applied.
    """
    if memory is not None:
        memory.forget_applied()
    kw: dict[str, Any] = {"cycles": opts.cycles, "timeout_s": opts.timeout_s}
    if opts.first_window_s is not None:
        kw["first_window_s"] = opts.first_window_s
    try:
        got = scope.autoscale(channel, **kw)
    except MeasurementError:
        got = False
    except InstrumentError as exc:
        if exc.code != -222:
            raise
        got = False
    if got is False:
        FALLBACK_SETUP.apply(scope, channel)
        return False
    if memory is not None:
        memory.autoscales += 1
        if got is not None and hasattr(got, "scale_v_div"):
            memory.setup = ScopeSetup(scale_v_div=float(got.scale_v_div), offset_v=float(got.offset_v),
                                      window_s=float(got.window_s),
                                      sample_rate_hz=float(got.sample_rate_hz))
    return True


def _crossings(y: np.ndarray, lo_v: float, hi_v: float) -> int:
    """Transitions of ``y`` between below ``lo_v`` and above ``hi_v`` (a comparator with
    hysteresis: noise near the middle does not count)."""
    state = np.zeros(y.size, dtype=np.int8)
    state[y > hi_v] = 1
    state[y < lo_v] = -1
    s = state[state != 0]
    return int(np.count_nonzero(s[1:] != s[:-1]))


SCREEN_DIVISIONS = 8
"""Vertical divisions of a scope screen (the scale is per division)."""
RETUNE_BAND = (0.55, 0.85)
"""Screen fraction a kept record's span may fill before the remembered scale is retuned."""
RETUNE_TO = 0.75
"""Screen fraction a retuned scale gives the span seen (autoscale's 6 of 8 divisions)."""


def _retuned(setup: ScopeSetup, top_v: float, bottom_v: float) -> ScopeSetup | None:
    """The set-up for the next point when a kept record, from ``bottom_v`` to ``top_v``,
    sits near an edge of the band.

    A sweep's amplitude moves a little from point to point; a record that fits but fills
    more than 85 % (or less than 55 %) of the screen would soon stop fitting, and the point
    after would need a full autoscale (several records). Re-centring the remembered scale
    on this record's own span costs only the set-up commands at the next point.
    """
    span_v = top_v - bottom_v
    lo, hi = RETUNE_BAND
    if not span_v > 0 or lo <= span_v / (SCREEN_DIVISIONS * setup.scale_v_div) <= hi:
        return None
    return replace(setup, scale_v_div=span_v / (SCREEN_DIVISIONS * RETUNE_TO),
                   offset_v=0.5 * (top_v + bottom_v))


def _still_fits(wf: Any, setup: ScopeSetup,
                opts: MeasureOptions) -> tuple[str | None, Any, tuple[float, float] | None]:
    """("off" | "fits" | None, detection, (top, bottom) V) for a record taken with a
    remembered set-up (the extent is None for a clipped record).

    None means autoscale is needed. "fits" is decided cheaply, before the record is
    analysed: unclipped, 40-95 % of the screen, and 0.8-1.25 x the wanted cycles (counted
    as crossings of a comparator with hysteresis at +-10 % of the span around the middle)
    at 8 samples per cycle or more; the detector then runs with the analysis. Otherwise the
    detector decides between "off" (a stopped board: one record decides) and autoscale,
    and its result (None for a clipped record) is handed on so the record is not examined
    twice.
    """
    if wf.clipped_samples > 0:
        return None, None, None
    y = np.asarray(wf.volts, dtype=float)
    top, bottom = float(np.max(y)), float(np.min(y))
    span_v = top - bottom
    if 0.4 <= span_v / (SCREEN_DIVISIONS * setup.scale_v_div) <= 0.95:
        mid, band = 0.5 * (top + bottom), 0.1 * span_v
        cycles = 0.5 * _crossings(y, mid - band, mid + band)
        if 0.8 * opts.cycles <= cycles <= 1.25 * opts.cycles and y.size >= 8 * cycles:
            return "fits", None, (top, bottom)
    det = _detect(y, _fs(wf), opts.band_hz)
    return ("off" if not det.oscillating else None), det, (top, bottom)


def measure_output(ctx: Any, opts: MeasureOptions, *, rail_set_v: float,
                   memory: ScopeMemory | None = None) -> dict[str, Any]:
    """Measure the output at the present rail; returns a row of :data:`OUTPUT_COLUMNS`.

    With a :class:`ScopeMemory`, the set-up of the previous point is tried first. The same
    as ``measure_output_deferred(...)()``.

    Raises
    ------
    MeasurementError
        Still clipped after ``opts.max_rescales`` re-autoscales.
    """
    return measure_output_deferred(ctx, opts, rail_set_v=rail_set_v, memory=memory)()


def measure_output_deferred(ctx: Any, opts: MeasureOptions, *, rail_set_v: float,
                            memory: ScopeMemory | None = None) -> Callable[[], dict[str, Any]]:
    """The instrument part of :func:`measure_output`; returns ``finish``, which makes the row.

    Everything that needs the bench happens here: the supply readbacks, the records, the
    autoscales (whether the remembered set-up still fits is decided before returning).
    ``finish()`` is pure computation on what was acquired, so it may run later -- while
    the next point is being acquired (see ``ctx.point_later``).

    While the first record is acquired, ``ctx.idle()`` lets the runner make the rows of
    earlier points, and ``ctx.checkpoint()`` (after this point's supply readbacks) checks
    the instruments and records those points.

    Raises
    ------
    MeasurementError
        Still clipped after ``opts.max_rescales`` re-autoscales.
    """
    bench = ctx.bench
    ch = bench.wiring.output_channel
    scope = bench.scope
    rescales = 0
    waves: list[Any] = []
    done: dict[int, tuple[float, ...]] = {}  # id(record) -> its estimates, made while waiting
    dets: dict[int, Any] = {}  # id(record) -> its detection, made while waiting
    dropped: list[Any] = []  # records not used, kept alive so that no id above is reused
    readings: dict[str, float | None] = {}

    def meanwhile() -> None:
        # during the first acquisition: earlier points' rows, the supply readbacks, then
        # the instrument check that lets the runner record those points; during each later
        # one, the previous record's detection and estimates
        if not readings:
            ctx.idle()
            readback = getattr(bench.supply, "readback", None)  # both in one message
            volts, amps = (readback() if readback is not None else
                           (bench.supply.measure_voltage(), bench.supply.measure_current()))
            readings["rail_v"], readings["current_a"] = finite_or_none(volts), finite_or_none(amps)
            ctx.checkpoint()
            return
        if not waves:
            return
        last = waves[-1]
        det = dets.get(id(waves[0]))
        if det is None:
            det = dets[id(waves[0])] = _detect(np.asarray(waves[0].volts, dtype=float),
                                                _fs(waves[0]), opts.band_hz)
        if det.oscillating and id(last) not in done:
            done[id(last)] = _record_estimates(last, opts)

    scaled, want = True, opts.records
    verdict = None
    if memory is not None and memory.setup is not None:
        memory.apply(scope, ch)
        wf = acquire_output(ctx, timeout_s=opts.timeout_s, meanwhile=meanwhile)
        verdict, det, extent = _still_fits(wf, memory.setup, opts)
        if verdict is not None:
            memory.reused += 1
            if verdict == "fits":
                retuned = _retuned(memory.setup, *extent)
                if retuned is not None:
                    memory.setup = retuned
                    memory.retunes += 1
            waves.append(wf)
            if det is not None:
                dets[id(wf)] = det
            want = 1 if verdict == "off" else opts.records
        else:
            dropped.append(wf)
    if verdict is None:
        scaled = _autoscale(scope, ch, opts, memory)
        want = opts.records if scaled else 1
    while len(waves) < want:
        wf = acquire_output(ctx, timeout_s=opts.timeout_s, meanwhile=meanwhile)
        if wf.clipped_samples > 0:
            if rescales >= opts.max_rescales:
                raise MeasurementError(
                    f"output at rail {rail_set_v:g} V still clipped ({wf.clipped_samples} samples)"
                    f" after {rescales} re-autoscales")
            rescales += 1
            dropped.extend(waves)
            dropped.append(wf)
            waves.clear()
            scaled = _autoscale(scope, ch, opts, memory)
            want = opts.records if scaled else 1
            continue
        waves.append(wf)

    def finish() -> dict[str, Any]:
        row = analyse_records(waves, opts, detection=dets.get(id(waves[0])),
                              estimates=[done.get(id(w)) for w in waves])
        if not scaled:
            row["osc_evidence"] = "autoscale found no periodic signal; " + row["osc_evidence"]
        row.update(rail_set_v=float(rail_set_v), rescales=rescales, **readings)
        return row

    return finish


def _record_estimates(wf: Any, opts: MeasureOptions) -> tuple[float, ...]:
    """(vpp, u_vpp, freq, u_freq, offset, thd_db or NaN) of one oscillating record."""
    y = np.asarray(wf.volts, dtype=float)
    amp = analysis.measure_amplitude(y, fs_hz=_fs(wf), clipped_samples=wf.clipped_samples,
                                     method=opts.vpp_method)
    try:
        thd = analysis.harmonics(y, fs_hz=_fs(wf), freq_hz=amp.freq_hz).thd_db
    except MeasurementError:
        thd = math.nan
    return (amp.vpp_v, amp.u_vpp_v, amp.freq_hz, amp.u_freq_hz, amp.offset_v, thd)


def analyse_records(waves: list[Any], opts: MeasureOptions, *, detection: Any = None,
                    estimates: list[tuple[float, ...] | None] | None = None) -> dict[str, Any]:
    """Estimates from K unclipped records (pure; the part of :func:`measure_output` after I/O).

    ``detection`` is the detector's result for ``waves[0]`` when the caller already has
    it; ``estimates[i]`` those of record i already made (see :func:`_record_estimates`).
    """
    first = waves[0]
    fs = _fs(first)
    det = detection
    if det is None:
        det = _detect(np.asarray(first.volts, dtype=float), fs, opts.band_hz)
    row: dict[str, Any] = {
        "oscillating": bool(det.oscillating),
        "osc_snr_db": finite_or_none(det.snr_db),
        "osc_evidence": str(det.reason),
        "records": len(waves),
        "vpp_method": opts.vpp_method,
        "vpp_v": None, "u_vpp_v": None, "freq_hz": None, "u_freq_hz": None, "thd_db": None,
        "offset_v": None,
    }
    if not det.oscillating:
        # No carrier: report the robust spread of what is there (noise), no frequency.
        est = analysis.vpp_robust(np.asarray(first.volts, dtype=float))
        row.update(vpp_v=finite_or_none(est.value), u_vpp_v=finite_or_none(est.u),
                   vpp_method="robust")
        return row
    known = list(estimates) if estimates is not None else [None] * len(waves)
    each = [e if e is not None else _record_estimates(wf, opts)
            for wf, e in zip(waves, known, strict=True)]
    vpp, uvpp, freq, ufreq, offs, thds = (list(col) for col in zip(*each, strict=True))
    thd = [t for t in thds if not math.isnan(t)]
    row.update(
        vpp_v=float(np.mean(vpp)), u_vpp_v=_u_mean(vpp, uvpp),
        freq_hz=float(np.mean(freq)), u_freq_hz=_u_mean(freq, ufreq),
        thd_db=finite_or_none(np.mean(thd)) if thd else None,
        offset_v=float(np.mean(offs)),
    )
    return row


def _u_mean(values: list[float], u_each: list[float]) -> float:
    """Standard uncertainty of a mean of K estimates.

    The larger of the scatter-based standard error (Type A, GUM 4.2.3) and the estimators'
    own uncertainty divided by sqrt(K) -- with K = 2 the scatter alone is a poor estimate.
    """
    k = len(values)
    own = math.sqrt(sum(u * u for u in u_each)) / k
    if k < 2:
        return float(own)
    scatter = float(np.std(values, ddof=1)) / math.sqrt(k)
    return float(max(own, scatter))


# --------------------------------------------------------------------------------------
# decisions for threshold searches


def vote_from(detection: Any, *, clear_margin_db: float, min_snr_db: float = 10.0,
              min_prominence_db: float = 20.0) -> Vote:
    """Turn a detector result into a :class:`Vote`.

    The detector says "oscillating" when its SNR and its spectral-peak prominence both
    pass their thresholds (``min_snr_db``, ``min_prominence_db``: the detector's defaults),
    so the signed score is the smaller of the two margins, dB. The vote is clear when that
    score is at least ``clear_margin_db`` from zero and agrees with the verdict.
    """
    snr = finite_or_none(getattr(detection, "snr_db", None))
    prom = finite_or_none(getattr(detection, "prominence_db", None))
    osc = bool(detection.oscillating)
    if snr is None and prom is None:
        # a flat record or no fittable sine: plainly not oscillating
        return Vote(osc, not osc, -clear_margin_db if not osc else 0.0)
    margins = [m for m in ((snr - min_snr_db) if snr is not None else None,
                           (prom - min_prominence_db) if prom is not None else None)
               if m is not None]
    score = float(min(margins))
    clear = abs(score) >= clear_margin_db and (score > 0) == osc
    return Vote(osc, clear, score)


def dwell(ctx: Any, seconds: float, *, timeout_s: float = 5.0, points: int = 2000) -> None:
    """Wait ``seconds`` by watching the output: one free-running record that long.

    Waiting through an acquisition rather than a sleep keeps the wait on the bench's own
    time base (an accelerated simulated bench models the elapsed time; a real one simply
    takes that long). The record is not used; the caller re-applies its own set-up.
    """
    if seconds <= 0:
        return
    scope = ctx.bench.scope
    scope.set_trigger(source="free")
    scope.set_timebase(window_s=seconds, sample_rate_hz=points / seconds)
    scope.acquire(timeout_s=timeout_s + seconds)


def probe_oscillation(ctx: Any, setup: ScopeSetup, *, band_hz: tuple[float, float] | None,
                      timeout_s: float = 5.0, min_snr_db: float = 10.0,
                      min_prominence_db: float = 20.0) -> tuple[Any, Any]:
    """One acquisition with a fixed set-up; returns ``(detection, waveform)``.

    ``min_snr_db`` / ``min_prominence_db`` are handed to the detector: the SNR is a ratio
    of total powers and does not grow with the record, while the peak prominence gains
    10 log10(N/2) dB of processing gain -- so a low SNR threshold with the prominence test
    sees fainter oscillations in the same record.
    """
    ch = ctx.bench.wiring.output_channel
    setup.apply(ctx.bench.scope, ch)
    wf = acquire_output(ctx, timeout_s=timeout_s)
    det = _detect(np.asarray(wf.volts, dtype=float), _fs(wf), band_hz, min_snr_db=min_snr_db,
                  min_prominence_db=min_prominence_db)
    return det, wf


def setup_from_reading(row: Mapping[str, Any], *, cycles: float, samples_per_cycle: float,
                       headroom: float = 1.4) -> ScopeSetup:
    """A fixed scope set-up for a board running at the amplitude and frequency of ``row``.

    Full screen (8 div) spans ``headroom`` x the measured Vpp, so smaller amplitudes near a
    threshold are never clipped; the window holds ``cycles`` carrier cycles at
    ``samples_per_cycle`` samples per cycle.
    """
    vpp = finite_or_none(row.get("vpp_v"))
    freq = finite_or_none(row.get("freq_hz"))
    if not row.get("oscillating") or vpp is None or freq is None or vpp <= 0 or freq <= 0:
        raise MeasurementError("no oscillation at the running rail to set the scope up from")
    offset = finite_or_none(row.get("offset_v")) or 0.0
    return ScopeSetup(scale_v_div=headroom * vpp / 8.0, offset_v=offset,
                      window_s=cycles / freq, sample_rate_hz=samples_per_cycle * freq)


def setup_as_row(setup: ScopeSetup) -> dict[str, Any]:
    return {f"scope_{k}": v for k, v in asdict(setup).items()}


def setup_from_row(row: Mapping[str, Any]) -> ScopeSetup:
    return ScopeSetup(**{k: row[f"scope_{k}"] for k in ScopeSetup.__dataclass_fields__})


SETUP_COLUMNS: tuple[Column, ...] = (
    Column("scope_scale_v_div", "V/div", "fixed vertical scale used by the decisions"),
    Column("scope_offset_v", "V", "fixed vertical offset"),
    Column("scope_window_s", "s", "record window"),
    Column("scope_sample_rate_hz", "Hz", "sample rate"),
    Column("scope_coupling", "", "coupling"),
)
