"""Thresholds (bracket, logistic MLE vs scipy.optimize) and datasheet statistics
(tolerance factors vs the NIST/SEMATECH e-Handbook and Monte Carlo coverage)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from benchctl.analysis import (
    guard_band,
    min_typ_max,
    threshold_bracket,
    threshold_logistic,
    tolerance_factor,
)
from benchctl.errors import MeasurementError


def test_bracket_of_a_clean_transition():
    rail = np.round(np.arange(2.0, 4.01, 0.1), 3)
    th = threshold_bracket(rail, rail >= 3.05)
    assert (th.low_v, th.high_v) == (pytest.approx(3.0), pytest.approx(3.1))
    assert th.value_v == pytest.approx(3.05)
    # GUM 4.3.7: rectangular distribution of width w -> u = w / sqrt(12)
    assert th.u_v == pytest.approx(0.1 / math.sqrt(12))


def test_bracket_widens_over_mixed_observations_and_handles_polarity():
    rail = np.array([2.0, 2.1, 2.2, 2.3, 2.4, 2.5, 2.6])
    state = np.array([0, 0, 1, 0, 1, 1, 1], dtype=bool)
    th = threshold_bracket(rail, state)
    assert (th.low_v, th.high_v) == (pytest.approx(2.1), pytest.approx(2.4))
    assert "mixed" in th.method
    inv = threshold_bracket(rail, ~state, on_above=False)
    assert (inv.low_v, inv.high_v) == (th.low_v, th.high_v)
    with pytest.raises(MeasurementError, match="no transition"):
        threshold_bracket(rail, np.ones(rail.size, dtype=bool))


def test_logistic_threshold_matches_direct_likelihood_maximisation():
    # reference: scipy.optimize.minimize on the Bernoulli negative log-likelihood
    rng = np.random.default_rng(8)
    rail = np.repeat(np.linspace(2.8, 3.2, 17), 12)
    p_on = 1 / (1 + np.exp(-(rail - 3.02) / 0.04))
    state = rng.random(rail.size) < p_on
    th = threshold_logistic(rail, state)

    def nll(beta):
        eta = beta[0] + beta[1] * (rail - 3.0)
        return float(np.sum(np.logaddexp(0, eta) - state * eta))

    res = optimize.minimize(nll, x0=[0.0, 10.0], method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20_000})
    v50_ref = 3.0 - res.x[0] / res.x[1]
    assert th.value_v == pytest.approx(v50_ref, abs=1e-6)
    assert th.width_v == pytest.approx(1 / res.x[1], rel=1e-4)
    assert th.low_v < 3.02 < th.high_v  # the truth inside the 95 % interval
    assert th.u_v == pytest.approx((th.high_v - th.low_v) / (2 * 1.959963984540054))


def test_logistic_falls_back_to_bracket_for_separable_data():
    rail = np.linspace(2.0, 4.0, 21)
    th = threshold_logistic(rail, rail > 3.05)
    assert "separable" in th.method and th.value_v == pytest.approx(3.05)


def test_min_typ_max_definitions():
    mtm = min_typ_max([4.9, 5.0, 5.1, 5.3], unit="V")
    assert (mtm.min_value, mtm.max_value) == (4.9, 5.3)
    assert mtm.typ_value == pytest.approx(5.075) and mtm.typ_definition == "mean over units"
    assert mtm.u_typ == pytest.approx(np.std([4.9, 5.0, 5.1, 5.3], ddof=1) / 2)
    assert min_typ_max([1.0, 2.0, 10.0], typ="median").typ_value == 2.0


def test_tolerance_factors_against_published_tables():
    # NIST/SEMATECH e-Handbook 7.2.6.3 worked example, N = 43, p = 0.90, 1-alpha = 0.99:
    # two-sided Howe k2 = 2.2173 (from memory); its one-sided k1 = 1.8752 comes from an
    # approximation, so the exact noncentral-t value is allowed 0.002 from it (from memory)
    assert tolerance_factor(43, coverage=0.90, confidence=0.99) == pytest.approx(2.2173,
                                                                                 abs=1e-4)
    assert tolerance_factor(43, coverage=0.90, confidence=0.99, sided="one") == pytest.approx(
        1.8752, abs=2e-3)
    # one-sided exact factor, n = 10, p = 0.90, gamma = 0.95: 2.355 (Odeh & Owen 1980
    # tables, from memory)
    assert tolerance_factor(10, coverage=0.90, confidence=0.95, sided="one") == pytest.approx(
        2.355, abs=1e-3)
    # large n: k -> z_{(1+p)/2} (two-sided), closed form; the chi-square term converges
    # as 1 + z_gamma / sqrt(2 n), hence n = 1e7 for 1e-3
    assert tolerance_factor(10_000_000, coverage=0.99) == pytest.approx(
        stats.norm.ppf(0.995), rel=1e-3)
    # Howe's approximation is close to the exact two-sided factor
    k_exact = tolerance_factor(10, coverage=0.99, confidence=0.95, method="exact")
    assert tolerance_factor(10, coverage=0.99, confidence=0.95) == pytest.approx(k_exact,
                                                                                 rel=5e-3)


@pytest.mark.parametrize("sided", ["two", "one"])
def test_tolerance_factor_confidence_by_monte_carlo(sided):
    # definition check: with probability gamma the interval holds >= p of N(0, 1);
    # 4000 simulated samples of n = 8 units (vectorised, bounded)
    n, p, g = 8, 0.90, 0.95
    method = "exact"
    k = tolerance_factor(n, coverage=p, confidence=g, sided=sided, method=method)
    x = np.random.default_rng(12).normal(size=(4000, n))
    m, s = x.mean(axis=1), x.std(axis=1, ddof=1)
    if sided == "two":
        content = stats.norm.cdf(m + k * s) - stats.norm.cdf(m - k * s)
    else:
        content = stats.norm.cdf(m + k * s)
    hit = float(np.mean(content >= p))
    assert hit == pytest.approx(g, abs=3 * math.sqrt(g * (1 - g) / 4000) + 0.002)


def test_guard_band_limits():
    values = np.random.default_rng(1).normal(5.0, 0.1, 20)
    gb = guard_band(values, coverage=0.99, confidence=0.95)
    k = tolerance_factor(20, coverage=0.99, confidence=0.95)
    assert gb.lower == pytest.approx(values.mean() - k * values.std(ddof=1))
    assert gb.upper == pytest.approx(values.mean() + k * values.std(ddof=1))
    low = guard_band(values, sided="lower")
    assert low.upper == math.inf and low.lower > gb.lower
    with pytest.raises(MeasurementError, match="at least 2"):
        guard_band([1.0])
