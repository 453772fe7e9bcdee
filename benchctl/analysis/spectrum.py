"""Harmonic analysis (THD, SNR, SINAD, ENOB by IEEE Std 1241) and the oscillation detector.

References
----------
.. [1] IEEE Std 1241-2010, "IEEE Standard for Terminology and Test Methods for
       Analog-to-Digital Converters", 9.1 (THD), 9.2 (SINAD, ENOB), 9.3 (SNR); harmonics
       estimated by a least-squares fit at the (aliased) harmonic frequencies.
.. [2] IEEE Std 1057-2017, clause 8 (sine fits).
.. [3] F. J. Harris, "On the use of windows for harmonic analysis with the discrete Fourier
       transform", Proc. IEEE 66(1), 1978 (Hann window, equivalent noise bandwidth 1.5 bins).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.analysis._common import as_record, check_positive, db10, db20
from benchctl.analysis.waveform import _cos_sin, _dirichlet, _dot, _fit_from, _hann, fit_sine
from benchctl.errors import MeasurementError

__all__ = ["Detection", "HarmonicAnalysis", "detect_oscillation", "harmonics"]


@dataclass(frozen=True, slots=True)
class HarmonicAnalysis:
    """Harmonic content of a record by IEEE Std 1241 definitions.

    Attributes
    ----------
    fundamental_hz : float
        Fundamental frequency, Hz.
    harmonic_v : tuple of float
        Peak amplitude of harmonics 1..n, V (index 0 is the fundamental); NaN where the
        harmonic aliases onto DC, Nyquist or a lower harmonic and cannot be separated.
    harmonic_hz : tuple of float
        Frequency at which each harmonic appears in the record after aliasing, Hz.
    u_harmonic_v : float
        Standard uncertainty of each harmonic amplitude, V (same for all).
    thd_ratio : float
        RMS of harmonics 2..n over RMS of the fundamental (a ratio, not %).
    u_thd_ratio : float
        Standard uncertainty of ``thd_ratio``.
    thd_db : float
        20 log10(thd_ratio), dB.
    snr_db : float
        Fundamental power over noise power with harmonics 2..n removed, dB.
    sinad_db : float
        Fundamental RMS over RMS of noise and distortion (sine-fit residual), dB.
    enob : float
        Effective number of bits: log2(FSR / (sqrt(12) NAD)) when ``full_scale_v`` is
        given (IEEE 1241), else (SINAD - 1.76 dB) / 6.02 dB (assumes a full-scale input).
    u_snr_db, u_sinad_db, u_enob : float
        Standard uncertainties of the three figures above: the fundamental's amplitude
        uncertainty combined with the chi-square spread of an RMS over ``dof`` Gaussian
        residual samples, relative 1 / sqrt(2 dof).
    nad_rms_v : float
        RMS of noise and distortion, V.
    noise_rms_v : float
        RMS of the residual with all n harmonics removed, V.
    n_samples : int
        Record length.
    method : str
        How the harmonics were estimated.
    """

    fundamental_hz: float
    harmonic_v: tuple[float, ...]
    harmonic_hz: tuple[float, ...]
    u_harmonic_v: float
    thd_ratio: float
    u_thd_ratio: float
    thd_db: float
    snr_db: float
    sinad_db: float
    enob: float
    nad_rms_v: float
    noise_rms_v: float
    n_samples: int
    method: str
    u_snr_db: float = math.nan
    u_sinad_db: float = math.nan
    u_enob: float = math.nan


@dataclass(frozen=True, slots=True)
class Detection:
    """Whether a record holds an oscillation, with the evidence for the verdict.

    Attributes
    ----------
    oscillating : bool
        The verdict: every test below passed.
    snr_db : float
        Power of the examined line over the noise floor, dB: noise variance from the
        median of the Hann periodogram (unmoved by harmonics and spurs).
    prominence_db : float
        Spectral peak over the median of the spectrum (the noise floor), dB.
    freq_hz : float
        Frequency of the strongest line, Hz (NaN for a flat record).
    vpp_v : float
        Peak-to-peak of the fitted fundamental, V.
    in_band : bool
        ``freq_hz`` lies inside the expected band (True when no band is given). With a
        band, the strongest line inside it is the one examined; the reason names a
        stronger line outside it.
    reason : str
        One line saying why the verdict was reached.
    """

    oscillating: bool
    snr_db: float
    prominence_db: float
    freq_hz: float
    vpp_v: float
    in_band: bool
    reason: str


def _aliased_hz(freq_hz: float, fs_hz: float) -> float:
    """Frequency at which a tone of ``freq_hz`` appears when sampled at ``fs_hz``."""
    f = math.fmod(freq_hz, fs_hz)
    return fs_hz - f if f > 0.5 * fs_hz else f


def _gram(w_rad: list[float], n: int) -> NDArray[np.float64]:
    """B^T B of the centred basis [1, cos w_1 t, sin w_1 t, ...] in closed form.

    With t centred, every sum of an odd function vanishes and the rest are Dirichlet
    kernels: sum cos(a t) cos(b t) = (D(a - b) + D(a + b)) / 2, sum sin sin = (D(a - b) -
    D(a + b)) / 2, sum cos = D(a).
    """
    m = 1 + 2 * len(w_rad)
    h = np.zeros((m, m))
    h[0, 0] = float(n)
    for i, wi in enumerate(w_rad):
        h[0, 1 + 2 * i] = h[1 + 2 * i, 0] = _dirichlet(wi, n)
        for j, wj in enumerate(w_rad[: i + 1]):
            dm = _dirichlet(wi - wj, n)
            dp = _dirichlet(wi + wj, n)
            h[1 + 2 * i, 1 + 2 * j] = h[1 + 2 * j, 1 + 2 * i] = 0.5 * (dm + dp)
            h[2 + 2 * i, 2 + 2 * j] = h[2 + 2 * j, 2 + 2 * i] = 0.5 * (dm - dp)
    return h


def _lines_basis(freqs_cycles: list[float], n: int) -> NDArray[np.float64]:
    """The basis rows [1, cos, sin, ...] at the given frequencies (centred time)."""
    basis = np.empty((1 + 2 * len(freqs_cycles), n))
    basis[0] = 1.0
    for j, f in enumerate(freqs_cycles):
        basis[1 + 2 * j], basis[2 + 2 * j] = _cos_sin(2.0 * math.pi * f, n)
    return basis


def _project(basis: NDArray[np.float64], v: NDArray[np.float64]) -> NDArray[np.float64]:
    """B^T v in numpy's own loop (no BLAS threads; see waveform._dot)."""
    return np.einsum("ij,j->i", basis, v)


