"""Harmonics/THD/SINAD (IEEE 1241) against scipy.signal.periodogram and closed forms;
the oscillation detector on oscillating, silent, distorted and off-band records."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from scipy.signal import periodogram, square

from benchctl.analysis import detect_oscillation, harmonics
from benchctl.analysis.spectrum import _aliased_hz

FS_HZ = 1.0e6


def distorted(n, *, f_hz, amps_v, phases_rad=None, fs_hz=FS_HZ):
    t = np.arange(n) / fs_hz
    phases_rad = phases_rad or [0.1 * k for k in range(len(amps_v))]
    return sum(a * np.cos(2 * np.pi * (k + 1) * f_hz * t + p)
               for k, (a, p) in enumerate(zip(amps_v, phases_rad, strict=True)))


def test_coherent_harmonics_match_scipy_periodogram():
    # reference: scipy.signal.periodogram, rectangular window, 'spectrum' scaling: a tone
    # on a bin of a one-sided spectrum holds A^2 / 2 (a sine's power)
    n, cycles = 4096, 64
    f_hz = cycles * FS_HZ / n
    amps = [1.0, 0.03, 0.01, 0.004]
    y = distorted(n, f_hz=f_hz, amps_v=amps)
    ana = harmonics(y, fs_hz=FS_HZ, n=4)
    _, pxx = periodogram(y, fs=FS_HZ, window="boxcar", scaling="spectrum", detrend=False)
    ref = [math.sqrt(2 * pxx[cycles * (k + 1)]) for k in range(4)]
    np.testing.assert_allclose(ana.harmonic_v, ref, rtol=1e-7)
    # IEEE 1241 THD = sqrt(sum of harmonic powers) / fundamental
    thd_ref = math.sqrt(sum(a * a for a in ref[1:])) / ref[0]
    assert ana.thd_ratio == pytest.approx(thd_ref, rel=1e-7)
    assert ana.thd_db == pytest.approx(20 * math.log10(thd_ref), abs=1e-6)


@pytest.mark.parametrize("cycles", [13.37, 101.9])
def test_thd_of_non_coherent_record_by_least_squares(cycles):
    # closed form: THD = sqrt(0.1^2 + 0.05^2) / 1 with fractional cycle counts (no window)
    rng = np.random.default_rng(1)
    n = 3000
    f_hz = cycles * FS_HZ / n
    y = distorted(n, f_hz=f_hz, amps_v=[1.0, 0.1, 0.05]) + rng.normal(0, 1e-4, n)
    ana = harmonics(y, fs_hz=FS_HZ, n=6)
    assert ana.thd_ratio == pytest.approx(math.sqrt(0.1**2 + 0.05**2), rel=1e-3)
    assert ana.harmonic_v[3] < 1e-4 and ana.harmonic_v[5] < 1e-4
    assert abs(ana.thd_ratio - math.hypot(0.1, 0.05)) < 5 * ana.u_thd_ratio + 1e-5
    # SINAD counts the distortion, SNR does not (IEEE 1241 9.2, 9.3)
    assert ana.sinad_db == pytest.approx(-20 * math.log10(math.hypot(0.1, 0.05)), abs=0.05)
    assert ana.snr_db == pytest.approx(20 * math.log10((1 / math.sqrt(2)) / 1e-4), abs=0.5)


def test_harmonics_above_nyquist_are_fitted_at_their_alias():
    # IEEE 1241: harmonics beyond fs/2 appear at |k f - m fs|; 2 x 0.3 fs -> 0.4 fs
    f_hz = 0.3 * FS_HZ + 17.0
    assert _aliased_hz(2 * f_hz, FS_HZ) == pytest.approx(0.4 * FS_HZ - 34.0)
    n = 4000
    t = np.arange(n) / FS_HZ
    y = np.cos(2 * np.pi * f_hz * t) + 0.02 * np.cos(2 * np.pi * 2 * f_hz * t + 0.5)
    ana = harmonics(y, fs_hz=FS_HZ, n=3)
    assert ana.harmonic_hz[1] == pytest.approx(0.4 * FS_HZ - 34.0, rel=1e-9)
    assert ana.harmonic_v[1] == pytest.approx(0.02, rel=1e-6)


def test_ideal_8_bit_quantiser_gives_six_db_per_bit():
    # ideal N-bit quantiser, full-scale sine: SINAD = 6.02 N + 1.76 dB (W. R. Bennett,
    # Bell Syst. Tech. J. 27, 1948; IEEE 1241 ENOB definition), so ENOB = 8 for 8 bits
    n, bits = 20_000, 8
    fsr_v = 2.0
    q = fsr_v / 2**bits
    t = np.arange(n) / FS_HZ
    y = 0.999 * np.cos(2 * np.pi * 1234.567 * t)
    yq = np.clip(np.floor(y / q) + 0.5, -(2 ** (bits - 1)) + 0.5, 2 ** (bits - 1) - 0.5) * q
    ana = harmonics(yq, fs_hz=FS_HZ, n=10, full_scale_v=fsr_v)
    assert ana.sinad_db == pytest.approx(6.02 * bits + 1.76, abs=0.3)
    assert ana.enob == pytest.approx(bits, abs=0.05)
    assert ana.nad_rms_v == pytest.approx(q / math.sqrt(12), rel=0.03)


def test_detector_sees_a_sine_in_band():
    rng = np.random.default_rng(3)
    n = 2048
    y = distorted(n, f_hz=12_345.0, amps_v=[0.2]) + rng.normal(0, 0.01, n)
    det = detect_oscillation(y, fs_hz=FS_HZ, band_hz=(10e3, 15e3))
    assert det.oscillating and det.in_band
    assert det.freq_hz == pytest.approx(12_345.0, rel=1e-3)
    assert det.vpp_v == pytest.approx(0.4, rel=0.02)
    # SNR of a sine in white noise: (A^2/2) / sigma^2 -> 23 dB (closed form)
    assert det.snr_db == pytest.approx(10 * math.log10(0.02 / 1e-4), abs=0.5)
    assert "oscillating at" in det.reason


def test_detector_rejects_noise_alone_with_its_evidence():
    # white noise: the largest of N/2 periodogram bins is about ln(N/2)/ln 2 x the median
    # (exponential distribution of bins; Kay 1993, ch. 7): well under the 20 dB default
    rng = np.random.default_rng(4)
    for _ in range(10):  # bounded: 10 records
        det = detect_oscillation(rng.normal(0, 0.01, 2048), fs_hz=FS_HZ)
        assert not det.oscillating
        assert det.prominence_db < 16.0
        assert det.snr_db < 0.0
        assert det.reason.startswith("not oscillating")


def test_detector_accepts_a_distorted_oscillation_and_flags_off_band():
    # a square wave (a hard-limited oscillator): fundamental 4/pi of the level (Fourier
    # series); harmonics do not count as noise, so it is still detected
    n = 4000
    t = np.arange(n) / FS_HZ
    y = 0.5 * square(2 * np.pi * 5_017.0 * t)
    det = detect_oscillation(y + np.random.default_rng(5).normal(0, 0.005, n), fs_hz=FS_HZ)
    assert det.oscillating
    assert det.vpp_v == pytest.approx(2 * 0.5 * 4 / math.pi, rel=0.02)
    # below: the band-limited square (odd harmonics 1..9 of the Fourier series), so no
    # aliased harmonics of the sampled edges land in the bands examined
    y = sum(0.5 * 4 / (math.pi * k) * np.sin(2 * np.pi * k * 5_017.0 * t) for k in (1, 3, 5, 7, 9))
    # expected 20..30 kHz: only the 5th harmonic (25.085 kHz) lies there; it is no
    # oscillation of its own, and the reason names the stronger line outside the band
    off = detect_oscillation(y, fs_hz=FS_HZ, band_hz=(20e3, 30e3))
    assert not off.oscillating
    assert re.search(r"harmonic 5 of the stronger 50[12]\d(\.\d+)? Hz line outside", off.reason)
    # expected 10..15 kHz: nothing there at all (square waves have odd harmonics only)
    empty = detect_oscillation(y, fs_hz=FS_HZ, band_hz=(10e3, 14e3))
    assert not empty.oscillating
    assert "no spectral line inside the band" in empty.reason and not empty.in_band


def test_detector_on_a_flat_record():
    det = detect_oscillation(np.zeros(256), fs_hz=FS_HZ)
    assert not det.oscillating and "flat" in det.reason
    with pytest.raises(ValueError, match="band_hz"):
        detect_oscillation(np.zeros(256), fs_hz=FS_HZ, band_hz=(5.0, 1.0))


@pytest.mark.parametrize("n", [64, 1001])
def test_closed_form_gram_matrix_equals_explicit_products(n):
    # Dirichlet-kernel closed forms against B @ B.T of the explicit basis (numpy)
    from benchctl.analysis.spectrum import _gram, _lines_basis

    freqs = [0.01237, 0.02474, 0.25, 0.4, 0.4999]
    basis = _lines_basis(freqs, n)
    np.testing.assert_allclose(_gram([2 * np.pi * f for f in freqs], n), basis @ basis.T,
                               rtol=0, atol=1e-9 * n)


def test_snr_uncertainty_matches_the_spread_over_records():
    # 30 seeded records: the reported u_snr_db agrees with the observed spread (within 40 %)
    rng = np.random.default_rng(21)
    n = 2000
    t = np.arange(n) / FS_HZ
    snrs, us = [], []
    for _ in range(30):
        y = np.cos(2 * np.pi * 12_345.6 * t + rng.uniform(-3, 3)) + rng.normal(0, 0.1, n)
        ana = harmonics(y, fs_hz=FS_HZ, n=5)
        snrs.append(ana.snr_db)
        us.append(ana.u_snr_db)
    assert np.std(snrs, ddof=1) == pytest.approx(np.mean(us), rel=0.4)
    # and the mean is the closed form (A^2/2) / sigma^2 = 17.0 dB
    assert np.mean(snrs) == pytest.approx(10 * math.log10(0.5 / 0.01), abs=0.1)


def test_detector_finds_an_in_band_oscillation_beside_a_stronger_spur():
    # a strong out-of-band line (pick-up) must not hide a weaker in-band oscillation
    rng = np.random.default_rng(30)
    n = 4096
    t = np.arange(n) / FS_HZ
    spur = 1.0 * np.cos(2 * np.pi * 1_000.0 * t)
    osc = 0.1 * np.cos(2 * np.pi * 47_111.0 * t + 0.2)
    y = spur + osc + rng.normal(0, 0.002, n)
    det = detect_oscillation(y, fs_hz=FS_HZ, band_hz=(40e3, 60e3))
    assert det.oscillating and det.in_band
    # the single-line fit ignores the spur, whose leakage pulls it by a few hundredths of
    # a bin (bin = 244 Hz here): a detector, not a measurement
    assert det.freq_hz == pytest.approx(47_111.0, abs=0.1 * FS_HZ / n)
    assert det.vpp_v == pytest.approx(0.2, rel=0.01)
    quiet = detect_oscillation(spur + rng.normal(0, 0.002, n), fs_hz=FS_HZ,
                               band_hz=(40e3, 60e3))
    assert not quiet.oscillating


@pytest.mark.parametrize("n", [64, 2048])
def test_detector_has_no_false_alarms_on_white_noise(n):
    # 200 seeded noise records per length (bounded): none is called oscillating; with the
    # 20 dB prominence default a noise bin would need exp(-100 ln 2) odds (exponential law)
    rng = np.random.default_rng(n)
    calls = [detect_oscillation(rng.normal(0, 1.0, n), fs_hz=FS_HZ).oscillating
             for _ in range(200)]
    assert not any(calls)


def test_detector_sees_a_small_quantised_oscillation():
    # 1.5 LSB amplitude on an 8-bit scope with 0.3 LSB noise: tone power / noise power
    # = (1.5^2 / 2) / (1/12 + 0.09) = 8.1 dB (quantisation noise q^2/12, Widrow & Kollar)
    rng = np.random.default_rng(2)
    t = np.arange(2000) / FS_HZ
    q = 0.03
    y = np.round(1.5 * np.cos(2 * np.pi * 12_345.0 * t) + rng.normal(0, 0.3, t.size)) * q
    det = detect_oscillation(y, fs_hz=FS_HZ, band_hz=(10e3, 20e3))
    assert det.oscillating
    assert det.snr_db == pytest.approx(10 * math.log10(1.125 / (1 / 12 + 0.09)), abs=1.5)
