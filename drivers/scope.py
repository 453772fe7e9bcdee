"""Oscilloscope driver: channel set-up, timebase, trigger, acquisition, waveform fetch,
clip detection and benchctl's autoscale routine.

Waveform transfer uses the binary block path by default (IEEE 488.2 definite-length
block of ADC codes, read by :meth:`~.transport.Transport.read_block`), and ASCII as the
fallback when the dialect has no block fetch.

References
----------
IEEE 488.2-1992, 8.7.9 (definite length arbitrary block response data).
IEEE 1057-2017, 4.2 (record, sample interval) and 4.6 (sine-fit frequency estimate, from
memory) - the autoscale frequency estimate is a simpler interpolated-DFT peak.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from benchctl.errors import ConnectionLost, InstrumentTimeout, MeasurementError, ProtocolError

from .base import Instrument, compound, register_driver

__all__ = ["AutoscaleResult", "Scope", "Waveform"]

#: The scope screen is 8 vertical divisions (common practice, no published source).
DIVISIONS = 8
Coupling = Literal["ac", "dc"]
Slope = Literal["rising", "falling"]
TransferMode = Literal["int8", "int16", "ascii"]
#: Extreme codes of an 8-bit ADC: a sample there is at a screen edge (clipped).
_ADC8_MIN, _ADC8_MAX = -128, 127
#: Samples decoded at a time (cache-sized pieces decode fastest).
_DECODE_PIECE = 65536


@dataclass(frozen=True)
class Waveform:
    """One acquired record of one channel.

    Attributes
    ----------
    volts : numpy.ndarray
        Samples, V (float64).
    dt_s : float
        Sample interval, s.
    t0_s : float
        Time of the first sample relative to the trigger, s.
    clipped_samples : int
        Samples at the screen edges (their value is not the signal's).
    channel : int
        Scope channel.
    """

    volts: np.ndarray
    dt_s: float
    t0_s: float
    clipped_samples: int
    channel: int = 1

    @property
    def time_s(self) -> np.ndarray:
        """Time axis, s: ``t0_s + i * dt_s``."""
        return self.t0_s + self.dt_s * np.arange(self.volts.size)

    @property
    def sample_rate_hz(self) -> float:
        """Sample rate, Hz."""
        return 1.0 / self.dt_s

    @property
    def clipped(self) -> bool:
        """True if any sample sits at a screen edge."""
        return self.clipped_samples > 0

    def __len__(self) -> int:
        return int(self.volts.size)


@dataclass(frozen=True)
class AutoscaleResult:
    """What :meth:`Scope.autoscale` chose and measured.

    Attributes
    ----------
    scale_v_div, offset_v : float
        Vertical scale, V/div, and screen-centre voltage, V.
    window_s, sample_rate_hz : float
        Record window, s, and sample rate, Hz.
    vpp_v, noise_v : float
        Signal peak-to-peak, V, and noise standard deviation estimate, V.
    freq_hz : float
        Frequency estimate, Hz (nan for a signal with no periodic component).
    acquisitions : int
        Records taken.
    """

    scale_v_div: float
    offset_v: float
    window_s: float
    sample_rate_hz: float
    vpp_v: float
    noise_v: float
    freq_hz: float
    acquisitions: int


def noise_sigma(volts: np.ndarray) -> float:
    """Estimate white-noise sigma of an oversampled record, V.

    Uses the median absolute third difference: for white noise of variance s^2 the third
    difference has variance 20 s^2, and a smooth, oversampled signal contributes almost
    nothing to it. MAD / 0.6745 estimates a normal sigma (Hampel's robust scale estimate,
    from memory).
    """
    if volts.size < 8:
        return 0.0
    d3 = np.diff(volts, n=3)
    return float(np.median(np.abs(d3 - np.median(d3))) / 0.6745 / math.sqrt(20.0))


@functools.lru_cache(maxsize=8)
def _hanning(n: int) -> np.ndarray:
    """numpy's Hann window of n points, made once per length (read-only)."""
    w = np.hanning(n)
    w.flags.writeable = False
    return w


def dominant_frequency(volts: np.ndarray, dt_s: float, *, min_peak_ratio: float = 20.0) -> float:
    """Frequency of the strongest spectral line, Hz, by a Hann-windowed DFT with parabolic
    interpolation of the log-magnitude peak (common practice, no published source beyond
    textbook interpolated-DFT estimators).

    Returns nan when there is no line: the peak magnitude must be at least
    ``min_peak_ratio`` times the median magnitude. For white noise alone the largest of M
    bins is about sqrt(ln M) times the RMS magnitude (exponential power distribution),
    i.e. 3-4x the median for records up to ~10^6 samples, so 20x means a real line.
    """
    x = np.asarray(volts, dtype=float)
    n = x.size
    if n < 16:
        return math.nan
    spec = np.abs(np.fft.rfft((x - x.mean()) * _hanning(n)))
    spec[0] = 0.0
    k = int(np.argmax(spec))
    floor = float(np.median(spec[1:]))
    if k < 1 or spec[k] <= 1e-12 * (np.abs(x).max() + 1e-30) * n or spec[k] < min_peak_ratio * floor:
        return math.nan
    if 1 <= k < spec.size - 1 and spec[k - 1] > 0 and spec[k + 1] > 0:
        a, b, c = np.log(spec[k - 1]), np.log(spec[k]), np.log(spec[k + 1])
        denom = a - 2 * b + c
        delta = 0.5 * (a - c) / denom if denom != 0 else 0.0
    else:
        delta = 0.0
    return float((k + delta) / (n * dt_s))


def decode_codes(
    payload: bytes | bytearray | np.ndarray,
    dtype: np.dtype,
    *,
    dy_v: float,
    y0_v: float,
    clip_lo: int,
    clip_hi: int,
    out: np.ndarray | None = None,
) -> tuple[np.ndarray, int]:
    """Turn block codes into volts and count the codes at either screen edge.

    ``volts = code * dy + y0`` with the code as transferred (wire contract, DEVELOPERS.md).
    The work goes in cache-sized pieces, with one byte swap per piece for big-endian data.

    Returns
    -------
    (volts, clipped) : (numpy.ndarray of float64, int)
    """
    codes_all = payload if isinstance(payload, np.ndarray) else np.frombuffer(payload, dtype=dtype)
    volts = np.empty(codes_all.size, dtype=np.float64) if out is None else out
    clipped = 0
    native = dtype.newbyteorder("=")
    for i in range(0, codes_all.size, _DECODE_PIECE):
        codes = codes_all[i : i + _DECODE_PIECE]
        if not dtype.isnative:
            codes = codes.astype(native)
        part = volts[i : i + _DECODE_PIECE]
        np.multiply(codes, dy_v, out=part)
        if y0_v:
            part += y0_v
        if codes.min() <= clip_lo or codes.max() >= clip_hi:
            clipped += int(np.count_nonzero(codes <= clip_lo) + np.count_nonzero(codes >= clip_hi))
    return volts, clipped


@register_driver("scope")
class Scope(Instrument):
    """An oscilloscope driven through a dialect.

    Parameters
    ----------
    transport, dialect
        See :class:`~.base.Instrument`.
    transfer : {"int16", "int8", "ascii"} or None
        Waveform transfer format; None picks the best the dialect has (int16 block, then
        int8 block, then ASCII).
    """

    uses = (
        "set_range", "get_range", "set_offset", "set_coupling", "set_probe", "channel_state",
        "set_window", "set_points", "get_interval", "trigger_free", "trigger_edge",
        "set_trigger_level", "set_trigger_slope", "arm", "abort", "format_int8", "format_int16",
        "format_ascii", "fetch_block", "fetch_ascii", "scaling", "clipped", "measure_ptpeak",
        "measure_rms", "measure_frequency",
    )

    def __init__(self, transport: Any, dialect: Any, *, transfer: TransferMode | None = None, **kwargs: Any) -> None:
        super().__init__(transport, dialect, **kwargs)
        d = self.dialect
        if transfer is None:
            if d.has("fetch_block") and d.has("format_int16"):
                transfer = "int16"
            elif d.has("fetch_block") and d.has("format_int8"):
                transfer = "int8"
            else:
                transfer = "ascii"
        needs = {"int16": ("fetch_block", "format_int16"), "int8": ("fetch_block", "format_int8"), "ascii": ("fetch_ascii",)}
        if transfer not in needs:
            raise ValueError(f"{transfer=} must be one of {tuple(needs)}")
        for op in needs[transfer]:
            self.require(op)
        self.transfer: TransferMode = transfer
        self._format_sent: str | None = None
        # channel -> (range_v, offset_v) as last programmed, for ASCII clip detection
        self._screen: dict[int, tuple[float, float]] = {}
        self._points: int | None = None

    # ------------------------------------------------------------------ set-up
    def setup_channel(
        self,
        channel: int,
        *,
        scale_v_div: float,
        offset_v: float = 0.0,
        coupling: Coupling = "dc",
        probe: float = 1.0,
        enabled: bool = True,
        check: bool = True,
    ) -> None:
        """Set one channel: vertical scale (V/div), centre voltage, coupling, probe factor.

        The full screen spans 8 divisions (``range = 8 * scale_v_div``). With
        ``check=False`` (fast mode) the error queue is left for the next point of
        consequence -- the next arm or acquisition, say -- which then names these commands.
        """
        if not (math.isfinite(scale_v_div) and scale_v_div > 0):
            raise ValueError(f"{scale_v_div=} must be > 0")
        if not math.isfinite(offset_v):
            raise ValueError(f"{offset_v=} must be finite")
        if coupling not in ("ac", "dc"):
            raise ValueError(f"{coupling=} must be 'ac' or 'dc'")
        if not (math.isfinite(probe) and probe > 0):
            raise ValueError(f"{probe=} must be > 0")
        if probe != 1.0 or self.dialect.has("set_probe"):
            self.require("set_probe")
            self.command("set_probe", channel=channel, factor=probe)
        self.command("channel_state", channel=channel, state=enabled)
        self.command("set_coupling", channel=channel, coupling=coupling)
        range_v = DIVISIONS * scale_v_div
        self.command("set_range", channel=channel, range_v=range_v)
        self.command("set_offset", channel=channel, offset_v=offset_v)
        self._screen[channel] = (range_v, offset_v)
        if not self.strict and check:
            self.check_errors()

    def set_timebase(self, *, window_s: float, sample_rate_hz: float,
                     check: bool = True) -> tuple[float, int]:
        """Set the record to ``window_s`` seconds at about ``sample_rate_hz``.

        ``check=False``: as for :meth:`setup_channel`.

        Returns
        -------
        (window_s, points) : (float, int)
            What was programmed (points = round(window * rate), at least 2).
        """
        if not (math.isfinite(window_s) and window_s > 0):
            raise ValueError(f"{window_s=} must be > 0")
        if not (math.isfinite(sample_rate_hz) and sample_rate_hz > 0):
            raise ValueError(f"{sample_rate_hz=} must be > 0")
        points = max(2, int(round(window_s * sample_rate_hz)))
        self.command("set_points", points=points)
        self.command("set_window", window_s=window_s)
        self._points = points
        if not self.strict and check:
            self.check_errors()
        return window_s, points

    def set_trigger(self, *, source: int | Literal["free"] = "free", level_v: float = 0.0, slope: Slope = "rising") -> None:
        """Edge trigger on channel ``source`` at ``level_v`` (V), or ``"free"`` run."""
        if source == "free":
            self.command("trigger_free")
            return
        if not isinstance(source, int) or source < 1:
            raise ValueError(f"{source=} must be a channel number >= 1 or 'free'")
        if slope not in ("rising", "falling"):
            raise ValueError(f"{slope=} must be 'rising' or 'falling'")
        self.command("set_trigger_level", level_v=level_v)
        self.command("set_trigger_slope", slope=slope)
        self.command("trigger_edge", channel=source)

    # ------------------------------------------------------------------ acquisition
    def acquire(self, *, timeout_s: float = 5.0) -> None:
        """Arm one acquisition and wait for it to complete (``*OPC?``), at most ``timeout_s``.

        With compound messages, the arm, the completion query and the error queue's first
        entry travel as one message.
        """
        with self.timeout(timeout_s):
            self.ask_checked("opc", before=self.dialect.op("arm").render())

    def arm(self) -> None:
        """Arm one acquisition without waiting for it (pair with :meth:`wait_complete`).

        The error queue is read in the same message (``INIT;:SYST:ERR?``): errors of the
        set-up commands surface before the acquisition is waited for, and the reply tells
        that the scope has armed while the caller goes on with other work.
        """
        self.command_checked("arm")

    def wait_complete(self, *, timeout_s: float) -> None:
        """Wait (``*OPC?``) until the armed acquisition is complete, at most ``timeout_s``.

        The error queue is read with the completion (one message where the dialect allows).
        """
        with self.timeout(timeout_s):
            self.ask_checked("opc")

    def scaling(self, channel: int) -> dict[str, float]:
        """Return the last record's scaling: points, dt_s, t0_s, dy_v, y0_v."""
        return dict(self.ask("scaling", channel=channel))

    def fetch(self, channel: int, *, transfer: TransferMode | None = None) -> Waveform:
        """Fetch the last record of ``channel`` as volts with its time axis.

        Raises
        ------
        ProtocolError
            The block is malformed or its length disagrees with the record's scaling.
        """
        mode = transfer or self.transfer
        # the format goes first: the scaling reply describes the codes of that format
        if mode == "ascii":
            self.require("fetch_ascii")
            self._set_format("format_ascii")
        else:
            self._set_format("format_int16" if mode == "int16" else "format_int8")
            if self.dialect.compound and not self.strict and self.transport.direct:
                return self._fetch_compound(channel, mode)
        scale = self.scaling(channel)
        points = int(scale["points"])
        dt_s = float(scale["dt_s"])
        if points < 0 or not dt_s > 0:
            raise ProtocolError(f"{self.resource}: scaling reply makes no sense: {scale}")
        if mode != "ascii":
            width = 2 if mode == "int16" else 1
            text = self.dialect.op("fetch_block").render(channel=channel)
            payload = self._explained(lambda: self.transport.read_block(text, expected_bytes=points * width), text)
            return self._waveform(channel, mode, scale, payload)
        volts = np.asarray(self.ask("fetch_ascii", channel=channel), dtype=float)
        if volts.size != points:
            raise ProtocolError(f"{self.resource}: ASCII record has {volts.size} values, scaling says {points}")
        if self.dialect.has("clipped"):
            clipped = int(self.ask("clipped", channel=channel))
        else:
            clipped = self._clip_from_screen(channel, volts)
        return Waveform(volts=volts, dt_s=dt_s, t0_s=float(scale["t0_s"]), clipped_samples=clipped, channel=channel)

    def _fetch_compound(self, channel: int, mode: TransferMode) -> Waveform:
        """Scaling and block in one message: ``TRACe:SCALing? CH1;:TRACe:DATA? CH1``."""
        scaling_op = self.dialect.op("scaling")
        block_text = self.dialect.op("fetch_block").render(channel=channel)
        message = compound(scaling_op.render(channel=channel), block_text)
        width = 2 if mode == "int16" else 1
        scale: dict[str, float] = {}

        def expected(text: str) -> int:
            scale.update(self._parse(scaling_op, text))
            if int(scale["points"]) < 0 or not scale["dt_s"] > 0:
                raise ProtocolError(f"{self.resource}: scaling reply makes no sense: {scale}")
            return int(scale["points"]) * width

        payload = self._explained(lambda: self.transport.read_block(message, prefix=expected), message)
        return self._waveform(channel, mode, scale, payload)

    def wait_and_fetch(self, channel: int, *, timeout_s: float) -> Waveform:
        """:meth:`wait_complete` then :meth:`fetch` of ``channel``, binary transfer.

        With compound messages and the fast socket path (fast mode), one exchange:
        ``*OPC?;:TRACe:SCALing? CH1;:TRACe:DATA? CH1``. The error queue is then left to the
        caller's next check (the runner checks every instrument at each point, before the
        point is recorded): an error text may hold ';' (SCPI-1999 vol. 2, 21.8), so it
        cannot share the reply with a block. Otherwise as the two calls.
        """
        mode = self.transfer
        if mode == "ascii" or not (self.dialect.compound and not self.strict and self.transport.direct):
            self.wait_complete(timeout_s=timeout_s)
            return self.fetch(channel)
        self._set_format("format_int16" if mode == "int16" else "format_int8")
        opc_op, scaling_op = self.dialect.op("opc"), self.dialect.op("scaling")
        scaling_text = scaling_op.render(channel=channel)
        block_text = self.dialect.op("fetch_block").render(channel=channel)
        message = compound(opc_op.render(), scaling_text, block_text)
        width = 2 if mode == "int16" else 1
        scale: dict[str, float] = {}

        def expected(text: str) -> int:
            opc_reply, _, scaling_reply = text.partition(";")
            self._parse(opc_op, opc_reply)
            scale.update(self._parse(scaling_op, scaling_reply))
            if int(scale["points"]) < 0 or not scale["dt_s"] > 0:
                raise ProtocolError(f"{self.resource}: scaling reply makes no sense: {scale}")
            return int(scale["points"]) * width

        self._unchecked.append(message)
        with self.timeout(timeout_s):
            payload = self._explained(
                lambda: self.transport.read_block(message, prefix=expected, prefix_units=2), message)
        return self._waveform(channel, mode, scale, payload)

    def _explained(self, read: Callable[[], bytes | bytearray], message: str) -> bytes | bytearray:
        """Run a block read; if it fails, let the error queue say why when it can."""
        try:
            return read()
        except (InstrumentTimeout, ProtocolError):
            self._unchecked.append(message)
            try:
                self.check_errors()  # raises InstrumentError when the instrument refused
            except (InstrumentTimeout, ConnectionLost, ProtocolError):
                pass
            raise

    def _waveform(self, channel: int, mode: TransferMode, scale: dict[str, float], payload: bytes | bytearray) -> Waveform:
        if mode == "int16":
            dtype = np.dtype(">i2" if self.dialect.int16_big_endian else "<i2")
            lo, hi = _ADC8_MIN * 256, _ADC8_MAX * 256  # INTeger,16 = 8-bit code x 256
        else:
            dtype = np.dtype("i1")
            lo, hi = _ADC8_MIN, _ADC8_MAX
        # clipped samples counted from the codes themselves: no extra query
        volts, clipped = decode_codes(payload, dtype, dy_v=scale["dy_v"], y0_v=scale["y0_v"], clip_lo=lo, clip_hi=hi)
        return Waveform(volts=volts, dt_s=float(scale["dt_s"]), t0_s=float(scale["t0_s"]), clipped_samples=clipped, channel=channel)

    def _set_format(self, op: str) -> None:
        if self._format_sent != op:
            self.require(op)
            self.command(op)
            self._format_sent = op

    def _clip_from_screen(self, channel: int, volts: np.ndarray) -> int:
        screen = self._screen.get(channel)
        if screen is None or volts.size == 0:
            return 0
        range_v, offset_v = screen
        half_v = range_v / 2 * (1 - 1 / 256)  # within one 8-bit code of the edge
        return int(np.count_nonzero(np.abs(volts - offset_v) >= half_v))

    def reset(self) -> None:
        """``*RST`` (forgets the transfer format sent)."""
        super().reset()
        self._format_sent = None
        self._screen.clear()

    # ------------------------------------------------------------------ autoscale
    def autoscale(
        self,
        channel: int,
        *,
        cycles: float = 5.0,
        points: int = 10_000,
        start_scale_v_div: float = 2.0,
        max_scale_v_div: float = 50.0,
        min_scale_v_div: float = 1e-3,
        first_window_s: float = 1e-3,
        target_div: float = 6.0,
        noise_sigmas: float = 4.0,
        coupling: Coupling = "dc",
        probe: float = 1.0,
        max_acquisitions: int = 12,
        timeout_s: float = 5.0,
    ) -> AutoscaleResult:
        """Choose a vertical scale and timebase for ``channel`` from the signal itself.

        1. Acquire free-running with a wide screen; while the record clips, widen the
           screen x4 (at most ``max_scale_v_div``).
        2. Centre the screen on the signal and pick the scale so its peak-to-peak spans
           ``target_div`` of the 8 divisions, plus ``noise_sigmas`` noise sigmas on each
           side (8-bit quantisation is then a small fraction of the signal).
        3. Estimate the frequency (interpolated DFT peak) and set the window to
           ``cycles`` periods at ``points`` samples; re-acquire until nothing clips.
           With fewer than ~1.5 periods in the record the window grows x10 (twice at
           most); a record with no spectral line (a board that is off) keeps its window
           and gives ``freq_hz = nan``. The scale never goes below ``min_scale_v_div``.

        Returns
        -------
        AutoscaleResult

        Raises
        ------
        MeasurementError
            The signal clips even at ``max_scale_v_div``, or it does not settle in
            ``max_acquisitions`` records.
        """
        if not target_div > 0 or target_div >= DIVISIONS:
            raise ValueError(f"{target_div=} must be in (0, {DIVISIONS})")
        if not cycles > 0:
            raise ValueError(f"{cycles=} must be > 0")
        if points < 16:
            raise ValueError(f"{points=} must be >= 16")
        scale = float(start_scale_v_div)
        offset = 0.0
        window_s = float(first_window_s)
        self.set_trigger(source="free")
        freq_hz = math.nan
        n_acq = 0
        stage = "range"
        grows = 0
        while n_acq < max_acquisitions:
            # the arm reads the error queue for these settings too
            self.setup_channel(channel, scale_v_div=scale, offset_v=offset, coupling=coupling,
                               probe=probe, check=False)
            self.set_timebase(window_s=window_s, sample_rate_hz=points / window_s, check=False)
            self.arm()  # the set-up's errors surface here, before the wait
            wf = self.wait_and_fetch(channel, timeout_s=timeout_s + window_s)
            n_acq += 1
            if wf.clipped:
                if stage == "range":
                    if scale >= max_scale_v_div:
                        raise MeasurementError(
                            f"channel {channel} clips even at {scale:g} V/div (limit {max_scale_v_div:g} V/div)"
                        )
                    scale = min(scale * 4.0, max_scale_v_div)
                else:
                    scale *= 1.5
                continue
            lo, hi = float(np.min(wf.volts)), float(np.max(wf.volts))
            vpp = hi - lo
            sigma = noise_sigma(wf.volts)
            # the signal's own noise: take out the quantisation noise q^2/12 of this screen
            # (Widrow's model, from memory), which shrinks with the scale being chosen
            q_v = DIVISIONS * scale / 256
            sigma_signal = math.sqrt(max(sigma**2 - q_v**2 / 12, 0.0))
            offset_new = 0.5 * (hi + lo)
            half_span = 0.5 * vpp + noise_sigmas * sigma_signal
            scale_new = max(half_span / (target_div / 2), min_scale_v_div)
            f_est = dominant_frequency(wf.volts, wf.dt_s)
            if math.isfinite(f_est) and f_est * window_s >= 1.5:
                freq_hz = f_est
                window_new = cycles / freq_hz
            elif grows < 2:  # fewer than ~1.5 periods seen: look at a 10x longer window
                grows += 1
                window_new = window_s * 10.0
            else:  # no periodic component found: keep the window
                window_new = window_s
            settled = (
                stage == "fit"
                and math.isclose(scale_new, scale, rel_tol=0.1)
                and math.isclose(window_new, window_s, rel_tol=0.05)
            )
            if settled:
                return AutoscaleResult(scale, offset, window_s, points / window_s, vpp, sigma_signal, freq_hz, n_acq)
            stage = "fit"
            scale, offset, window_s = scale_new, offset_new, window_new
        raise MeasurementError(f"autoscale of channel {channel} did not settle in {max_acquisitions} records")

    # ------------------------------------------------------------------ built-in measurements
    def measure_ptpeak(self, channel: int) -> float:
        """Scope's own peak-to-peak of the last record, V (if the dialect has it)."""
        return float(self.ask("measure_ptpeak", channel=channel))

    def measure_rms(self, channel: int) -> float:
        """Scope's own RMS of the last record, V (if the dialect has it)."""
        return float(self.ask("measure_rms", channel=channel))

    def measure_frequency(self, channel: int) -> float:
        """Scope's own frequency of the last record, Hz (if the dialect has it)."""
        return float(self.ask("measure_frequency", channel=channel))