def _lines_lsq(
    y: NDArray[np.float64], freqs_cycles: list[float]
) -> tuple[NDArray[np.float64], NDArray[np.float64], float]:
    """Least-squares fit of DC plus one sine per frequency (cycles/sample), centred time.

    Returns the coefficients [dc, c1, s1, c2, s2, ...] (line k = c cos + s sin), the
    residual, and the unscaled variance factor (average diagonal of (B^T B)^-1 for the
    cos/sin columns).
    """
    n = y.size
    basis = _lines_basis(freqs_cycles, n)
    h = _gram([2.0 * math.pi * f for f in freqs_cycles], n)
    try:
        coef = np.linalg.solve(h, _project(basis, y))
    except np.linalg.LinAlgError as exc:
        raise MeasurementError("spectral lines too close to separate in this record") from exc
    resid = y - np.einsum("i,ij->j", coef, basis)
    var_factor = float(np.mean(np.diag(np.linalg.inv(h))[1:]))
    return coef, resid, var_factor


def _harmonic_lsq(
    y: NDArray[np.float64], freqs_cycles: list[float]
) -> tuple[NDArray[np.float64], NDArray[np.float64], float]:
    """:func:`_lines_lsq` with per-frequency peak amplitudes instead of coefficients."""
    coef, resid, var_factor = _lines_lsq(y, freqs_cycles)
    return np.hypot(coef[1::2], coef[2::2]), resid, var_factor


def _plan(
    f1_cycles: float, n_harm: int, n_rec: int
) -> tuple[list[float], list[float], list[int], list[float]]:
    """Aliased frequencies (cycles/sample) of harmonics 1..n that can be separated.

    Returns the fitted frequencies, every harmonic's aliased frequency, the harmonic
    numbers fitted, and d(aliased)/d(f1) for each fitted one (+k, or -k when folded).
    """
    min_sep = 1.0 / n_rec  # one DFT bin
    freqs: list[float] = []
    shown: list[float] = []
    index: list[int] = []
    slope: list[float] = []
    for k in range(1, n_harm + 1):
        raw = math.fmod(k * f1_cycles, 1.0)
        fa = 1.0 - raw if raw > 0.5 else raw
        shown.append(fa)
        if k > 1 and (
            fa < min_sep or 0.5 - fa < min_sep or any(abs(fa - g) < min_sep for g in freqs)
        ):
            continue
        freqs.append(fa)
        index.append(k)
        slope.append(-float(k) if raw > 0.5 else float(k))
    return freqs, shown, index, slope


