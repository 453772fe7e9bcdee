"""Threshold voltages (dropout, start-up) from on/off observations along the rail.

References
----------
.. [1] JCGM 100:2008 (GUM), 4.3.7: a quantity known only to lie in [a, b] has a
       rectangular distribution, standard uncertainty (b - a) / sqrt(12).
.. [2] D. J. Finney, "Probit Analysis", 3rd ed., Cambridge University Press, 1971 (the
       median effective dose of a binary response curve and its interval); here with the
       logistic link, fitted by maximum likelihood (iteratively reweighted least squares,
       P. McCullagh and J. A. Nelder, "Generalized Linear Models", 2nd ed., 1989, 4.4).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.errors import MeasurementError

__all__ = ["Threshold", "threshold_bracket", "threshold_logistic"]

_Z975 = 1.959963984540054  # standard normal 97.5 % quantile


@dataclass(frozen=True, slots=True)
class Threshold:
    """A threshold rail voltage and the interval that holds it.

    Attributes
    ----------
    value_v : float
        Best estimate, V (bracket midpoint, or the 50 % point of the logistic fit).
    low_v, high_v : float
        Interval, V: the bracketing observations, or the 95 % interval of the fit.
    u_v : float
        Standard uncertainty of ``value_v``, V.
    width_v : float
        Logistic scale: rail change from 50 % to 73 % probability, V (0 for a bracket).
    method : str
        ``"bracket"`` or ``"logistic"`` with details.
    """

    value_v: float
    low_v: float
    high_v: float
    u_v: float
    width_v: float
    method: str


def _prepare(
    rail_v: ArrayLike, state: ArrayLike, on_above: bool
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    x = np.asarray(rail_v, dtype=np.float64)
    s = np.asarray(state, dtype=bool)
    if x.ndim != 1 or x.shape != s.shape:
        raise ValueError(f"rail_v and state must be 1-D of equal length: {x.shape}, {s.shape}")
    if not np.all(np.isfinite(x)):
        raise MeasurementError("rail_v holds non-finite values")
    if x.size < 2:
        raise MeasurementError(f"{x.size} observations cannot bracket a threshold")
    order = np.argsort(x, kind="stable")
    x, s = x[order], s[order]
    if not on_above:
        s = ~s
    if s.all() or not s.any():
        word = "on" if s.all() == on_above else "off"
        raise MeasurementError(
            f"no transition: the board is {word} at every rail from {x[0]:.4g} to {x[-1]:.4g} V"
        )
    return x, s


def threshold_bracket(
    rail_v: ArrayLike, state: ArrayLike, *, on_above: bool = True
) -> Threshold:
    """Threshold from bracketing observations.

    The threshold lies above the highest rail below which every observation is "off"
    and below the lowest rail above which every observation is "on"; observations in
    between (noisy detection) widen the interval. The value is the midpoint, with the
    rectangular standard uncertainty (high - low) / sqrt(12) (GUM 4.3.7).

    Parameters
    ----------
    rail_v : array_like
        Rail voltages, V.
    state : array_like of bool
        True where the board was oscillating (or whatever "on" means).
    on_above : bool
        True when "on" is expected at the high rails (dropout and start-up both are).

    Raises
    ------
    MeasurementError
        No transition in the data.
    """
    x, s = _prepare(rail_v, state, on_above)
    # last index of the all-off prefix and first index of the all-on suffix
    first_on = int(np.argmax(s))
    last_off = int(s.size - 1 - np.argmax(~s[::-1]))
    low = float(x[first_on - 1]) if first_on > 0 else float(x[0])
    high = float(x[last_off + 1]) if last_off + 1 < x.size else float(x[-1])
    # the all-off prefix ends at first_on - 1; the all-on suffix starts at last_off + 1
    mixed = last_off > first_on
    return Threshold(
        value_v=0.5 * (low + high),
        low_v=low,
        high_v=high,
        u_v=(high - low) / math.sqrt(12.0),
        width_v=0.0,
        method="bracket" + (" (mixed observations inside)" if mixed else ""),
    )


def _logistic_mle(x: NDArray, s: NDArray, max_iter: int = 100) -> tuple[NDArray, NDArray, bool]:
    """Logistic regression P(on) = 1 / (1 + exp(-(b0 + b1 x))) by Newton-Raphson (IRLS).

    Returns (beta, covariance = inverse Fisher information, converged).
    """
    X = np.column_stack([np.ones_like(x), x])
    beta = np.zeros(2)
    yv = s.astype(np.float64)
    converged = False
    info = np.eye(2)
    for _ in range(max_iter):
        eta = X @ beta
        p = 0.5 * (1.0 + np.tanh(0.5 * eta))  # overflow-free logistic
        wgt = p * (1.0 - p)
        info = X.T @ (X * wgt[:, None])
        grad = X.T @ (yv - p)
        try:
            step = np.linalg.solve(info, grad)
        except np.linalg.LinAlgError:
            break
        beta = beta + step
        if np.max(np.abs(step)) < 1e-10 * (1.0 + np.max(np.abs(beta))):
            converged = True
            break
        if np.max(np.abs(beta)) > 1e8:
            break
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        cov = np.full((2, 2), np.inf)
    return beta, cov, converged


def threshold_logistic(
    rail_v: ArrayLike, state: ArrayLike, *, on_above: bool = True
) -> Threshold:
    """Threshold as the 50 % point of a logistic fit, for noisy detection near threshold.

    Fits P(on | V) = 1 / (1 + exp(-(V - V50) / s)) by maximum likelihood. The interval is
    V50 +/- 1.96 u with u from the inverse Fisher information by the delta method
    (V50 = -b0 / b1).

    When the observations are separable (every "off" below every "on"), the maximum
    likelihood estimate does not exist; the bracket of :func:`threshold_bracket` is
    returned instead and the ``method`` says so.

    Parameters
    ----------
    rail_v : array_like
        Rail voltages, V (repeats at one rail are welcome).
    state : array_like of bool
        Observed state at each rail.
    on_above : bool
        True when "on" is expected at the high rails.
    """
    x, s = _prepare(rail_v, state, on_above)
    first_on = int(np.argmax(s))
    last_off = int(s.size - 1 - np.argmax(~s[::-1]))
    if x[last_off] <= x[first_on]:  # (quasi-)complete separation
        br = threshold_bracket(x, s)
        return Threshold(br.value_v, br.low_v, br.high_v, br.u_v, 0.0,
                         "bracket (observations separable: logistic MLE does not exist)")
    xm = float(x.mean())
    xs = float(x.std()) or 1.0
    beta, cov, converged = _logistic_mle((x - xm) / xs, s)
    b0, b1 = float(beta[0]), float(beta[1])
    if not converged or b1 <= 0.0:
        raise MeasurementError(
            "logistic fit did not converge (on/off observations show no rising trend)"
        )
    v50_std = -b0 / b1
    grad = np.array([-1.0 / b1, b0 / (b1 * b1)])
    u_std = math.sqrt(max(float(grad @ cov @ grad), 0.0))
    v50 = xm + xs * v50_std
    u = xs * u_std
    return Threshold(
        value_v=v50,
        low_v=v50 - _Z975 * u,
        high_v=v50 + _Z975 * u,
        u_v=u,
        width_v=xs / b1,
        method="logistic maximum likelihood, delta-method interval",
    )
