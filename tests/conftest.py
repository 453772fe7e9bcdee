"""Shared test fixtures.

``sim_bench`` yields a started ``SimulatedBench(board="beacon", seed=1)`` (accelerated
time, ephemeral loopback ports). ``visa`` opens pyvisa-py SOCKET sessions to it with the
termination characters set and TCP_NODELAY on the client socket, and closes them after
the test.
"""

from __future__ import annotations

import socket

import pytest


@pytest.fixture
def sim_bench():
    """A started simulated bench: beacon board, revision B, serial B0001, seed 1."""
    from benchctl.simulated import SimulatedBench

    with SimulatedBench(board="beacon", seed=1) as sim:
        yield sim


def set_nodelay(inst) -> None:
    """Turn off Nagle on a pyvisa-py SOCKET session (guarded: internal attribute)."""
    try:
        sess = inst.visalib.sessions[inst.session]
        sess.interface.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    except (AttributeError, KeyError, OSError):
        pass


@pytest.fixture
def visa():
    """``visa(resource, timeout_ms=2000) -> pyvisa resource``; all closed after the test."""
    import pyvisa

    rm = pyvisa.ResourceManager("@py")
    opened = []

    def open_(resource: str, timeout_ms: int = 2000):
        inst = rm.open_resource(resource, read_termination="\n", write_termination="\n",
                                timeout=timeout_ms)
        set_nodelay(inst)
        opened.append(inst)
        return inst

    yield open_
    for inst in opened:
        try:
            inst.close()
        except Exception:  # noqa: BLE001 - a session the test already broke
            pass
    # The resource manager is not closed: pyvisa hands every caller of
    # ResourceManager("@py") the same live instance, and the drivers' transport holds it too.