def _refine_fundamental(y: NDArray[np.float64], f1_cycles: float, n_harm: int) -> float:
    """Gauss-Newton refinement of the fundamental shared by all harmonics (cycles/sample).

    Variable projection: at each frequency the DC, cosine and sine coefficients are
    solved exactly; the frequency step comes from the linearised multi-harmonic model.
    """
    n = y.size
    t = np.arange(n, dtype=np.float64)
    t -= 0.5 * (n - 1)
    yy = _dot(y, y)
    f = f1_cycles
    sse_old = math.inf
    for _ in range(10):  # bounded: converges in 2-4 steps from the 4-parameter start
        freqs, _, _, slope = _plan(f, n_harm, n)
        basis = _lines_basis(freqs, n)
        h = _gram([2.0 * math.pi * fk for fk in freqs], n)
        g = _project(basis, y)
        coef = np.linalg.solve(h, g)
        sse = max(yy - float(coef @ g), 0.0)  # projection identity
        if sse > sse_old + 1e-13 * yy:
            break
        sse_old = sse
        # d model / d f1 = 2 pi t sum_k dfk/df1 (b_k cos - a_k sin)
        v = np.zeros(basis.shape[0])
        for j, dk in enumerate(slope):
            v[1 + 2 * j] = dk * coef[2 + 2 * j]
            v[2 + 2 * j] = -dk * coef[1 + 2 * j]
        d = np.einsum("i,ij->j", v, basis)
        d *= t
        d *= 2.0 * math.pi
        bd = _project(basis, d)
        # variable projection Gauss-Newton step: d projected off the linear columns;
        # the residual is orthogonal to them, so d_perp . r = d . r
        dd = _dot(d, d) - float(bd @ np.linalg.solve(h, bd))
        if dd <= 0.0:
            break
        dr = _dot(d, y) - float(coef @ bd)
        step = dr / dd
        u_f = math.sqrt(sse / max(n - basis.shape[0] - 1, 1) / dd)
        f += step
        if abs(step) <= 1e-4 * u_f or abs(step) * n <= 1e-12:
            break
    return f


def harmonics(
    y: ArrayLike,
    *,
    fs_hz: float,
    freq_hz: float | None = None,
    n: int = 10,
    full_scale_v: float | None = None,
) -> HarmonicAnalysis:
    """Harmonics, THD, SNR, SINAD and ENOB of a record (IEEE Std 1241 definitions).

    Parameters
    ----------
    y : array_like
        Record, V.
    fs_hz : float
        Sample rate, Hz.
    freq_hz : float, optional
        Fundamental frequency, Hz; estimated by a four-parameter sine fit when omitted
        (then refined: the harmonics are fitted at exact multiples of the fitted value).
    n : int
        Highest harmonic included (n >= 2). Harmonics above Nyquist are fitted at their
        aliased frequencies, as IEEE 1241 prescribes.
    full_scale_v : float, optional
        Full-scale range of the digitiser, V, for the IEEE 1241 ENOB.

    Returns
    -------
    HarmonicAnalysis

    Notes
    -----
    The fundamental and every harmonic are fitted together by linear least squares at
    known frequencies, so non-coherent records (fractional cycle counts) need no window.

    References
    ----------
    .. [1] IEEE Std 1241-2010, 9.1-9.3.
    """
    fs = check_positive("fs_hz", fs_hz)
    if int(n) < 2:
        raise ValueError(f"n={n!r} must be >= 2")
    arr = as_record(y, min_samples=16)
    return _analyse(arr, fs, freq_hz=freq_hz, start_cycles=None, n=int(n),
                    full_scale_v=full_scale_v)


