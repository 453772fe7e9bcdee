"""Straight-line fits against NIST StRD certified values and reference libraries; the
linear-region search against known truth and a brute-force search."""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.optimize import curve_fit

from benchctl.analysis import linear_fit, linear_region
from benchctl.analysis.regression import _search
from benchctl.errors import MeasurementError

DATA = Path(__file__).parent / "data"


def load_norris():
    with open(DATA / "nist_strd_norris.csv", newline="") as fh:
        rows = [r for r in csv.reader(line for line in fh if not line.startswith("#"))]
    arr = np.array([[float(v) for v in r] for r in rows[1:]])
    return arr[:, 1], arr[:, 0]  # x, y


def test_norris_matches_nist_certified_values():
    # NIST StRD "Norris" certified values (data and values typed from memory; agreement
    # of all six figures to ~1e-13 relative is what confirms both were typed correctly)
    x, y = load_norris()
    assert x.size == 36
    fit = linear_fit(x, y)
    assert fit.intercept == pytest.approx(-0.262323073774029, rel=1e-12)
    assert fit.slope == pytest.approx(1.00211681802045, rel=1e-12)
    assert fit.u_intercept == pytest.approx(0.232818234301152, rel=1e-12)
    assert fit.u_slope == pytest.approx(0.429796848199937e-03, rel=1e-12)
    assert fit.residual_sd == pytest.approx(0.884796396144373, rel=1e-12)
    assert fit.r2 == pytest.approx(0.999993745883712, rel=1e-13)
    assert fit.dof == 34


def test_norris_matches_reference_libraries():
    # numpy.polyfit, scipy.stats.linregress, scipy.optimize.curve_fit on the same data
    x, y = load_norris()
    fit = linear_fit(x, y)
    p, cov = np.polyfit(x, y, 1, cov="unscaled")
    assert fit.slope == pytest.approx(p[0], rel=1e-12)
    assert fit.intercept == pytest.approx(p[1], rel=1e-10)
    lr = stats.linregress(x, y)
    assert fit.u_slope == pytest.approx(lr.stderr, rel=1e-10)
    assert fit.u_intercept == pytest.approx(lr.intercept_stderr, rel=1e-10)
    assert fit.r2 == pytest.approx(lr.rvalue**2, rel=1e-12)
    popt, pcov = curve_fit(lambda xx, b1, b0: b1 * xx + b0, x, y, p0=[1.0, 0.0])
    # curve_fit differentiates numerically (finite differences): agreement to ~1e-5
    assert fit.slope == pytest.approx(popt[0], rel=1e-8)
    assert fit.u_slope == pytest.approx(math.sqrt(pcov[0, 0]), rel=2e-5)
    assert fit.cov_slope_intercept == pytest.approx(pcov[0, 1], rel=2e-5)


def test_line_through_origin_noint1_and_noint2():
    # NIST StRD NoInt1 (x = 60..70, y = 130..140) and NoInt2 (x = 4, 5, 6; y = 3, 4, 4):
    # certified values from memory, cross-checked by the exact closed form
    # slope = sum(xy) / sum(x^2): NoInt1 = 96635 / 46585, NoInt2 = 56 / 77
    x1 = np.arange(60.0, 71.0)
    fit1 = linear_fit(x1, x1 + 70.0, intercept=False)
    assert fit1.slope == pytest.approx(96635 / 46585, rel=1e-14)
    assert fit1.slope == pytest.approx(2.07438016528926, rel=1e-12)
    assert fit1.u_slope == pytest.approx(0.165289256198347e-01, rel=1e-12)
    assert fit1.residual_sd == pytest.approx(3.56753034006338, rel=1e-12)
    assert fit1.r2 == pytest.approx(0.999365492298663, rel=1e-12)
    fit2 = linear_fit([4.0, 5.0, 6.0], [3.0, 4.0, 4.0], intercept=False)
    assert fit2.slope == pytest.approx(56 / 77, rel=1e-14)
    assert fit2.u_slope == pytest.approx(0.420827318078432e-01, rel=1e-12)
    assert fit2.residual_sd == pytest.approx(0.369274472937998, rel=1e-12)
    assert fit2.r2 == pytest.approx(0.993348115299335, rel=1e-12)


def test_weighted_fit_matches_curve_fit_with_sigma():
    # reference: scipy.optimize.curve_fit(sigma=u), both absolute_sigma settings
    rng = np.random.default_rng(2)
    x = np.linspace(2, 6, 25)
    u = 0.01 + 0.02 * rng.random(x.size)
    y = 0.5 * x - 1.0 + rng.normal(0, u)
    for absolute in (False, True):
        fit = linear_fit(x, y, 1 / u**2, absolute_sigma=absolute)
        popt, pcov = curve_fit(lambda xx, b1, b0: b1 * xx + b0, x, y, sigma=u,
                               absolute_sigma=absolute)
        assert fit.slope == pytest.approx(popt[0], rel=1e-9)
        assert fit.intercept == pytest.approx(popt[1], rel=1e-8)
        assert fit.u_slope == pytest.approx(math.sqrt(pcov[0, 0]), rel=1e-6)
        assert fit.u_intercept == pytest.approx(math.sqrt(pcov[1, 1]), rel=1e-6)


def beacon_like(rail_v, *, seed, noise_v=0.002):
    """Invented demo curve: off below 3 V, linear 0.5 Vpp/V to 5.4 V, then saturating."""
    lin = 0.5 * (rail_v - 3.0)
    sat = 1.2 + 0.1 * np.tanh((rail_v - 5.4) / 0.1) * (rail_v > 5.4)
    v = np.where(rail_v < 3.0, 0.0, np.where(rail_v <= 5.4, lin, sat))
    return v + np.random.default_rng(seed).normal(0, noise_v, rail_v.size)


