"""Waveform estimators against known truth, IEEE 1057 behaviour, the Cramer-Rao bound and scipy."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import curve_fit

from benchctl.analysis import (
    dc,
    fit_sine,
    frequency,
    measure_amplitude,
    refuse_if_clipped,
    rms,
    vpp_robust,
)
from benchctl.analysis.waveform import _cos_sin, _fft_peak_cycles, _hann
from benchctl.errors import MeasurementError

FS_HZ = 1.0e6


def tone(n, *, cycles, amp_v=1.0, phase_rad=0.3, offset_v=0.0, fs_hz=FS_HZ):
    t_s = np.arange(n) / fs_hz
    f_hz = cycles * fs_hz / n
    return amp_v * np.cos(2 * np.pi * f_hz * t_s + phase_rad) + offset_v, f_hz


def quantise_8bit(y, *, span_v):
    """An 8-bit scope: codes -128..127 over 8 divisions of span_v (DEVELOPERS.md contract)."""
    dy = span_v / 256.0
    codes = np.clip(np.round(y / dy), -128, 127)
    return codes * dy, int(np.count_nonzero((codes == -128) | (codes == 127)))


# --- private kernels -----------------------------------------------------------------


@pytest.mark.parametrize("n", [8, 9, 1000, 4097])
def test_cos_sin_kernel_matches_numpy(n):
    # reference: numpy.cos / numpy.sin on the same centred angles
    w = 0.7310
    k = np.arange(n) - 0.5 * (n - 1)
    co, si = _cos_sin(w, n)
    np.testing.assert_allclose(co, np.cos(w * k), rtol=0, atol=1e-12)
    np.testing.assert_allclose(si, np.sin(w * k), rtol=0, atol=1e-12)
    assert co.flags.c_contiguous and si.flags.c_contiguous


def test_hann_kernel_matches_numpy_hanning():
    # reference: numpy.hanning (symmetric Hann) without its two zero end points
    n = 513
    np.testing.assert_allclose(_hann(n), np.hanning(n + 2)[1:-1], rtol=0, atol=1e-13)


@pytest.mark.parametrize("cycles", [13.37, 100.0, 997.3])
def test_fft_peak_start_lands_within_a_tenth_of_a_bin(cycles):
    # Hann + log-parabola interpolation: bias well under 0.1 bin (Gasior & Gonzalez 2004)
    n = 4096
    y, _ = tone(n, cycles=cycles)
    assert abs(_fft_peak_cycles(y) * n - cycles) < 0.1


# --- sine fits: known truth ---------------------------------------------------------


@pytest.mark.parametrize("cycles", [3.3, 13.37, 250.0, 997.3])
def test_four_parameter_fit_recovers_noise_free_sine(cycles):
    # IEEE Std 1057-2017 clause 8: the 4-parameter fit of a noise-free sine is exact
    y, f_hz = tone(2000, cycles=cycles, amp_v=0.75, phase_rad=-1.1, offset_v=0.2)
    fit = fit_sine(y, fs_hz=FS_HZ)
    assert fit.method == "ieee1057-4p"
    assert fit.vpp_v == pytest.approx(1.5, rel=1e-9)
    assert fit.freq_hz == pytest.approx(f_hz, rel=1e-9)
    assert fit.offset_v == pytest.approx(0.2, abs=1e-9)
    assert math.remainder(fit.phase_rad + 1.1, 2 * math.pi) == pytest.approx(0.0, abs=1e-7)
    assert fit.residual_rms_v < 1e-9
    np.testing.assert_allclose(fit.model(fs_hz=FS_HZ), y, atol=1e-8)


def test_three_parameter_fit_at_known_frequency():
    # IEEE 1057 3-parameter fit is linear least squares: compare with numpy.linalg.lstsq
    rng = np.random.default_rng(7)
    y, f_hz = tone(1500, cycles=17.6, amp_v=2.0, phase_rad=0.9, offset_v=-0.4)
    y = y + rng.normal(0, 0.05, y.size)
    fit = fit_sine(y, fs_hz=FS_HZ, freq_hz=f_hz)
    t = np.arange(y.size) / FS_HZ
    design = np.column_stack([np.cos(2 * np.pi * f_hz * t), np.sin(2 * np.pi * f_hz * t),
                              np.ones_like(t)])
    (a, b, c), *_ = np.linalg.lstsq(design, y, rcond=None)
    assert fit.method == "ieee1057-3p"
    assert fit.vpp_v == pytest.approx(2 * math.hypot(a, b), rel=1e-10)
    assert fit.offset_v == pytest.approx(c, abs=1e-12)
    assert fit.phase_rad == pytest.approx(math.atan2(-b, a), abs=1e-9)
    assert fit.u_freq_hz == 0.0 and fit.freq_hz == f_hz


def test_four_parameter_fit_agrees_with_curve_fit():
    # reference library: scipy.optimize.curve_fit on the same model and data
    rng = np.random.default_rng(11)
    n = 2000
    y, f_hz = tone(n, cycles=21.37, amp_v=1.0, phase_rad=0.4, offset_v=0.1)
    y = y + rng.normal(0, 0.1, n)
    fit = fit_sine(y, fs_hz=FS_HZ)
    t = np.arange(n) / FS_HZ

    def model(tt, amp, f, ph, off):
        return amp * np.cos(2 * np.pi * f * tt + ph) + off

    p, cov = curve_fit(model, t, y, p0=[fit.amplitude_v, fit.freq_hz * 1.0001, 0.4, 0.0])
    assert fit.amplitude_v == pytest.approx(p[0], rel=1e-6)
    assert fit.freq_hz == pytest.approx(p[1], rel=1e-9)
    assert fit.offset_v == pytest.approx(p[3], abs=1e-7)
    # uncertainties: same residual-scaled covariance (curve_fit absolute_sigma=False)
    assert fit.u_freq_hz == pytest.approx(math.sqrt(cov[1, 1]), rel=1e-3)
    assert fit.u_vpp_v == pytest.approx(2 * math.sqrt(cov[0, 0]), rel=1e-3)
    assert fit.u_offset_v == pytest.approx(math.sqrt(cov[3, 3]), rel=1e-3)


def test_eight_bit_quantisation_with_trace_at_six_divisions_is_harmless():
    # trace at 6 of 8 divisions: quantisation noise dy/sqrt(12) (Widrow & Kollar,
    # "Quantization Noise", 2008) averages out in the fit; Vpp within 0.1 %
    span_v = 8.0
    y, f_hz = tone(10_000, cycles=97.3, amp_v=3.0, phase_rad=0.2)
    rng = np.random.default_rng(3)
    yq, clipped = quantise_8bit(y + rng.normal(0, 0.01, y.size), span_v=span_v)
    assert clipped == 0
    fit = fit_sine(yq, fs_hz=FS_HZ)
    assert fit.vpp_v == pytest.approx(6.0, rel=1e-3)
    assert fit.freq_hz == pytest.approx(f_hz, rel=1e-6)
    assert fit.residual_rms_v == pytest.approx(math.hypot(span_v / 256 / math.sqrt(12), 0.01),
                                               rel=0.15)


def test_clipped_record_is_refused_not_used():
    # a trace beyond the screen: samples at the ADC limits -> MeasurementError with reason
    y, _ = tone(4000, cycles=40.0, amp_v=4.4)
    yq, clipped = quantise_8bit(y, span_v=8.0)
    assert clipped > 0
    with pytest.raises(MeasurementError, match=r"clipped: \d+ of 4000 samples"):
        measure_amplitude(yq, fs_hz=FS_HZ, clipped_samples=clipped)
    with pytest.raises(MeasurementError, match="widen the vertical range"):
        refuse_if_clipped(clipped, yq.size)
    # the biased answer it would have given: clipped Vpp reads low (common practice)
    assert fit_sine(yq, fs_hz=FS_HZ).vpp_v < 8.8 * 0.99
    refuse_if_clipped(0, 100)  # nothing clipped: no error
    refuse_if_clipped(1, 100, max_fraction=0.02)


def test_measure_amplitude_reports_its_method():
    rng = np.random.default_rng(5)
    y, f_hz = tone(4000, cycles=31.1, amp_v=1.0, offset_v=0.5)
    y = y + rng.normal(0, 0.01, y.size)
    by_fit = measure_amplitude(y, fs_hz=FS_HZ)
    robust = measure_amplitude(y, fs_hz=FS_HZ, method="robust")
    assert by_fit.method == "ieee1057-4p" and robust.method.startswith("percentile")
    assert by_fit.vpp_v == pytest.approx(2.0, rel=2e-3)
    assert robust.vpp_v == pytest.approx(2.0, rel=0.02)
    assert by_fit.u_vpp_v < robust.u_vpp_v * 10
    assert by_fit.freq_hz == pytest.approx(f_hz, rel=1e-5)
    assert robust.offset_v == pytest.approx(0.5, abs=0.01)
    with pytest.raises(ValueError, match="method"):
        measure_amplitude(y, fs_hz=FS_HZ, method="bogus")


def test_bad_records_raise_one_line_reasons():
    with pytest.raises(MeasurementError, match="flat"):
        fit_sine(np.full(100, 0.25), fs_hz=FS_HZ)
    with pytest.raises(MeasurementError, match="at least 8"):
        fit_sine(np.ones(3), fs_hz=FS_HZ)
    with pytest.raises(MeasurementError, match="non-finite"):
        fit_sine(np.array([0.0, 1, np.nan, 1, 0, 1, 0, 1, 0, 1]), fs_hz=FS_HZ)
    with pytest.raises(ValueError, match="fs_hz"):
        fit_sine(np.arange(10.0), fs_hz=-1.0)
    with pytest.raises(ValueError, match="freq_hz"):
        fit_sine(np.arange(10.0), fs_hz=10.0, freq_hz=6.0)


# --- Monte Carlo against the Cramer-Rao bound -------------------------------------


def test_four_parameter_fit_reaches_the_cramer_rao_bound():
    # CRB for a sinusoid in white Gaussian noise (Rife & Boorstyn 1974, IEEE Trans. Inf.
    # Theory 20(5); Kay, Fundamentals of SSP Vol. I, 1993, eq. 3.41):
    #   var(A) >= 2 sigma^2 / N   -> var(Vpp) >= 8 sigma^2 / N
    #   var(f) >= 12 fs^2 / ((2 pi)^2 eta N (N^2 - 1)),  eta = A^2 / (2 sigma^2)
    # 100 trials of 2k samples: RMSE within a loose 1.3x of sqrt(CRB) (tight figures in
    # benchmarks/bench_analysis.py). Bounded loop: 100 iterations.
    n, amp_v, sigma_v, trials = 2048, 1.0, 1.0 / 30, 100
    rng = np.random.default_rng(2024)
    eta = amp_v**2 / (2 * sigma_v**2)
    crb_vpp = math.sqrt(8 * sigma_v**2 / n)
    crb_f = math.sqrt(12 / ((2 * math.pi) ** 2 * eta * n * (n * n - 1))) * FS_HZ
    err_vpp, err_f, u_vpp, u_f = [], [], [], []
    for _ in range(trials):
        y, f_hz = tone(n, cycles=rng.uniform(20, 200), amp_v=amp_v,
                       phase_rad=rng.uniform(-math.pi, math.pi))
        fit = fit_sine(y + rng.normal(0, sigma_v, n), fs_hz=FS_HZ)
        err_vpp.append(fit.vpp_v - 2 * amp_v)
        err_f.append(fit.freq_hz - f_hz)
        u_vpp.append(fit.u_vpp_v)
        u_f.append(fit.u_freq_hz)
    rmse_vpp = math.sqrt(np.mean(np.square(err_vpp)))
    rmse_f = math.sqrt(np.mean(np.square(err_f)))
    assert rmse_vpp / crb_vpp < 1.3
    assert rmse_f / crb_f < 1.3
    # the reported uncertainties are the bound, within 10 %
    assert np.median(u_vpp) / crb_vpp == pytest.approx(1.0, abs=0.1)
    assert np.median(u_f) / crb_f == pytest.approx(1.0, abs=0.1)
    # the naive max - min estimator is far off the bound (its error is bias)
    y, _ = tone(n, cycles=50.3, amp_v=amp_v)
    naive = np.ptp(y + rng.normal(0, sigma_v, n)) - 2 * amp_v
    assert abs(naive) > 5 * crb_vpp


# --- record statistics ----------------------------------------------------------------


def test_rms_and_dc_of_a_sine_with_offset():
    # a sine's power is A^2/2 (Parseval); whole cycles: mean = offset exactly
    y, _ = tone(10_000, cycles=50.0, amp_v=2.0, offset_v=0.5)
    assert rms(y, ac=True).value == pytest.approx(2.0 / math.sqrt(2), rel=1e-12)
    assert rms(y).value == pytest.approx(math.sqrt(2.0 + 0.25), rel=1e-12)
    mean = dc(y)
    assert mean.value == pytest.approx(0.5, abs=1e-12)
    assert mean.u == pytest.approx(np.std(y, ddof=1) / 100, rel=1e-12)
    # Parseval: time-domain mean square equals the normalised spectral energy
    spec = np.fft.fft(y)
    assert rms(y).value ** 2 == pytest.approx(np.sum(np.abs(spec) ** 2) / y.size**2, rel=1e-12)


def test_rms_uncertainty_matches_monte_carlo_for_noise():
    # white noise: the delta-method u of the RMS matches the spread over trials (20 trials)
    rng = np.random.default_rng(9)
    values = [rms(rng.normal(0, 1.0, 4000)).value for _ in range(20)]
    u = rms(rng.normal(0, 1.0, 4000)).u
    assert np.std(values, ddof=1) == pytest.approx(u, rel=0.5)


def test_vpp_robust_ignores_glitches_that_move_max_min():
    rng = np.random.default_rng(1)
    y, _ = tone(20_000, cycles=200.3, amp_v=1.0)
    y = y + rng.normal(0, 0.003, y.size)
    y[[100, 5000, 12000]] += [3.0, -2.5, 4.0]  # three glitches
    est = vpp_robust(y)
    # a pure sine read at its 1 % and 99 % quantiles: 2A cos(pi * 0.01) (arcsine law)
    assert est.value == pytest.approx(2 * math.cos(math.pi * 0.01), rel=3e-3)
    assert np.ptp(y) > 4.0
    assert 0 < est.u < 0.01
    with pytest.raises(ValueError, match="tail_fraction"):
        vpp_robust(y, tail_fraction=0.6)


def test_frequency_estimate_carries_uncertainty():
    rng = np.random.default_rng(4)
    y, f_hz = tone(5000, cycles=77.77)
    est = frequency(y + rng.normal(0, 0.01, y.size), fs_hz=FS_HZ)
    assert est.unit == "Hz" and est.u > 0
    assert abs(est.value - f_hz) < 5 * est.u


def test_fit_refuses_a_tone_at_nyquist_instead_of_returning_garbage():
    # a tone within 0.1 bin of fs/2 cannot be told from its alias: clear refusal
    n = 1000
    y = np.cos(2 * np.pi * (0.5 - 0.1 / n) * np.arange(n) + 0.4)
    with pytest.raises(MeasurementError, match="Nyquist"):
        fit_sine(y, fs_hz=1.0)


@pytest.mark.parametrize("cycles", [0.6, 1.2, 2.7])
def test_fit_of_short_records_stays_statistically_honest(cycles):
    # few cycles: errors stay within 4 reported standard uncertainties (30 seeded records)
    n = 64
    rng = np.random.default_rng(int(cycles * 10))
    for _ in range(30):
        y, f_hz = tone(n, cycles=cycles, phase_rad=rng.uniform(-3, 3), offset_v=0.5,
                       fs_hz=1.0)
        fit = fit_sine(y + rng.normal(0, 0.01, n), fs_hz=1.0)
        assert abs(fit.vpp_v - 2.0) < 4 * fit.u_vpp_v + 1e-12
        assert abs(fit.freq_hz - f_hz) < 4 * fit.u_freq_hz + 1e-12


def test_robust_amplitude_of_a_record_without_a_sine():
    # a flat record: the robust Vpp is 0 and there is no frequency; the fit refuses
    flat = np.full(256, 0.125)
    res = measure_amplitude(flat, fs_hz=FS_HZ, method="robust")
    assert res.vpp_v == 0.0 and math.isnan(res.freq_hz) and res.offset_v == 0.125
    with pytest.raises(MeasurementError, match="flat"):
        measure_amplitude(flat, fs_hz=FS_HZ)
