"""Function generator driver: shape, frequency, amplitude, offset, output."""

from __future__ import annotations

import math
from typing import Any, Literal

from .base import Instrument, register_driver
from .dialect import WORDS

__all__ = ["Generator", "Shape"]

Shape = Literal["sine", "square", "triangle", "dc"]


@register_driver("generator")
class Generator(Instrument):
    """A function generator driven through a dialect.

    Parameters
    ----------
    transport, dialect
        See :class:`~.base.Instrument`.
    channel : int
        Output channel, default 1.
    """

    uses = (
        "set_shape", "get_shape", "set_frequency", "get_frequency", "set_amplitude",
        "get_amplitude", "set_offset", "get_offset", "output", "get_output",
    )

    def __init__(self, transport: Any, dialect: Any, *, channel: int = 1, **kwargs: Any) -> None:
        super().__init__(transport, dialect, **kwargs)
        self.channel = int(channel)

    def set_shape(self, shape: Shape) -> None:
        """Set the waveform shape: "sine", "square", "triangle" or "dc"."""
        if shape not in WORDS["shape"]:
            raise ValueError(f"{shape=} must be one of {WORDS['shape']}")
        self.command("set_shape", shape=shape, channel=self.channel)

    def set_frequency(self, freq_hz: float) -> None:
        """Set the frequency, Hz (> 0)."""
        if not (math.isfinite(freq_hz) and freq_hz > 0):
            raise ValueError(f"{freq_hz=} must be > 0")
        self.command("set_frequency", freq_hz=float(freq_hz), channel=self.channel)

    def frequency(self) -> float:
        """Return the programmed frequency, Hz."""
        return float(self.ask("get_frequency", channel=self.channel))

    def set_amplitude(self, vpp_v: float) -> None:
        """Set the amplitude, V peak-to-peak into high impedance (>= 0)."""
        if not (math.isfinite(vpp_v) and vpp_v >= 0):
            raise ValueError(f"{vpp_v=} must be >= 0")
        self.command("set_amplitude", vpp_v=float(vpp_v), channel=self.channel)

    def amplitude(self) -> float:
        """Return the programmed amplitude, Vpp."""
        return float(self.ask("get_amplitude", channel=self.channel))

    def set_offset(self, offset_v: float) -> None:
        """Set the DC offset, V."""
        if not math.isfinite(offset_v):
            raise ValueError(f"{offset_v=} must be finite")
        self.command("set_offset", offset_v=float(offset_v), channel=self.channel)

    def offset(self) -> float:
        """Return the programmed offset, V."""
        return float(self.ask("get_offset", channel=self.channel))

    def output(self, on: bool) -> None:
        """Switch the output; a point of consequence (errors are checked)."""
        self.command("output", state=bool(on), channel=self.channel)
        if not self.strict:
            self.check_errors()

    def is_output_on(self) -> bool:
        """True if the output is on."""
        return bool(self.ask("get_output", channel=self.channel))