def _analyse(
    arr: NDArray[np.float64],
    fs: float,
    *,
    freq_hz: float | None,
    start_cycles: float | None,
    n: int,
    full_scale_v: float | None,
) -> HarmonicAnalysis:
    """:func:`harmonics` on a checked record, optionally from a given spectral start."""
    if freq_hz is None and start_cycles is not None:
        if np.ptp(arr) == 0.0:
            raise MeasurementError("record is flat: no sine")
        fit = _fit_from(arr, fs, 2.0 * math.pi * start_cycles, fit_freq=True)
    else:
        fit = fit_sine(arr, fs_hz=fs, freq_hz=freq_hz)
    f1 = fit.freq_hz
    n_rec = arr.size
    if freq_hz is None:
        # the four-parameter fit ignores the harmonics, which pull its frequency; refit the
        # fundamental with all harmonics sharing it
        f1 = _refine_fundamental(arr, f1 / fs, int(n)) * fs
    freqs, shown_hz, index, _ = _plan(f1 / fs, int(n), n_rec)
    shown_hz = [f * fs for f in shown_hz]
    amps, resid, var_factor = _harmonic_lsq(arr, freqs)
    harmonic_v = [math.nan] * int(n)
    for k, a in zip(index, amps, strict=True):
        harmonic_v[k - 1] = float(a)
    a1 = float(amps[0])
    dof = max(n_rec - 1 - 2 * len(freqs), 1)
    sigma2 = float(resid @ resid) / dof
    u_h = math.sqrt(sigma2 * var_factor)  # per cos/sin coefficient ~ per amplitude
    harm = np.array([harmonic_v[k - 1] for k in index[1:]])
    s = float(np.sqrt(np.sum(harm**2))) if harm.size else 0.0
    thd = s / a1 if a1 > 0 else math.inf
    # propagation: d thd / d h_k = h_k / (S A1); d thd / d A1 = -thd / A1; the floor is the
    # spread of a THD made of noise alone (all harmonics zero)
    u_prop = math.hypot(u_h / a1, thd * u_h / a1) if a1 > 0 else math.inf
    u_floor = u_h * math.sqrt(max(harm.size, 1)) / a1 if a1 > 0 else math.inf
    u_thd = max(u_prop, u_floor) if thd < 3 * u_floor else u_prop
    nad_rms = fit.residual_rms_v
    noise_rms = math.sqrt(float(resid @ resid) / n_rec)
    signal_rms = a1 / math.sqrt(2.0)
    sinad = db20(signal_rms / nad_rms) if nad_rms > 0 else math.inf
    snr = db20(signal_rms / noise_rms) if noise_rms > 0 else math.inf
    if full_scale_v is not None:
        fsr = check_positive("full_scale_v", full_scale_v)
        enob = math.log2(fsr / (math.sqrt(12.0) * nad_rms)) if nad_rms > 0 else math.inf
    else:
        enob = (sinad - 1.76) / 6.02
    db_per_rel = 20.0 / math.log(10.0)
    rel_rms = 1.0 / math.sqrt(2.0 * dof)
    rel_a1 = u_h / a1 if a1 > 0 else math.inf
    u_snr = db_per_rel * math.hypot(rel_a1, rel_rms)
    u_sinad = u_snr
    u_enob = rel_rms / math.log(2.0) if full_scale_v is not None else u_sinad / 6.02
    return HarmonicAnalysis(
        fundamental_hz=f1,
        harmonic_v=tuple(harmonic_v),
        harmonic_hz=tuple(shown_hz),
        u_harmonic_v=u_h,
        thd_ratio=thd,
        u_thd_ratio=u_thd,
        thd_db=db20(thd),
        snr_db=snr,
        sinad_db=sinad,
        enob=enob,
        nad_rms_v=nad_rms,
        noise_rms_v=noise_rms,
        n_samples=n_rec,
        method=f"ieee1241 least-squares harmonic fit, {fit.method} fundamental",
        u_snr_db=u_snr,
        u_sinad_db=u_sinad,
        u_enob=u_enob,
    )


@dataclass(frozen=True, slots=True)
class _Periodogram:
    """Hann periodogram of a record: the complex spectrum, its powers and the noise floor."""

    spec: NDArray[np.complex128]
    power: NDArray[np.float64]
    floor: float
    noise_var: float


def _periodogram(y: NDArray[np.float64]) -> _Periodogram:
    """Hann-window periodogram; ``noise_var`` is the white-noise variance implied by the
    median bin, V^2 (see :func:`_prominence_db`)."""
    win = _hann(y.size)
    spec = np.fft.rfft((y - y.mean()) * win)
    p = spec.real**2 + spec.imag**2
    p[0] = 0.0
    floor = float(np.median(p[1:]))
    return _Periodogram(spec, p, floor, floor / math.log(2.0) / _dot(win, win))


