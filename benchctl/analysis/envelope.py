"""Envelope and amplitude modulation: analytic-signal envelope, modulation index, distortion.

For a carrier of amplitude Ac modulated by a tone, ``y = Ac (1 + m cos(2 pi fm t)) cos(2 pi
fc t)``, the envelope swings between Emax = Ac (1 + m) and Emin = Ac (1 - m), so
m = (Emax - Emin) / (Emax + Emin); the spectrum holds the carrier and two sidebands at
fc +/- fm, each of amplitude m Ac / 2.

References
----------
.. [1] S. Haykin, "Communication Systems", 4th ed., Wiley, 2001, section 3.1 (amplitude
       modulation: envelope, modulation index, sidebands of m/2 each).
.. [2] A. V. Oppenheim and R. W. Schafer, "Discrete-Time Signal Processing", 3rd ed., 2010,
       section 12.4 (the discrete Hilbert transform and the analytic signal); the transform
       is the one of scipy.signal.hilbert.
.. [3] IEEE Std 1241-2010, 9.1 (THD), applied here to the recovered envelope.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.signal import hilbert, welch

from benchctl.analysis._common import as_record, check_positive
from benchctl.analysis.spectrum import HarmonicAnalysis, _lines_lsq, harmonics
from benchctl.analysis.waveform import fit_sine
from benchctl.errors import MeasurementError

__all__ = [
    "ModulationIndex",
    "envelope",
    "envelope_distortion",
    "modulation_index_envelope",
    "modulation_index_spectrum",
]


@dataclass(frozen=True, slots=True)
class ModulationIndex:
    """Modulation index of an AM record.

    Attributes
    ----------
    m : float
        Modulation index (ratio; 1 = 100 %).
    u_m : float
        Standard uncertainty of ``m``.
    carrier_v : float
        Carrier peak amplitude, V (mean envelope, or the carrier line).
    emax_v, emin_v : float
        Envelope maximum and minimum, V (from the fitted envelope tone; for the spectral
        method Ac (1 +/- m)).
    mod_hz : float
        Modulating frequency, Hz.
    u_mod_hz : float
        Its standard uncertainty, Hz (0 when it was given).
    sideband_asymmetry_db : float
        Upper over lower sideband, dB (spectral method; 0 for the envelope method).
    method : str
        ``"envelope"`` or ``"spectrum"`` with details.
    """

    m: float
    u_m: float
    carrier_v: float
    emax_v: float
    emin_v: float
    mod_hz: float
    sideband_asymmetry_db: float
    method: str
    u_mod_hz: float = 0.0


def envelope(
    y: ArrayLike, *, fs_hz: float, carrier_hz: float | None = None
) -> NDArray[np.float64]:
    """Envelope of a record: magnitude of its analytic signal, V.

    Parameters
    ----------
    y : array_like
        Record, V.
    fs_hz : float
        Sample rate, Hz.
    carrier_hz : float, optional
        Carrier frequency, Hz. When given, spectral content above 1.5 x carrier_hz (carrier
        harmonics, which would ripple the envelope) is removed first.

    Returns
    -------
    ndarray
        Envelope, V, same length as ``y``. The first and last few carrier cycles carry the
        edge error of the discrete Hilbert transform; trim them before taking statistics.
    """
    fs = check_positive("fs_hz", fs_hz)
    arr = as_record(y, min_samples=8)
    x = arr - arr.mean()
    if carrier_hz is not None:
        fc = check_positive("carrier_hz", carrier_hz)
        spec = np.fft.rfft(x)
        f_bins = np.fft.rfftfreq(arr.size, d=1.0 / fs)
        spec[f_bins > 1.5 * fc] = 0.0
        x = np.fft.irfft(spec, n=arr.size)
    return np.abs(hilbert(x))


def _trim(e: NDArray[np.float64], edge_fraction: float) -> NDArray[np.float64]:
    if not 0.0 <= edge_fraction < 0.5:
        raise ValueError(f"edge_fraction={edge_fraction!r} must be in [0, 0.5)")
    k = int(edge_fraction * e.size)
    return e[k : e.size - k] if k else e


def _psd_inflation(resid: NDArray[np.float64], fs_hz: float, freq_hz: float) -> float:
    """Residual PSD near ``freq_hz`` over its white-noise level (>= 1; Welch estimate).

    The variance of a least-squares tone or mean estimate in coloured noise is set by the
    noise density at that frequency; for white noise the ratio is 1.
    """
    nper = int(min(resid.size, 1024))
    f, pxx = welch(resid, fs=fs_hz, nperseg=nper)
    white = 2.0 * float(np.mean(resid * resid)) / fs_hz
    if white <= 0.0:
        return 1.0
    k = int(np.argmin(np.abs(f - freq_hz)))
    near = pxx[max(k - 2, 1) : k + 3]
    return max(1.0, float(np.median(near)) / white) if near.size else 1.0


def modulation_index_envelope(
    y: ArrayLike,
    *,
    fs_hz: float,
    carrier_hz: float | None = None,
    mod_hz: float | None = None,
    edge_fraction: float = 0.1,
) -> ModulationIndex:
    """Modulation index from the envelope, m = (Emax - Emin) / (Emax + Emin).

    Emax and Emin are taken from a sine fit to the trimmed envelope (mean E0, swing Em):
    Emax = E0 + Em, Emin = E0 - Em, so m = Em / E0 -- unlike the envelope's raw max and min,
    this is not biased upward by noise.

    Parameters
    ----------
    y : array_like
        Record, V.
    fs_hz : float
        Sample rate, Hz.
    carrier_hz : float, optional
        Carrier frequency, Hz (strips carrier harmonics before the envelope).
    mod_hz : float, optional
        Modulating frequency, Hz (three-parameter envelope fit); fitted when omitted.
    edge_fraction : float
        Fraction of the envelope dropped at each end (Hilbert edge effects).
    """
    fs = check_positive("fs_hz", fs_hz)
    env = _trim(envelope(y, fs_hz=fs, carrier_hz=carrier_hz), edge_fraction)
    fit = fit_sine(env, fs_hz=fs, freq_hz=mod_hz)
    e0 = fit.offset_v
    em = fit.amplitude_v
    if e0 <= 0.0:
        raise MeasurementError(f"envelope mean {e0:.4g} V is not positive: no carrier")
    m = em / e0
    # the envelope's noise is coloured (band-limited by the carrier's neighbourhood), so
    # the white-noise fit uncertainties are inflated by the residual's spectral density
    # at the modulating frequency and near DC over its mean level
    resid = env - fit.model(fs_hz=fs)
    infl_m = _psd_inflation(resid, fs, fit.freq_hz)
    infl_0 = _psd_inflation(resid, fs, 0.0)
    u_em = 0.5 * fit.u_vpp_v * math.sqrt(infl_m)
    u_m = math.hypot(u_em / e0, m * fit.u_offset_v * math.sqrt(infl_0) / e0)
    return ModulationIndex(
        m=m,
        u_m=u_m,
        carrier_v=e0,
        emax_v=e0 + em,
        emin_v=e0 - em,
        mod_hz=fit.freq_hz,
        sideband_asymmetry_db=0.0,
        method=f"envelope (analytic signal), {fit.method} fit of the envelope",
        u_mod_hz=fit.u_freq_hz * math.sqrt(infl_m),
    )


def modulation_index_spectrum(
    y: ArrayLike, *, fs_hz: float, carrier_hz: float, mod_hz: float
) -> ModulationIndex:
    """Modulation index from the carrier and the sidebands at fc +/- fm, rejecting FM.

    Each sideband of a tone-modulated AM signal has amplitude m Ac / 2. An oscillator whose
    frequency also follows its rail (frequency pushing) adds narrow-band FM sidebands of
    amplitude beta Ac / 2 at the same frequencies, in phase on one side and in antiphase on
    the other, so magnitudes alone (``(A_usb + A_lsb) / Ac``) read high. With the three lines
    fitted by least squares as complex amplitudes U, C, L (common time origin), the AM part
    is ``m = |U/C + conj(L/C)|`` and the FM part ``beta = |U/C - conj(L/C)|``: the FM pair
    cancels in the first, the AM pair in the second (narrow-band approximation, small m and
    beta). Without FM this reduces to the magnitude rule.

    Parameters
    ----------
    y : array_like
        Record, V.
    fs_hz : float
        Sample rate, Hz.
    carrier_hz, mod_hz : float
        Carrier and modulating frequencies, Hz (mod_hz < carrier_hz).

    References
    ----------
    S. Haykin, *Communication Systems*, 4th ed., Wiley 2001, ch. 2 (AM sidebands) and
    ch. 2.7 (narrow-band FM as a carrier plus a quadrature sideband pair); from memory.
    """
    fs = check_positive("fs_hz", fs_hz)
    fc = check_positive("carrier_hz", carrier_hz)
    fm = check_positive("mod_hz", mod_hz)
    if fm >= fc or fc + fm >= 0.5 * fs:
        raise ValueError(
            f"need mod_hz < carrier_hz and carrier_hz + mod_hz < fs_hz/2; got {fc=}, {fm=}, {fs=}"
        )
    arr = as_record(y, min_samples=16)
    coef, resid, var_factor = _line_phasors(arr, [fc / fs, (fc + fm) / fs, (fc - fm) / fs])
    carrier, upper, lower = coef
    ac, usb, lsb = abs(carrier), abs(upper), abs(lower)
    if ac <= 0.0:
        raise MeasurementError("no carrier line found")
    dof = max(arr.size - 7, 1)
    u_line = math.sqrt(float(resid @ resid) / dof * var_factor)
    m = abs(upper / carrier + np.conj(lower / carrier))
    beta = abs(upper / carrier - np.conj(lower / carrier))
    u_m = math.sqrt(2.0 * (u_line / ac) ** 2 + (m * u_line / ac) ** 2)
    asym = 20.0 * math.log10(usb / lsb) if usb > 0 and lsb > 0 else math.nan
    return ModulationIndex(
        m=float(m),
        u_m=u_m,
        carrier_v=ac,
        emax_v=ac * (1.0 + m),
        emin_v=ac * (1.0 - m),
        mod_hz=fm,
        sideband_asymmetry_db=asym,
        method=f"spectrum: least-squares carrier and sideband phasors, m = |U/C + conj(L/C)| "
        f"(FM part beta = {beta:.3g} rejected)",
    )


def _line_phasors(
    y: NDArray[np.float64], freqs_cycles: list[float]
) -> tuple[list[complex], NDArray[np.float64], float]:
    """:func:`benchctl.analysis.spectrum._lines_lsq` with each line as a complex amplitude P,
    line = Re(P exp(j w k')): a line c cos + s sin is the phasor c - j s."""
    coef, resid, var_factor = _lines_lsq(y, freqs_cycles)
    phasors = [complex(c, -s) for c, s in zip(coef[1::2], coef[2::2], strict=True)]
    return phasors, resid, var_factor


def envelope_distortion(
    y: ArrayLike,
    *,
    fs_hz: float,
    carrier_hz: float | None = None,
    mod_hz: float | None = None,
    n: int = 5,
    edge_fraction: float = 0.1,
) -> HarmonicAnalysis:
    """Distortion of the recovered envelope: IEEE 1241 harmonic analysis of the envelope.

    The THD of the envelope measures how faithfully the board's output amplitude follows a
    tone on its rail (envelope harmonics of the modulating tone over its fundamental).
    """
    fs = check_positive("fs_hz", fs_hz)
    env = _trim(envelope(y, fs_hz=fs, carrier_hz=carrier_hz), edge_fraction)
    return harmonics(env, fs_hz=fs, freq_hz=mod_hz, n=n)
