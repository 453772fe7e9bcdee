"""Benchmarks of benchctl.analysis: accuracy against the Cramer-Rao bound, and cost ratios.

Run: .venv/bin/python benchmarks/bench_analysis.py [--trials N]

Prints ratios measured side by side in one run:
- amplitude (Vpp) and frequency RMSE / sqrt(CRB) of the four-parameter sine fit at
  N = 1e4, A/sigma = 30 over >= 500 seeded trials, with max-min Vpp beside it
  (CRB: Rife & Boorstyn 1974; Kay, Fundamentals of SSP Vol. I, eq. 3.41);
- the four-parameter fit of a 1e6-sample record against one numpy FFT of that record;
- the linear-region search on 1,000 points against one least-squares fit of all points.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from benchctl.analysis import fit_sine, linear_fit, linear_region, vpp_robust


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


def cost_section() -> None:
    n = 1_000_000
    rng = np.random.default_rng(1)
    y = np.cos(2 * np.pi * 0.0123457 * np.arange(n) + 0.3) + rng.normal(0, 0.03, n)
    fit_sine(y, fs_hz=1.0)  # warm up
    t_fit = best_of(lambda: fit_sine(y, fs_hz=1.0))
    t_rfft = best_of(lambda: np.fft.rfft(y))
    t_fft = best_of(lambda: np.fft.fft(y))
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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=500)
    args = parser.parse_args()
    crb_section(max(args.trials, 1))
    cost_section()
    region_section()


if __name__ == "__main__":
    main()
