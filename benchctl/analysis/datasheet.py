"""Datasheet statistics over units: Min/Typ/Max and guard-banded limits.

Typ is defined here as the mean over the units measured (``typ="median"`` is offered);
Min and Max are the extreme values observed. Guard-banded limits are mean +/- k s with k a
normal tolerance-interval factor: with confidence ``confidence``, at least ``coverage`` of
the population of units lies inside the limits (assuming a normal population).

References
----------
.. [1] NIST/SEMATECH e-Handbook of Statistical Methods, section 7.2.6.3, "Tolerance
       intervals for a normal distribution".
.. [2] W. G. Howe, "Two-sided tolerance limits for normal populations - some
       improvements", J. Amer. Statist. Assoc. 64, 610-620, 1969.
.. [3] R. E. Odeh and D. B. Owen, "Tables for Normal Tolerance Limits, Sampling Plans and
       Screening", Marcel Dekker, 1980 (exact factors; the one-sided factor is a quantile
       of the noncentral t distribution).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize, stats

from benchctl.errors import MeasurementError

__all__ = ["GuardBand", "MinTypMax", "guard_band", "min_typ_max", "tolerance_factor"]

Sided = Literal["two", "lower", "upper"]


@dataclass(frozen=True, slots=True)
class MinTypMax:
    """Min/Typ/Max of a parameter over units.

    Attributes
    ----------
    min_value, typ_value, max_value : float
        Smallest observed, typical (see ``typ_definition``), largest observed; in ``unit``.
    sd : float
        Sample standard deviation over units (ddof = 1; 0 for one unit).
    u_typ : float
        Standard uncertainty of ``typ_value`` (s / sqrt(n) for the mean; for the median
        sqrt(pi / 2) s / sqrt(n), the normal-population asymptote).
    n : int
        Number of units.
    typ_definition : str
        ``"mean over units"`` or ``"median over units"``.
    unit : str
        Unit of the values.
    """

    min_value: float
    typ_value: float
    max_value: float
    sd: float
    u_typ: float
    n: int
    typ_definition: str
    unit: str


@dataclass(frozen=True, slots=True)
class GuardBand:
    """Guard-banded datasheet limits mean +/- k s.

    Attributes
    ----------
    lower, upper : float
        Limits (``-inf`` / ``inf`` for the side not asked for).
    mean, sd : float
        Sample mean and standard deviation over units.
    k : float
        Tolerance factor used.
    n : int
        Number of units.
    coverage, confidence : float
        Population fraction covered and confidence level.
    method : str
        How k was obtained.
    """

    lower: float
    upper: float
    mean: float
    sd: float
    k: float
    n: int
    coverage: float
    confidence: float
    method: str


def _values(values: ArrayLike, min_n: int) -> np.ndarray:
    v = np.asarray(values, dtype=np.float64).ravel()
    if v.size < min_n:
        raise MeasurementError(f"{v.size} values; at least {min_n} are needed")
    if not np.all(np.isfinite(v)):
        raise MeasurementError("values hold NaN or inf")
    return v


def min_typ_max(
    values: ArrayLike, *, typ: Literal["mean", "median"] = "mean", unit: str = ""
) -> MinTypMax:
    """Min, Typ and Max of one parameter over units (Typ = mean unless ``typ="median"``)."""
    v = _values(values, 1)
    n = v.size
    sd = float(v.std(ddof=1)) if n > 1 else 0.0
    if typ == "mean":
        t, u, word = float(v.mean()), sd / math.sqrt(n), "mean over units"
    elif typ == "median":
        t, u, word = float(np.median(v)), math.sqrt(math.pi / 2) * sd / math.sqrt(n), (
            "median over units"
        )
    else:
        raise ValueError(f"typ={typ!r} must be 'mean' or 'median'")
    return MinTypMax(float(v.min()), t, float(v.max()), sd, u, n, word, unit)


def _check_prob(name: str, p: float) -> float:
    p = float(p)
    if not 0.0 < p < 1.0:
        raise ValueError(f"{name}={p!r} must be in (0, 1)")
    return p


def _k2_exact(n: int, coverage: float, confidence: float) -> float:
    """Exact two-sided factor: solve the Odeh-Owen integral for k.

    gamma = sqrt(2n/pi) int_0^inf P(chi2_nu > nu r(x)^2 / k^2) exp(-n x^2 / 2) dx, where
    Phi(x + r) - Phi(x - r) = p; Gauss-Legendre quadrature over [0, 10/sqrt(n)].
    """
    nu = n - 1
    nodes, weights = np.polynomial.legendre.leggauss(96)
    half = 5.0 / math.sqrt(n)
    x = half * (nodes + 1.0)
    wq = half * weights
    # Newton from above on the increasing, concave (for r > x) g(r) = Phi(x+r) - Phi(x-r):
    # r0 = x + z_{(1+p)/2} has g(r0) >= p, so the iterates fall monotonically to the root
    r = x + stats.norm.ppf(0.5 * (1.0 + coverage))
    for _ in range(50):  # bounded
        f = stats.norm.cdf(x + r) - stats.norm.cdf(x - r) - coverage
        step = f / (stats.norm.pdf(x + r) + stats.norm.pdf(x - r))
        r -= step
        if np.max(np.abs(step)) < 1e-14:
            break
    dens = np.exp(-0.5 * n * x * x) * wq * math.sqrt(2.0 * n / math.pi)

    def conf(k: float) -> float:
        return float(np.sum(stats.chi2.sf(nu * r * r / (k * k), nu) * dens))

    k_howe = _k2_howe(n, coverage, confidence)
    return optimize.brentq(lambda k: conf(k) - confidence, 0.5 * k_howe, 2.0 * k_howe, xtol=1e-12)


def _k2_howe(n: int, coverage: float, confidence: float) -> float:
    nu = n - 1
    z = stats.norm.ppf(0.5 * (1.0 + coverage))
    chi = stats.chi2.ppf(1.0 - confidence, nu)
    return float(z * math.sqrt(nu * (1.0 + 1.0 / n) / chi))


def tolerance_factor(
    n: int,
    *,
    coverage: float = 0.99,
    confidence: float = 0.95,
    sided: Literal["two", "one"] = "two",
    method: Literal["howe", "exact"] = "howe",
) -> float:
    """Normal tolerance-interval factor k for n units.

    Parameters
    ----------
    n : int
        Number of units (>= 2).
    coverage : float
        Fraction p of the population the interval must hold.
    confidence : float
        Confidence level gamma.
    sided : {"two", "one"}
        Two-sided interval mean +/- k s, or one-sided bound mean + k s (or mean - k s).
    method : {"howe", "exact"}
        Two-sided: Howe's 1969 approximation
        ``k = z_{(1+p)/2} sqrt((n-1)(1 + 1/n) / chi2_{1-gamma, n-1})`` (NIST/SEMATECH
        7.2.6.3), or the exact factor from the Odeh-Owen integral. One-sided: always
        exact, ``k = t'_{gamma}(n - 1, z_p sqrt(n)) / sqrt(n)`` (noncentral t quantile).

    Returns
    -------
    float
    """
    n = int(n)
    if n < 2:
        raise ValueError(f"n={n!r} must be >= 2")
    p = _check_prob("coverage", coverage)
    g = _check_prob("confidence", confidence)
    if sided == "one":
        delta = stats.norm.ppf(p) * math.sqrt(n)
        return float(stats.nct.ppf(g, n - 1, delta) / math.sqrt(n))
    if sided != "two":
        raise ValueError(f"sided={sided!r} must be 'two' or 'one'")
    if method == "howe":
        return _k2_howe(n, p, g)
    if method == "exact":
        return float(_k2_exact(n, p, g))
    raise ValueError(f"method={method!r} must be 'howe' or 'exact'")


def guard_band(
    values: ArrayLike,
    *,
    coverage: float = 0.99,
    confidence: float = 0.95,
    sided: Sided = "two",
    method: Literal["howe", "exact"] = "howe",
) -> GuardBand:
    """Guard-banded limits mean +/- k s from values over units (normal tolerance interval).

    Parameters
    ----------
    values : array_like
        One parameter measured on n >= 2 units.
    coverage, confidence : float
        See :func:`tolerance_factor`.
    sided : {"two", "lower", "upper"}
        Both limits, or only a lower (mean - k s) or an upper (mean + k s) one-sided bound.
    method : {"howe", "exact"}
        Two-sided factor method.
    """
    v = _values(values, 2)
    n = v.size
    mean = float(v.mean())
    sd = float(v.std(ddof=1))
    if sided == "two":
        k = tolerance_factor(n, coverage=coverage, confidence=confidence, sided="two",
                             method=method)
        lo, hi = mean - k * sd, mean + k * sd
        how = f"two-sided normal tolerance interval, k by {method}"
    elif sided in ("lower", "upper"):
        k = tolerance_factor(n, coverage=coverage, confidence=confidence, sided="one")
        lo, hi = (mean - k * sd, math.inf) if sided == "lower" else (-math.inf, mean + k * sd)
        how = "one-sided normal tolerance bound, exact noncentral-t k"
    else:
        raise ValueError(f"sided={sided!r} must be 'two', 'lower' or 'upper'")
    return GuardBand(lo, hi, mean, sd, k, n, float(coverage), float(confidence), how)
