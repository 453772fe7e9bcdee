"""Straight-line fits and the linear region of output amplitude against the rail.

References
----------
.. [1] N. R. Draper and H. Smith, "Applied Regression Analysis", 3rd ed., Wiley, 1998,
       chapters 1-2 (weighted least squares, standard errors, t intervals).
.. [2] NIST Statistical Reference Datasets (StRD), linear regression: certified values.
.. [3] IEEE Std 1241-2010, 9.5 (integral nonlinearity against a best-fit straight line).
.. [4] JCGM 101:2008, "Evaluation of measurement data - Supplement 1 to the GUM -
       Propagation of distributions using a Monte Carlo method".
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from benchctl.errors import MeasurementError

__all__ = ["LineFit", "LinearRegion", "linear_fit", "linear_region"]


@dataclass(frozen=True, slots=True)
class LineFit:
    """Least-squares straight line ``y = slope * x + intercept``.

    Attributes
    ----------
    slope, intercept : float
        Coefficients, in units of y per x and of y.
    u_slope, u_intercept : float
        Standard errors of the coefficients.
    r2 : float
        Coefficient of determination (centred; uncentred for a line through the origin,
        as NIST StRD certifies it).
    residual_sd : float
        Residual standard deviation sqrt(SSE / dof) (weighted residuals with weights).
    dof : int
        Residual degrees of freedom.
    cov_slope_intercept : float
        Covariance of slope and intercept.
    n_points : int
        Number of points.
    """

    slope: float
    intercept: float
    u_slope: float
    u_intercept: float
    r2: float
    residual_sd: float
    dof: int
    cov_slope_intercept: float
    n_points: int


@dataclass(frozen=True, slots=True)
class LinearRegion:
    """The widest contiguous rail range over which Vpp is a straight line within tolerance.

    Attributes
    ----------
    lo_v, hi_v : float
        Rail voltage at the first and last point of the region, V.
    slope_vpp_per_v : float
        Supply sensitivity, Vpp per rail volt.
    u_slope_vpp_per_v : float
        Its standard uncertainty.
    intercept_vpp : float
        Intercept of the line at 0 V rail, Vpp.
    u_intercept_vpp : float
        Its standard uncertainty.
    r2 : float
        Coefficient of determination of the line over the region.
    max_dev_v : float
        Largest |Vpp - line| over the region, V (integral nonlinearity, best-fit line).
    tol_v : float
        Tolerance the deviation was held to, V.
    slope_ci95 : (float, float)
        95 % confidence interval of the slope (t distribution).
    lo_ci95, hi_ci95 : (float, float)
        95 % intervals for the region ends, V: Monte Carlo propagation of the Vpp
        uncertainties through the search, widened to the neighbouring rail points.
    n_points : int
        Points inside the region.
    i_lo, i_hi : int
        Indices (in rail-sorted order) of the first and last point of the region.
    method : str
        The method, in words.
    """

    lo_v: float
    hi_v: float
    slope_vpp_per_v: float
    u_slope_vpp_per_v: float
    intercept_vpp: float
    u_intercept_vpp: float
    r2: float
    max_dev_v: float
    tol_v: float
    slope_ci95: tuple[float, float]
    lo_ci95: tuple[float, float]
    hi_ci95: tuple[float, float]
    n_points: int
    i_lo: int
    i_hi: int
    method: str


def _as_xy(x: ArrayLike, y: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    xa = np.asarray(x, dtype=np.float64)
    ya = np.asarray(y, dtype=np.float64)
    if xa.ndim != 1 or xa.shape != ya.shape:
        raise ValueError(f"x and y must be 1-D of equal length, got {xa.shape} and {ya.shape}")
    if not (np.all(np.isfinite(xa)) and np.all(np.isfinite(ya))):
        raise MeasurementError("x or y holds non-finite values (NaN or inf)")
    return xa, ya


def linear_fit(
    x: ArrayLike,
    y: ArrayLike,
    w: ArrayLike | None = None,
    *,
    intercept: bool = True,
    absolute_sigma: bool = False,
) -> LineFit:
    """Weighted least-squares straight line, computed about the weighted means.

    Parameters
    ----------
    x, y : array_like
        Points.
    w : array_like, optional
        Weights, normally 1 / u_y^2.
    intercept : bool
        False fits a line through the origin.
    absolute_sigma : bool
        With weights 1/u^2: True takes the standard errors from the weights alone; False
        (default) scales them by the residual variance, as scipy.optimize.curve_fit does.

    Returns
    -------
    LineFit

    Raises
    ------
    MeasurementError
        Too few points or all x equal.
    """
    xa, ya = _as_xy(x, y)
    n = xa.size
    p = 2 if intercept else 1
    if n < p + 1:
        raise MeasurementError(f"{n} points cannot fit a line with an error estimate")
    wa = np.ones(n) if w is None else np.asarray(w, dtype=np.float64)
    if wa.shape != xa.shape or np.any(~np.isfinite(wa)) or np.any(wa <= 0):
        raise ValueError("w must be finite, > 0 and of the length of x")
    sw = float(wa.sum())
    if intercept:
        xm = float(wa @ xa) / sw
        ym = float(wa @ ya) / sw
        dx = xa - xm
        dy = ya - ym
        sxx = float(wa @ (dx * dx))
        if sxx <= 0.0:
            raise MeasurementError("all x values are equal: the slope is undefined")
        slope = float(wa @ (dx * dy)) / sxx
        icpt = ym - slope * xm
        resid = dy - slope * dx
        sst = float(wa @ (dy * dy))
    else:
        sxx = float(wa @ (xa * xa))
        if sxx <= 0.0:
            raise MeasurementError("all x values are zero: the slope is undefined")
        slope = float(wa @ (xa * ya)) / sxx
        icpt = 0.0
        resid = ya - slope * xa
        sst = float(wa @ (ya * ya))
        xm = 0.0
    sse = float(wa @ (resid * resid))
    dof = n - p
    s2 = sse / dof
    scale = 1.0 if (absolute_sigma and w is not None) else s2
    var_slope = scale / sxx
    if intercept:
        var_icpt = scale * (1.0 / sw + xm * xm / sxx)
        cov = -xm * var_slope
    else:
        var_icpt = 0.0
        cov = 0.0
    r2 = 1.0 - sse / sst if sst > 0 else 1.0
    return LineFit(
        slope=slope,
        intercept=icpt,
        u_slope=math.sqrt(var_slope),
        u_intercept=math.sqrt(var_icpt),
        r2=r2,
        residual_sd=math.sqrt(s2),
        dof=dof,
        cov_slope_intercept=cov,
        n_points=n,
    )


def _prefix(v: NDArray) -> NDArray:
    return np.concatenate(([0.0], np.cumsum(v)))


def _search(
    x: NDArray, y: NDArray, w: NDArray, tol_v: float, min_points: int
) -> tuple[int, int, float] | None:
    """Widest window (i, j inclusive) whose LS line leaves every |residual| <= tol_v.

    Weighted least-squares line of every window of a given width from prefix sums, O(1)
    per window; widths are taken from the widest down, so only the widths above the
    answer are ever formed.
    """
    n = x.size
    s0, sx, sy = _prefix(w), _prefix(w * x), _prefix(w * y)
    sxx, sxy, syy = _prefix(w * x * x), _prefix(w * x * y), _prefix(w * y * y)
    tol2 = tol_v * tol_v
    w_min = float(w.min())
    for L in range(n, min_points - 1, -1):
        i = np.arange(0, n - L + 1)
        k = i + L
        W = s0[k] - s0[i]
        X = sx[k] - sx[i]
        Y = sy[k] - sy[i]
        with np.errstate(divide="ignore", invalid="ignore"):
            cxx = (sxx[k] - sxx[i]) - X * X / W
            cxy = (sxy[k] - sxy[i]) - X * Y / W
            cyy = (syy[k] - syy[i]) - Y * Y / W
            slope = cxy / cxx
            icpt = (Y - slope * X) / W
            sse = np.maximum(cyy - slope * cxy, 0.0)
            # necessary: weighted mean square <= tol^2; sufficient: SSE / min(w) <= tol^2
            maybe = sse <= tol2 * W * (1.0 + 1e-12)
            sure = sse / w_min <= tol2 * (1.0 - 1e-12)
        cand = i[maybe]
        if cand.size == 0:
            continue
        slope_c, icpt_c, sure_c = slope[maybe], icpt[maybe], sure[maybe]
        if L > 64 and cand.size > 8:
            # cheap first pass on 33 spread points (ends included): a window failing there
            # fails; only the survivors get the full check
            probe = np.unique(np.linspace(0, L - 1, 33).astype(np.intp))
            cols = cand[:, None] + probe[None, :]
            dev_p = np.abs(y[cols] - (slope_c[:, None] * x[cols] + icpt_c[:, None]))
            keep = (dev_p.max(axis=1) <= tol_v) | sure_c
            cand, slope_c, icpt_c, sure_c = cand[keep], slope_c[keep], icpt_c[keep], sure_c[keep]
            if cand.size == 0:
                continue
        xs = sliding_window_view(x, L)[cand]
        ys = sliding_window_view(y, L)[cand]
        dev = np.abs(ys - (slope_c[:, None] * xs + icpt_c[:, None]))
        max_dev = dev.max(axis=1)
        ok = (max_dev <= tol_v) | sure_c
        if np.any(ok):
            best = int(np.argmin(np.where(ok, max_dev, np.inf)))
            return int(cand[best]), int(cand[best] + L - 1), float(max_dev[best])
    return None


def linear_region(
    rail_v: ArrayLike,
    vpp_v: ArrayLike,
    u_vpp_v: ArrayLike | None = None,
    *,
    tol_v: float | None = None,
    tol_fraction_fs: float | None = None,
    min_points: int = 5,
    n_mc: int = 200,
    rng: np.random.Generator | int | None = 0,
) -> LinearRegion:
    """Widest contiguous rail range in which Vpp follows a straight line within tolerance.

    Method: exhaustive window search with least squares. Every contiguous window of at
    least ``min_points`` rail-sorted points gets its (weighted) least-squares line in O(1)
    from prefix sums; windows are examined from the widest down, pruned by the bound
    RMS <= max |residual|, and the first width with a window whose largest deviation from
    its own line is within ``tol`` wins (ties: the smallest deviation).

    Parameters
    ----------
    rail_v : array_like
        Rail voltages, V (any order).
    vpp_v : array_like
        Output peak-to-peak at each rail, V.
    u_vpp_v : array_like, optional
        Standard uncertainties of ``vpp_v``, V: weights 1/u^2 for the fits and the spread
        for the Monte Carlo range-end intervals. Without them the region's residual
        standard deviation is used for every point.
    tol_v : float, optional
        Largest accepted |Vpp - line|, V.
    tol_fraction_fs : float, optional
        The tolerance as a fraction of full scale, full scale = max(Vpp) - min(Vpp) over
        all points. Exactly one of ``tol_v`` and ``tol_fraction_fs`` is required.
    min_points : int
        Fewest points a region may have (>= 3).
    n_mc : int
        Monte Carlo trials for the range-end intervals (0 = grid bracket only).
    rng : numpy.random.Generator or int or None
        Random generator or seed for the Monte Carlo (seeded by default: reproducible).

    Returns
    -------
    LinearRegion

    Raises
    ------
    MeasurementError
        No window of ``min_points`` points meets the tolerance.

    Notes
    -----
    The range-end intervals come from repeating the search on ``n_mc`` copies of the data
    with each Vpp drawn from N(Vpp_i, u_i^2) (JCGM 101), then taking the 2.5 and 97.5 %
    points of the ends found, widened to the neighbouring rail points. The draws add their
    dispersion to the scatter already in the data, so the intervals lean wide
    (conservative). Cost: ``n_mc`` searches, e.g. about 0.15 s for 41 points and 1 s for
    400 points at the default 200; the search alone takes milliseconds.

    References
    ----------
    .. [3] IEEE Std 1241-2010 (INL against the best-fit line).
    .. [4] JCGM 101:2008 (Monte Carlo propagation, for the range-end intervals).
    """
    x, y = _as_xy(rail_v, vpp_v)
    if (tol_v is None) == (tol_fraction_fs is None):
        raise ValueError("give exactly one of tol_v= and tol_fraction_fs=")
    if int(min_points) < 3:
        raise ValueError(f"min_points={min_points!r} must be >= 3")
    min_points = int(min_points)
    if x.size < min_points:
        raise MeasurementError(f"{x.size} points, fewer than min_points={min_points}")
    order = np.argsort(x, kind="stable")
    x, y = x[order], y[order]
    if u_vpp_v is not None:
        u = np.asarray(u_vpp_v, dtype=np.float64)
        if u.shape != x.shape or np.any(~np.isfinite(u)) or np.any(u <= 0):
            raise ValueError("u_vpp_v must be finite, > 0 and of the length of rail_v")
        u = u[order]
        w = 1.0 / (u * u)
        w = w / w.mean()
    else:
        u = None
        w = np.ones_like(x)
    if tol_v is not None:
        tol = float(tol_v)
    else:
        tol = float(tol_fraction_fs) * float(np.ptp(y))
    if not math.isfinite(tol) or tol <= 0:
        raise ValueError(f"tolerance {tol!r} V must be > 0")
    # shift to the means: keeps the prefix sums well conditioned
    x0, y0 = float(x.mean()), float(y.mean())
    found = _search(x - x0, y - y0, w, tol, min_points)
    if found is None:
        raise MeasurementError(
            f"no {min_points} consecutive points lie on a straight line within {tol:.4g} V"
        )
    i, j, max_dev = found
    fit = linear_fit(x[i : j + 1], y[i : j + 1], w[i : j + 1])
    t975 = float(stats.t.ppf(0.975, fit.dof))
    slope_ci = (fit.slope - t975 * fit.u_slope, fit.slope + t975 * fit.u_slope)
    # grid bracket: the end lies between the last point in and the first point out
    lo_lo = float(x[i - 1]) if i > 0 else float(x[i])
    hi_hi = float(x[j + 1]) if j + 1 < x.size else float(x[j])
    lo_ci = [lo_lo, float(x[i])]
    hi_ci = [float(x[j]), hi_hi]
    if n_mc > 0:
        gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        sd = u if u is not None else np.full_like(x, fit.residual_sd)
        los, his = [], []
        for _ in range(int(n_mc)):
            ys = y + gen.normal(0.0, sd)
            r = _search(x - x0, ys - y0, w, tol, min_points)
            if r is not None:
                los.append(x[r[0]])
                his.append(x[r[1]])
        if los:
            q_lo = np.quantile(los, [0.025, 0.975])
            q_hi = np.quantile(his, [0.025, 0.975])
            lo_ci = [min(lo_ci[0], float(q_lo[0])), max(lo_ci[1], float(q_lo[1]))]
            hi_ci = [min(hi_ci[0], float(q_hi[0])), max(hi_ci[1], float(q_hi[1]))]
    return LinearRegion(
        lo_v=float(x[i]),
        hi_v=float(x[j]),
        slope_vpp_per_v=fit.slope,
        u_slope_vpp_per_v=fit.u_slope,
        intercept_vpp=fit.intercept,
        u_intercept_vpp=fit.u_intercept,
        r2=fit.r2,
        max_dev_v=max_dev,
        tol_v=tol,
        slope_ci95=slope_ci,
        lo_ci95=(lo_ci[0], lo_ci[1]),
        hi_ci95=(hi_ci[0], hi_ci[1]),
        n_points=j - i + 1,
        i_lo=i,
        i_hi=j,
        method=(
            "exhaustive window search with least squares (widest window, max |residual| <= "
            f"{tol:.4g} V); end intervals by Monte Carlo propagation, {int(n_mc)} trials"
        ),
    )
