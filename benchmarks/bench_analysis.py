"""Benchmarks of benchctl.analysis: accuracy against the Cramer-Rao bound, and cost ratios.

Run: .venv/bin/python benchmarks/bench_analysis.py [--trials N]

Prints ratios measured side by side in one run:
- amplitude (Vpp) and frequency RMSE / sqrt(CRB) of the four-parameter sine fit at
  N = 1e4, A/sigma = 30 over >= 500 seeded trials, with max-min Vpp beside it
  (CRB: Rife & Boorstyn 1974; Kay, Fundamentals of SSP Vol. I, eq. 3.41);
- the four-parameter fit of a 1e6-sample record against one numpy FFT of that record;
- agreement with scipy.optimize.curve_fit and relative speed;
- Vpp bias of the fit, percentile, max-min and RMS-based estimators, and of clipping;
- the linear-region search on 1,000 points against one least-squares fit of all points.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
from scipy.optimize import curve_fit

from benchctl.analysis import fit_sine, linear_fit, linear_region, rms, vpp_robust
from benchctl.analysis.waveform import _fft_peak_cycles


def best_of(fn, repeats: int = 5) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def crb_section(trials: int) -> None:
    n, amp_v, sigma_v, fs_hz = 10_000, 1.0, 1.0 / 30.0, 1.0
    rng = np.random.default_rng(1057)
    eta = amp_v**2 / (2 * sigma_v**2)
    crb_vpp = math.sqrt(8 * sigma_v**2 / n)
    crb_f = math.sqrt(12 / ((2 * math.pi) ** 2 * eta * n * (n * n - 1))) * fs_hz
    fit_v, fit_f, naive_v, pct_v = [], [], [], []
    t = np.arange(n)
    for _ in range(trials):
        f = rng.uniform(50, 500) / n
        y = amp_v * np.cos(2 * np.pi * f * t + rng.uniform(-np.pi, np.pi))
        y = y + rng.normal(0, sigma_v, n)
        fit = fit_sine(y, fs_hz=fs_hz)
        fit_v.append(fit.vpp_v - 2 * amp_v)
        fit_f.append(fit.freq_hz - f)
        naive_v.append(np.ptp(y) - 2 * amp_v)
        pct_v.append(vpp_robust(y).value - 2 * amp_v)

    def ratio(err, bound):
        return math.sqrt(float(np.mean(np.square(err)))) / bound

    print(f"sine fit vs Cramer-Rao bound: N={n}, A/sigma=30, {trials} seeded trials")
    print(f"  4-parameter fit  Vpp RMSE / sqrt(CRB)  = {ratio(fit_v, crb_vpp):6.3f}  (target <= 1.1)")
    print(f"  4-parameter fit  freq RMSE / sqrt(CRB) = {ratio(fit_f, crb_f):6.3f}  (target <= 1.1)")
    print(f"  max - min        Vpp RMSE / sqrt(CRB)  = {ratio(naive_v, crb_vpp):6.1f}")
    print(f"  percentile 1-99  Vpp RMSE / sqrt(CRB)  = {ratio(pct_v, crb_vpp):6.1f}")


def curve_fit_section(trials: int) -> None:
    n, sigma_v = 10_000, 1.0 / 30.0
    rng = np.random.default_rng(3)
    t = np.arange(n, dtype=np.float64)

    def model(tt, a, f, ph, c):
        return a * np.cos(2 * np.pi * f * tt + ph) + c

    diffs_v, diffs_f = [], []
    t_ours = t_ref = 0.0
    crb_vpp = math.sqrt(8 * sigma_v**2 / n)
    for _ in range(trials):
        f = rng.uniform(50, 500) / n
        y = np.cos(2 * np.pi * f * t + 0.5) + rng.normal(0, sigma_v, n)
        t0 = time.perf_counter()
        fit = fit_sine(y, fs_hz=1.0)
        t1 = time.perf_counter()
        # the same start for the reference: interpolated FFT peak, then a linear fit there
        f0 = _fft_peak_cycles(y)
        start = fit_sine(y, fs_hz=1.0, freq_hz=f0)
        p, _ = curve_fit(model, t, y, p0=[start.amplitude_v, f0, start.phase_rad,
                                          start.offset_v])
        t2 = time.perf_counter()
        t_ours += t1 - t0
        t_ref += t2 - t1
        diffs_v.append(abs(fit.vpp_v - 2 * abs(p[0])) / crb_vpp)
        diffs_f.append(abs(fit.freq_hz - p[1]) / fit.u_freq_hz)
    print(f"against scipy.optimize.curve_fit (same FFT start), {trials} records of {n}:")
    print(f"  max |Vpp difference| / sqrt(CRB) = {max(diffs_v):.1e}, "
          f"max |f difference| / u_f = {max(diffs_f):.1e}")
    print(f"  time curve_fit / ours = {t_ref / t_ours:.2f}x")


def bias_section() -> None:
    n, trials = 10_000, 50
    rng = np.random.default_rng(4)
    t = np.arange(n)
    print(f"Vpp bias in % of truth (mean over {trials} records of {n} samples):")
    print("  A/sigma    fit   percentile  max-min  2*sqrt(2)*ac-rms")
    for snr in (3.0, 30.0, 300.0):
        rows = {"fit": [], "pct": [], "ptp": [], "rms": []}
        for _ in range(trials):
            y = np.cos(2 * np.pi * 0.01337 * t + rng.uniform(-3, 3))
            y = y + rng.normal(0, 1 / snr, n)
            rows["fit"].append(fit_sine(y, fs_hz=1.0).vpp_v)
            rows["pct"].append(vpp_robust(y).value)
            rows["ptp"].append(np.ptp(y))
            rows["rms"].append(2 * math.sqrt(2) * rms(y, ac=True).value)
        b = {k: 100 * (np.mean(v) / 2 - 1) for k, v in rows.items()}
        print(f"  {snr:6.0f} {b['fit']:+7.3f} {b['pct']:+10.3f} {b['ptp']:+9.2f} {b['rms']:+12.3f}")
    # clipping: the trace runs past the screen edge; the fit of what is left reads low
    y = np.cos(2 * np.pi * 0.01337 * t)
    for overdrive in (1.0025, 1.01, 1.1, 1.5):
        yc = np.clip(overdrive * y, -1.0, 1.0)
        frac = float(np.mean(np.abs(overdrive * y) > 1.0))
        bias = 100 * (fit_sine(yc, fs_hz=1.0).vpp_v / (2 * overdrive) - 1)
        print(f"  trace at {100 * overdrive:5.1f} % of the screen edge: {100 * frac:4.1f} % of "
              f"samples clipped, fit Vpp bias {bias:+.2f} % (such records are refused)")


def cost_section() -> None:
    n = 1_000_000
    rng = np.random.default_rng(1)
    y = np.cos(2 * np.pi * 0.0123457 * np.arange(n) + 0.3) + rng.normal(0, 0.03, n)
    fit_sine(y, fs_hz=1.0)  # warm up
    # interleaved repeats, best of each: a shared machine slows both alike
    t_fit = t_rfft = t_fft = math.inf
    for _ in range(7):
        t_fit = min(t_fit, best_of(lambda: fit_sine(y, fs_hz=1.0), repeats=1))
        t_rfft = min(t_rfft, best_of(lambda: np.fft.rfft(y), repeats=1))
        t_fft = min(t_fft, best_of(lambda: np.fft.fft(y), repeats=1))
    print(f"four-parameter fit of a 1e6-sample record: {1e3 * t_fit:.1f} ms")
    print(f"  / one numpy rfft ({1e3 * t_rfft:.1f} ms) = {t_fit / t_rfft:5.2f}x  (target <= 10)")
    print(f"  / one numpy fft  ({1e3 * t_fft:.1f} ms) = {t_fit / t_fft:5.2f}x")


def region_section() -> None:
    n = 1000
    rail = np.linspace(2.0, 6.0, n)
    vpp = np.clip(0.5 * (rail - 3.0), 0.0, 1.2) + np.random.default_rng(2).normal(0, 0.002, n)
    t_search = best_of(lambda: linear_region(rail, vpp, tol_v=0.01, n_mc=0), repeats=3)
    t_line = best_of(lambda: linear_fit(rail, vpp), repeats=20)
    reg = linear_region(rail, vpp, tol_v=0.01, n_mc=0)
    print(f"linear-region search on {n} points: {1e3 * t_search:.1f} ms "
          f"(region {reg.lo_v:.3f}..{reg.hi_v:.3f} V)")
    print(f"  / one least-squares fit of all points ({1e6 * t_line:.0f} us) = "
          f"{t_search / t_line:.0f}x")
    # hardest case seen: tolerance of 2 sigma on a noisy straight line, every window is a
    # candidate and few pass
    noisy = 0.5 * rail + np.random.default_rng(5).normal(0, 0.01, n)
    t_worst = best_of(lambda: linear_region(rail, noisy, tol_v=0.02, n_mc=0), repeats=1)
    print(f"  worst case seen (tol = 2 sigma of the noise): {1e3 * t_worst:.0f} ms")
    small = linear_region(rail[::25], vpp[::25], tol_v=0.01)
    t_mc = best_of(lambda: linear_region(rail[::25], vpp[::25], tol_v=0.01), repeats=3)
    print(f"  {small.n_points}-point region of 40 points with 200 Monte Carlo trials for the "
          f"end intervals: {1e3 * t_mc:.0f} ms")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=500)
    args = parser.parse_args()
    crb_section(max(args.trials, 1))
    curve_fit_section(20)
    bias_section()
    cost_section()
    region_section()


if __name__ == "__main__":
    main()
