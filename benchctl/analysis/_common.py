"""Shared result type and input checks for the analysis package (no I/O)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from benchctl.errors import MeasurementError

__all__ = ["Estimate"]


@dataclass(frozen=True, slots=True)
class Estimate:
    """One estimated quantity with its standard uncertainty.

    Attributes
    ----------
    value : float
        The estimate, in ``unit``.
    u : float
        Standard uncertainty (one standard deviation, GUM k = 1), in ``unit``.
    unit : str
        Unit of ``value`` and ``u`` (e.g. ``"V"``, ``"Hz"``).
    method : str
        How the value was obtained, in words a report can print.
    """

    value: float
    u: float
    unit: str
    method: str

    def __float__(self) -> float:
        return float(self.value)


def as_record(y: ArrayLike, *, name: str = "y", min_samples: int = 2) -> NDArray[np.float64]:
    """Return ``y`` as a finite 1-D float64 array, or raise :class:`MeasurementError`."""
    arr = np.asarray(y, dtype=np.float64)
    if arr.ndim != 1:
        raise MeasurementError(f"{name} must be a 1-D record, got shape {arr.shape}")
    if arr.size < min_samples:
        raise MeasurementError(
            f"{name} has {arr.size} samples; at least {min_samples} are needed"
        )
    if not np.all(np.isfinite(arr)):
        bad = int(np.count_nonzero(~np.isfinite(arr)))
        raise MeasurementError(f"{name} holds {bad} non-finite samples (NaN or inf)")
    return arr


def check_positive(name: str, value: float) -> float:
    """Return ``value`` as float if it is finite and > 0, else raise ValueError."""
    v = float(value)
    if not math.isfinite(v) or v <= 0.0:
        raise ValueError(f"{name}={value!r} must be a finite number > 0")
    return v


def db20(ratio: float) -> float:
    """20*log10(ratio), with -inf for 0 and +inf for inf."""
    if ratio <= 0.0:
        return -math.inf
    return 20.0 * math.log10(ratio)


def db10(ratio: float) -> float:
    """10*log10(ratio), with -inf for 0."""
    if ratio <= 0.0:
        return -math.inf
    return 10.0 * math.log10(ratio)