def _peak_bin(pg: _Periodogram, n: int, band_cycles: tuple[float, float] | None) -> int | None:
    """Index of the strongest bin (inside the band); None when the band holds no line."""
    p = pg.power
    if band_cycles is None:
        return 1 + int(np.argmax(p[1:]))
    lo_k = max(1, int(math.floor(band_cycles[0] * n)))
    hi_k = min(p.size - 1, int(math.ceil(band_cycles[1] * n)))
    if hi_k < lo_k:
        return None
    k = lo_k + int(np.argmax(p[lo_k : hi_k + 1]))
    if (k > 1 and p[k - 1] > p[k]) or (k + 1 < p.size and p[k + 1] > p[k]):
        return -k  # the band's largest bin is the skirt of a line outside it
    return k


def _line_cycles(pg: _Periodogram, k: int, n: int) -> float:
    """Frequency of the line at bin ``k``, cycles/sample.

    Two-bin magnitude ratio of the Hann window: a tone at bin k + d (0 <= d <= 1) gives
    |X[k+1]| / |X[k]| = (1 + d) / (2 - d), so d = (2r - 1) / (r + 1) (Grandke, IEEE Trans.
    Instrum. Meas. 32(2), 1983; exact for one tone without leakage, from memory). Near DC
    or Nyquist, or for a flat peak, the log-parabola of the three bins is used instead.
    """
    p = pg.power
    if not 2 <= k < p.size - 2 or p[k] <= 0.0:
        frac = 0.0
        if 1 <= k < p.size - 1 and p[k] > 0.0:
            la, lb, lc = np.log(np.maximum(p[k - 1 : k + 2], np.finfo(float).tiny))
            den = la - 2.0 * lb + lc
            frac = float(np.clip(0.5 * (la - lc) / den, -0.5, 0.5)) if den < 0.0 else 0.0
        return (k + frac) / n
    mag = np.sqrt(p[k - 1 : k + 2])
    side = 1 if mag[2] >= mag[0] else -1
    r = float(mag[1 + side] / mag[1])
    d = float(np.clip((2.0 * r - 1.0) / (r + 1.0), 0.0, 1.0))
    return (k + side * d) / n


def _prominence_db(
    y: NDArray[np.float64], band_cycles: tuple[float, float] | None = None,
    pg: _Periodogram | None = None,
) -> tuple[float, float, float]:
    """Strongest line of the Hann periodogram (inside a band, if given).

    Returns (its height over the median of the whole periodogram in dB, its frequency in
    cycles/sample, the white-noise variance implied by the median, V^2). A white-noise bin
    is exponentially distributed with mean sigma^2 sum(w^2), so median / ln 2 / sum(w^2)
    estimates sigma^2 unmoved by a few lines (harmonics, spurs).
    """
    n = y.size
    pg = _periodogram(y) if pg is None else pg
    k = _peak_bin(pg, n, band_cycles)
    if k is None:
        assert band_cycles is not None
        return 0.0, 0.5 * (band_cycles[0] + band_cycles[1]), pg.noise_var
    if k < 0:
        return -math.inf, -k / n, pg.noise_var
    f = _line_cycles(pg, k, n)
    peak = float(pg.power[k])
    if pg.floor <= 0.0:
        return (math.inf if peak > 0 else 0.0), f, pg.noise_var
    return db10(peak / pg.floor), f, pg.noise_var


