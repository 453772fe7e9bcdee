"""Instrument drivers: transport, generic SCPI drivers driven by dialect files, bench file.

Nothing above this package imports pyvisa; the transport converts every pyvisa and OS
error into :mod:`benchctl.errors`.
"""

from .base import DRIVERS, Instrument, register_driver
from .bench import (
    Bench,
    BenchConfig,
    RoleConfig,
    Wiring,
    load_bench_file,
    load_bench_text,
    open_bench,
)
from .dialect import Dialect, Identity, load_dialect, register_dialect, shipped_dialects
from .generator import Generator
from .scope import AutoscaleResult, Scope, Waveform
from .supply import Supply
from .transport import Transport, open_resource

__all__ = [
    "DRIVERS",
    "AutoscaleResult",
    "Bench",
    "BenchConfig",
    "Dialect",
    "Generator",
    "Identity",
    "Instrument",
    "RoleConfig",
    "Scope",
    "Supply",
    "Transport",
    "Waveform",
    "Wiring",
    "load_bench_file",
    "load_bench_text",
    "load_dialect",
    "open_bench",
    "open_resource",
    "register_dialect",
    "register_driver",
    "shipped_dialects",
]
