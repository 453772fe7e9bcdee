"""Programmable DC supply driver: setpoints, protection, readback, settling and ramps."""

from __future__ import annotations

import math
from typing import Any

from benchctl.errors import InstrumentError, InstrumentTimeout, SafetyError

from .base import Instrument, register_driver

__all__ = ["Supply"]


@register_driver("supply")
class Supply(Instrument):
    """A DC supply driven through a dialect.

    Parameters
    ----------
    transport, dialect
        See :class:`~.base.Instrument`.
    max_voltage_v : float
        The highest setpoint this driver will ever send, V. A request above it raises
        :class:`~benchctl.errors.SafetyError` before anything is sent.
    channel : int or None
        Output channel, for dialects whose templates take ``{channel}``.
    **kwargs
        ``strict``, ``clock``, ``sleep``, ``query_retries`` (see Instrument).
    """

    uses = (
        "set_voltage", "get_voltage", "set_current_limit", "get_current_limit", "set_ovp",
        "get_ovp", "ovp_tripped", "ovp_clear", "output", "get_output", "measure_voltage",
        "measure_current", "questionable",
    )

    def __init__(self, transport: Any, dialect: Any, *, max_voltage_v: float, channel: int | None = None, **kwargs: Any) -> None:
        super().__init__(transport, dialect, **kwargs)
        if not (math.isfinite(max_voltage_v) and max_voltage_v > 0):
            raise ValueError(f"{max_voltage_v=} must be a finite voltage > 0")
        self._max_voltage_v = float(max_voltage_v)
        self._ch = {} if channel is None else {"channel": int(channel)}
        self._last_set: tuple[float, float] | None = None  # (clock s, setpoint V)

    @property
    def max_voltage_v(self) -> float:
        """The setpoint limit this driver was opened with, V (read-only)."""
        return self._max_voltage_v

    # ------------------------------------------------------------------ setpoints
    def _check_voltage(self, voltage_v: float, what: str) -> float:
        voltage_v = float(voltage_v)
        if not math.isfinite(voltage_v) or voltage_v < 0:
            raise SafetyError(f"{what} {voltage_v!r} V refused: must be a finite value >= 0", "", self.resource)
        if voltage_v > self.max_voltage_v:
            raise SafetyError(
                f"{what} {voltage_v:g} V refused: above the limit {self.max_voltage_v:g} V", "", self.resource
            )
        return voltage_v

    def set_voltage(self, voltage_v: float) -> None:
        """Program the voltage setpoint, V (SafetyError above ``max_voltage_v``, nothing sent)."""
        voltage_v = self._check_voltage(voltage_v, "setpoint")
        self.command("set_voltage", voltage_v=voltage_v, **self._ch)
        self._last_set = (self.clock(), voltage_v)

    def get_voltage(self) -> float:
        """Return the programmed voltage setpoint, V."""
        return float(self.ask("get_voltage", **self._ch))

    def set_current_limit(self, current_a: float) -> None:
        """Program the current limit, A (must be > 0)."""
        if not (math.isfinite(current_a) and current_a > 0):
            raise SafetyError(f"current limit {current_a!r} A refused: must be > 0", "", self.resource)
        self.command("set_current_limit", current_a=float(current_a), **self._ch)

    def get_current_limit(self) -> float:
        """Return the programmed current limit, A."""
        return float(self.ask("get_current_limit", **self._ch))

    def set_ovp(self, voltage_v: float) -> None:
        """Program the over-voltage protection level, V (finite, > 0)."""
        if not (math.isfinite(voltage_v) and voltage_v > 0):
            raise SafetyError(f"OVP level {voltage_v!r} V refused: must be > 0", "", self.resource)
        self.command("set_ovp", voltage_v=float(voltage_v), **self._ch)

    def get_ovp(self) -> float:
        """Return the over-voltage protection level, V."""
        return float(self.ask("get_ovp", **self._ch))

    def output(self, on: bool) -> None:
        """Switch the output relay; a point of consequence (errors are checked)."""
        self.command("output", state=bool(on), **self._ch)
        if not self.strict:
            self.check_errors()

    def is_output_on(self) -> bool:
        """True if the output relay is on."""
        return bool(self.ask("get_output", **self._ch))

    def protection_tripped(self) -> bool:
        """True if the over-voltage protection has tripped (latched)."""
        return bool(self.ask("ovp_tripped", **self._ch))

    def clear_protection(self) -> None:
        """Clear the over-voltage protection latch."""
        self.command("ovp_clear", **self._ch)

    # ------------------------------------------------------------------ readback
    def measure_voltage(self) -> float:
        """Return the measured output voltage, V."""
        return float(self.ask("measure_voltage", **self._ch))

    def measure_current(self) -> float:
        """Return the measured output current, A."""
        return float(self.ask("measure_current", **self._ch))

    def readback(self) -> tuple[float, float]:
        """Return the measured output (voltage V, current A), one message where it can be."""
        volts, amps = self.ask_many("measure_voltage", "measure_current", **self._ch)
        return float(volts), float(amps)

    def protection_checked(self) -> bool:
        """:meth:`protection_tripped` with the error queue's first entry in the same message.

        Raises
        ------
        InstrumentError
            The queue held an error (it is then read empty).
        """
        return bool(self.ask_checked("ovp_tripped", **self._ch))

    def wait_settled(self, target_v: float, *, tol_v: float, timeout_s: float, poll_s: float = 0.01) -> float:
        """Poll the voltage readback until it is within ``tol_v`` of ``target_v``.

        Parameters
        ----------
        target_v : float
            Expected output voltage, V.
        tol_v : float
            Accepted deviation, V (> 0).
        timeout_s : float
            Give up after this long, s.
        poll_s : float
            Pause between readings, s.

        Returns
        -------
        float
            The settled reading, V.

        Raises
        ------
        InstrumentTimeout
            Not within tolerance in time (the message gives the last reading).
        InstrumentError
            Not within tolerance because the over-voltage protection has tripped.
        """
        if not tol_v > 0:
            raise ValueError(f"{tol_v=} must be > 0")
        if not timeout_s > 0:
            raise ValueError(f"{timeout_s=} must be > 0")
        deadline = self.clock() + timeout_s
        reading_v = math.nan
        while True:
            # each reading comes with the error queue's first entry (one message)
            reading_v = float(self.ask_checked("measure_voltage", **self._ch))
            if abs(reading_v - target_v) <= tol_v:
                return reading_v
            if self.clock() >= deadline:
                break
            self.sleep(poll_s)
        if self.protection_tripped():  # the real reason it will never settle
            raise InstrumentError(
                0,
                f"over-voltage protection tripped; the supply output is off (settling at {target_v:g} V, "
                f"last reading {reading_v:g} V)",
                "",
                self.resource,
            )
        raise InstrumentTimeout(
            f"supply not settled at {target_v:g} V +/- {tol_v:g} V (last reading {reading_v:g} V)",
            "",
            self.resource,
            timeout_s,
        )

    def ramp_to(self, voltage_v: float, *, rate_v_per_s: float, step_v: float = 0.1) -> None:
        """Move the setpoint to ``voltage_v`` in steps, never faster than ``rate_v_per_s``.

        The target is checked against ``max_voltage_v`` before anything is sent. Each step
        of at most ``step_v`` is followed by a pause of ``step / rate`` s (timed with the
        injected clock, so the time spent in the exchange counts).
        """
        target_v = self._check_voltage(voltage_v, "ramp target")
        if not (math.isfinite(rate_v_per_s) and rate_v_per_s > 0):
            raise ValueError(f"{rate_v_per_s=} must be > 0")
        if not step_v > 0:
            raise ValueError(f"{step_v=} must be > 0")
        now_v = self.get_voltage()
        span_v = target_v - now_v
        n_steps = max(1, math.ceil(abs(span_v) / step_v - 1e-9))
        dwell_s = abs(span_v) / n_steps / rate_v_per_s
        # A step right after an earlier setpoint change waits too, so back-to-back ramps
        # keep to the rate.
        t_last = self._last_set[0] if self._last_set else -math.inf
        for k in range(1, n_steps + 1):
            wait_s = dwell_s - (self.clock() - t_last)
            if wait_s > 0:
                self.sleep(wait_s)
            t_last = self.clock()
            point_v = target_v if k == n_steps else now_v + span_v * k / n_steps
            self.command("set_voltage", voltage_v=point_v, **self._ch)
            self._last_set = (t_last, point_v)
        if not self.strict:
            self.check_errors()
