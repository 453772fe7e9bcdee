"""Simulated bench: SCPI servers on loopback for a DC supply, a function generator and an
oscilloscope, wired to simulated boards (oscillator, amplifier, table-driven replay).

Public API: :class:`SimulatedBench` (context manager), :func:`load_board`, the truth
containers :class:`OscillatorTruth` and :class:`AmplifierTruth`, and :class:`BenchPhysics`.
"""

from benchctl.simulated.bench import ROLES, SimulatedBench, parse_fault
from benchctl.simulated.models import (
    BUILTIN_BOARDS,
    AmplifierTruth,
    OscillatorTruth,
    board_kinds,
    load_board,
    register_kind,
)
from benchctl.simulated.physics import BenchPhysics

__all__ = [
    "BUILTIN_BOARDS",
    "ROLES",
    "AmplifierTruth",
    "BenchPhysics",
    "OscillatorTruth",
    "SimulatedBench",
    "board_kinds",
    "load_board",
    "parse_fault",
    "register_kind",
]