def test_linear_region_finds_the_known_range_and_slope():
    rail = np.linspace(2.0, 6.0, 41)
    vpp = beacon_like(rail, seed=1)
    u = np.full(rail.size, 0.002)
    reg = linear_region(rail, vpp, u, tol_v=0.008, n_mc=100)
    assert (reg.lo_v, reg.hi_v) == (pytest.approx(3.0), pytest.approx(5.4))
    assert reg.n_points == 25
    assert reg.slope_ci95[0] < 0.5 < reg.slope_ci95[1]
    assert reg.slope_vpp_per_v == pytest.approx(0.5, abs=5 * reg.u_slope_vpp_per_v)
    assert reg.max_dev_v <= 0.008 and reg.r2 > 0.999
    assert reg.lo_ci95[0] <= 3.0 <= reg.lo_ci95[1] and reg.hi_ci95[0] <= 5.4 <= reg.hi_ci95[1]
    # the 95 % t interval is t(0.975, dof) standard errors wide each side (Draper & Smith)
    half = 0.5 * (reg.slope_ci95[1] - reg.slope_ci95[0])
    assert half == pytest.approx(stats.t.ppf(0.975, 23) * reg.u_slope_vpp_per_v, rel=1e-12)
    # order of the input does not matter
    perm = np.random.default_rng(0).permutation(rail.size)
    again = linear_region(rail[perm], vpp[perm], u[perm], tol_v=0.008, n_mc=0)
    assert (again.lo_v, again.hi_v) == (reg.lo_v, reg.hi_v)


def test_tolerance_as_fraction_of_full_scale():
    rail = np.linspace(2.0, 6.0, 41)
    vpp = beacon_like(rail, seed=2)
    reg = linear_region(rail, vpp, tol_fraction_fs=0.01, n_mc=0)
    assert reg.tol_v == pytest.approx(0.01 * np.ptp(vpp))
    assert reg.lo_v == pytest.approx(3.0) and reg.hi_v == pytest.approx(5.4)


def brute_force(x, y, tol, min_points):
    """Reference: refit every window from scratch with numpy.polyfit (O(n^3))."""
    n = x.size
    for length in range(n, min_points - 1, -1):
        best = None
        for i in range(0, n - length + 1):
            j = i + length - 1
            p = np.polyfit(x[i : j + 1], y[i : j + 1], 1)
            dev = float(np.max(np.abs(y[i : j + 1] - np.polyval(p, x[i : j + 1]))))
            if dev <= tol and (best is None or dev < best[2]):
                best = (i, j, dev)
        if best:
            return best
    return None


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_prefix_sum_search_equals_brute_force_refits(seed):
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(0, 10, 30))
    y = np.sin(x / 3.0) + rng.normal(0, 0.01, x.size)
    got = _search(x - x.mean(), y - y.mean(), np.ones_like(x), 0.05, 5)
    ref = brute_force(x, y, 0.05, 5)
    assert got is not None and ref is not None
    assert got[:2] == ref[:2]
    assert got[2] == pytest.approx(ref[2], rel=1e-8)


def test_linear_region_refuses_when_nothing_is_straight():
    rail = np.linspace(0, 1, 20)
    with pytest.raises(MeasurementError, match="within"):
        linear_region(rail, np.sin(40 * rail), tol_v=1e-4, n_mc=0)
    with pytest.raises(ValueError, match="exactly one"):
        linear_region(rail, rail, tol_v=0.1, tol_fraction_fs=0.1)


@settings(max_examples=40, deadline=None, derandomize=True)
@given(
    seed=st.integers(0, 10_000),
    n=st.integers(6, 24),
    tol=st.floats(0.005, 0.5),
    weighted=st.booleans(),
)
def test_search_property_equals_brute_force(seed, n, tol, weighted):
    # property: the prefix-sum search finds the same widest window as refitting every
    # window from scratch (weighted refits by numpy.polyfit(w=sqrt(weight)))
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(0, 5, n)) + np.arange(n) * 1e-3
    y = np.where(x > 2.5, 0.3 * (x - 2.5) ** 2, 0.0) + 0.4 * x + rng.normal(0, 0.02, n)
    w = rng.uniform(0.5, 2.0, n) if weighted else np.ones(n)
    got = _search(x - x.mean(), y - y.mean(), w, tol, 3)
    ref = None
    for length in range(n, 2, -1):
        for i in range(0, n - length + 1):
            sl = slice(i, i + length)
            p = np.polyfit(x[sl], y[sl], 1, w=np.sqrt(w[sl]))
            dev = float(np.max(np.abs(y[sl] - np.polyval(p, x[sl]))))
            if dev <= tol and (ref is None or dev < ref[2]):
                ref = (i, i + length - 1, dev)
        if ref:
            break
    if ref is None:
        assert got is None
    else:
        assert got is not None and got[1] - got[0] == ref[1] - ref[0]
        assert got[2] == pytest.approx(ref[2], rel=1e-6, abs=1e-12)


@pytest.mark.parametrize("seed", [5, 6])
def test_search_with_probe_pass_equals_brute_force_on_long_windows(seed):
    # windows longer than 64 points take the probe-first path; same answer as refits
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 10.0, 100)
    y = np.where(x > 7.5, 0.2 * (x - 7.5) ** 2, 0.0) + 0.3 * x + rng.normal(0, 0.01, x.size)
    got = _search(x - x.mean(), y - y.mean(), np.ones_like(x), 0.04, 5)
    ref = brute_force(x, y, 0.04, 5)
    assert ref is not None and ref[1] - ref[0] + 1 > 64
    assert got is not None and got[:2] == ref[:2]