def detect_oscillation(
    y: ArrayLike,
    *,
    fs_hz: float,
    band_hz: tuple[float, float] | None = None,
    min_snr_db: float = 0.0,
    min_prominence_db: float = 20.0,
    min_vpp_v: float = 0.0,
) -> Detection:
    """Decide whether a record holds an oscillation, and return the evidence.

    The strongest line of a Hann-window periodogram (the strongest inside ``band_hz``
    when a band is given) is located by the two-bin ratio of the Hann window and its
    amplitude taken by the IEEE 1057 three-parameter fit at that frequency -- one FFT and
    one linear fit, no iterations (the full IEEE 1241 harmonic fit is :func:`harmonics`,
    for THD) -- then three tests must all pass: its power stands above the noise floor (>= ``min_snr_db``; noise
    variance from the periodogram median, so harmonics and spurs do not count as noise);
    its periodogram bin stands above the median bin (>= ``min_prominence_db``); its
    frequency lies inside ``band_hz``. Optionally the fitted Vpp must reach ``min_vpp_v``.

    Parameters
    ----------
    y : array_like
        Record, V.
    fs_hz : float
        Sample rate, Hz.
    band_hz : (float, float), optional
        Expected frequency band (lo, hi), Hz, inclusive.
    min_snr_db, min_prominence_db : float
        Thresholds, dB. The defaults sit well above what white noise alone gives: the
        largest of N/2 periodogram bins of noise is about ln(N/2)/ln 2 times the median
        (10 dB at N = 2048), and a line fitted to noise alone carries about 2 ln(N/2) / N of
        the noise power (-21 dB at N = 2048, -7 dB at N = 64). The margins are common
        practice, no published source.
    min_vpp_v : float
        Smallest fitted peak-to-peak accepted, V.

    Returns
    -------
    Detection
    """
    fs = check_positive("fs_hz", fs_hz)
    arr = as_record(y, min_samples=16)
    if band_hz is not None:
        lo, hi = (float(v) for v in band_hz)
        if not 0.0 <= lo < hi:
            raise ValueError(f"band_hz={band_hz!r} must be (lo, hi) with 0 <= lo < hi")
    if np.ptp(arr) == 0.0:
        return Detection(False, -math.inf, 0.0, math.nan, 0.0, band_hz is None,
                         f"record is flat at {arr[0]:.4g} V: no signal")
    band_cycles = None if band_hz is None else (lo / fs, hi / fs)
    pg = _periodogram(arr)
    prominence, f_peak, noise_var = _prominence_db(arr, band_cycles, pg)
    if prominence == -math.inf:
        prom_all, f_all, _ = _prominence_db(arr, None, pg)
        return Detection(False, -math.inf, prom_all, f_all * fs, 0.0, False,
                         f"not oscillating: no spectral line inside the band {lo:g}..{hi:g} Hz; "
                         f"the strongest line is at {f_all * fs:.6g} Hz")
    try:
        # the strongest line inside the band, its amplitude by the three-parameter fit
        # (IEEE 1057, 8.1) at the spectral frequency: an out-of-band spur (mains pick-up,
        # a clock) must not hide an in-band oscillation
        fit = _fit_from(arr, fs, 2.0 * math.pi * f_peak, fit_freq=False)
    except MeasurementError as exc:
        return Detection(False, -math.inf, prominence, f_peak * fs, 0.0, False,
                         f"no sine could be fitted: {exc.reason}")
    freq = f_peak * fs
    vpp = fit.vpp_v
    # amplitude against the noise floor: the line's power over the median-implied noise
    # variance (robust to harmonics and spurs); the fit's residual SNR when the
    # periodogram median is zero (a record of a few ADC codes)
    if noise_var > 0.0:
        snr = db10(0.5 * fit.amplitude_v**2 / noise_var)
    elif fit.residual_rms_v > 0.0:
        snr = db20(fit.amplitude_v / math.sqrt(2.0) / fit.residual_rms_v)
    else:
        snr = math.inf
    in_band = True if band_hz is None else (lo <= freq <= hi)
    failures = []
    if snr < min_snr_db:
        failures.append(f"SNR {snr:.1f} dB < {min_snr_db:g} dB")
    if prominence < min_prominence_db:
        failures.append(f"peak prominence {prominence:.1f} dB < {min_prominence_db:g} dB")
    if not in_band:
        failures.append(f"frequency {freq:.6g} Hz outside band {lo:g}..{hi:g} Hz")
    if vpp < min_vpp_v:
        failures.append(f"Vpp {vpp:.4g} V < {min_vpp_v:g} V")
    if band_cycles is not None:
        prom_all, f_all, _ = _prominence_db(arr, None, pg)
        if prom_all > prominence + 3.0 and not lo <= f_all * fs <= hi:
            # a stronger line outside the band: is the in-band line one of its harmonics?
            k = round(freq / (f_all * fs)) if f_all > 0 else 0
            if 2 <= k <= 10 and abs(freq - k * f_all * fs) <= 2.0 * fs / arr.size:
                failures.append(
                    f"the in-band line is harmonic {k} of the stronger {f_all * fs:.6g} Hz "
                    f"line outside the band {lo:g}..{hi:g} Hz"
                )
            elif failures:
                failures.append(
                    f"the strongest line, {f_all * fs:.6g} Hz ({prom_all:.0f} dB), lies "
                    f"outside the band {lo:g}..{hi:g} Hz"
                )
    if failures:
        reason = "not oscillating: " + "; ".join(failures)
    else:
        reason = (
            f"oscillating at {freq:.6g} Hz, {vpp:.4g} Vpp, SNR {snr:.1f} dB, "
            f"prominence {prominence:.1f} dB"
        )
    return Detection(
        oscillating=not failures,
        snr_db=snr,
        prominence_db=prominence,
        freq_hz=freq,
        vpp_v=vpp,
        in_band=in_band,
        reason=reason,
    )
