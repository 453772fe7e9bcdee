"""Envelope and AM: scipy.signal.hilbert, the textbook AM relations, envelope distortion."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import hilbert, periodogram

from benchctl.analysis import (
    envelope,
    envelope_distortion,
    modulation_index_envelope,
    modulation_index_spectrum,
)

FS_HZ = 200_000.0
N = 8000  # 40 ms


def am(m, *, fc_hz=10_000.0, fm_hz=500.0, ac_v=1.0, env_h2=0.0, noise_v=0.0, seed=0):
    t = np.arange(N) / FS_HZ
    mod = m * np.cos(2 * np.pi * fm_hz * t) + env_h2 * np.cos(2 * np.pi * 2 * fm_hz * t)
    y = ac_v * (1 + mod) * np.cos(2 * np.pi * fc_hz * t + 0.3)
    return y + np.random.default_rng(seed).normal(0, noise_v, N) if noise_v else y


def test_envelope_is_the_analytic_signal_magnitude():
    # reference: scipy.signal.hilbert (analytic signal), Oppenheim & Schafer 12.4
    y = am(0.4) + 0.2
    np.testing.assert_allclose(envelope(y, fs_hz=FS_HZ), np.abs(hilbert(y - y.mean())),
                               rtol=1e-12)
    # whole cycles of carrier and tone: the envelope is Ac (1 + m cos) to high accuracy
    t = np.arange(N) / FS_HZ
    mid = slice(N // 10, -N // 10)
    np.testing.assert_allclose(envelope(am(0.4), fs_hz=FS_HZ)[mid],
                               (1 + 0.4 * np.cos(2 * np.pi * 500 * t))[mid], atol=1e-6)


def test_carrier_harmonics_are_stripped_before_the_envelope():
    # a distorted carrier (3rd harmonic) ripples the raw envelope; carrier_hz removes it
    t = np.arange(N) / FS_HZ
    y = am(0.3) + 0.1 * np.cos(2 * np.pi * 30_000.0 * t)
    mid = slice(N // 10, -N // 10)
    ideal = (1 + 0.3 * np.cos(2 * np.pi * 500 * t))[mid]
    raw = envelope(y, fs_hz=FS_HZ)[mid]
    clean = envelope(y, fs_hz=FS_HZ, carrier_hz=10_000.0)[mid]
    assert np.max(np.abs(raw - ideal)) > 0.05
    assert np.max(np.abs(clean - ideal)) < 1e-3


@pytest.mark.parametrize("m", [0.05, 0.3, 0.8])
def test_modulation_index_by_envelope_and_by_spectrum_agree_with_truth(m):
    # textbook AM (Haykin, Communication Systems, 3.1): m = (Emax - Emin) / (Emax + Emin)
    # and each sideband at fc +/- fm carries m/2 of the carrier amplitude
    y = am(m, noise_v=0.01, seed=int(m * 100))
    by_env = modulation_index_envelope(y, fs_hz=FS_HZ, carrier_hz=10_000.0)
    by_spec = modulation_index_spectrum(y, fs_hz=FS_HZ, carrier_hz=10_000.0, mod_hz=500.0)
    for res in (by_env, by_spec):
        assert res.m == pytest.approx(m, abs=5 * res.u_m + 1e-4)
        assert 0 < res.u_m < 0.01
    assert (by_env.emax_v - by_env.emin_v) / (by_env.emax_v + by_env.emin_v) == pytest.approx(
        by_env.m, rel=1e-12)
    assert abs(by_env.mod_hz - 500.0) < 5 * by_env.u_mod_hz and by_env.u_mod_hz < 0.5
    assert abs(by_spec.sideband_asymmetry_db) < 0.1


def test_sidebands_are_m_over_2_in_scipy_periodogram():
    # AM sideband relation checked with scipy.signal.periodogram on a coherent record:
    # sideband amplitude / carrier amplitude = m / 2 (Haykin 3.1)
    m = 0.5
    _, pxx = periodogram(am(m), fs=FS_HZ, window="boxcar", scaling="spectrum")
    bin_hz = FS_HZ / N
    carrier = math.sqrt(pxx[int(10_000 / bin_hz)])
    usb = math.sqrt(pxx[int(10_500 / bin_hz)])
    lsb = math.sqrt(pxx[int(9_500 / bin_hz)])
    assert usb / carrier == pytest.approx(m / 2, rel=1e-9)
    assert lsb / carrier == pytest.approx(m / 2, rel=1e-9)
    res = modulation_index_spectrum(am(m), fs_hz=FS_HZ, carrier_hz=10_000.0, mod_hz=500.0)
    assert res.m == pytest.approx((usb + lsb) / carrier, rel=1e-9)


def test_envelope_distortion_measures_the_envelope_harmonic():
    # envelope = 1 + 0.4 cos(wm t) + 0.02 cos(2 wm t): envelope THD = 0.02 / 0.4 = 5 %
    y = am(0.4, env_h2=0.02)
    ana = envelope_distortion(y, fs_hz=FS_HZ, carrier_hz=10_000.0, mod_hz=500.0)
    assert ana.thd_ratio == pytest.approx(0.05, rel=1e-3)
    clean = envelope_distortion(am(0.4), fs_hz=FS_HZ, carrier_hz=10_000.0, mod_hz=500.0)
    assert clean.thd_ratio < 1e-4


def test_bad_am_requests():
    with pytest.raises(ValueError, match="mod_hz < carrier_hz"):
        modulation_index_spectrum(am(0.3), fs_hz=FS_HZ, carrier_hz=500.0, mod_hz=10_000.0)
    with pytest.raises(ValueError, match="edge_fraction"):
        modulation_index_envelope(am(0.3), fs_hz=FS_HZ, edge_fraction=0.7)


def test_modulation_index_of_a_non_coherent_record():
    # fractional cycles of carrier and tone: trimming the Hilbert edges keeps m accurate
    t = np.arange(7777) / FS_HZ
    y = (1 + 0.25 * np.cos(2 * np.pi * 433.3 * t + 0.7)) * np.cos(2 * np.pi * 9_876.5 * t)
    by_env = modulation_index_envelope(y, fs_hz=FS_HZ, carrier_hz=9_876.5)
    by_spec = modulation_index_spectrum(y, fs_hz=FS_HZ, carrier_hz=9_876.5, mod_hz=433.3)
    assert by_env.m == pytest.approx(0.25, abs=2e-3)
    assert by_spec.m == pytest.approx(0.25, rel=1e-9)


def test_envelope_modulation_uncertainty_matches_the_spread():
    # the envelope's noise is coloured; the reported u_m must still match the spread of m
    # over 20 seeded records (within 40 %), and agree with the spectral method's
    ms, us, us_spec = [], [], []
    for seed in range(20):  # bounded
        y = am(0.3, noise_v=0.01, seed=100 + seed)
        res = modulation_index_envelope(y, fs_hz=FS_HZ, carrier_hz=10_000.0)
        ms.append(res.m)
        us.append(res.u_m)
        us_spec.append(modulation_index_spectrum(y, fs_hz=FS_HZ, carrier_hz=10_000.0,
                                                 mod_hz=500.0).u_m)
    assert np.std(ms, ddof=1) == pytest.approx(np.mean(us), rel=0.4)
    assert np.mean(us) == pytest.approx(np.mean(us_spec), rel=0.4)
