"""The simulator's fast paths agree with its general ones.

Readbacks and setpoint changes are worked out in floats, a record of a settled rail skips
the supply's lag, a multi-piece reply goes out in one gathering send, and a real-time record
is made once the arming message has been answered. Each check compares the fast path with
the general code it stands for (the numpy trajectory, the array current law, the bytes
the client receives).
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchctl.simulated import BenchPhysics, SimulatedBench
from benchctl.simulated.models import load_board
from benchctl.simulated.physics import SupplyState
from benchctl.simulated.server import _send_parts

_volts = st.floats(min_value=0.0, max_value=30.0, allow_nan=False)
_gaps = st.floats(min_value=0.0, max_value=2e-3, allow_nan=False)


@settings(max_examples=60, deadline=None)
@given(moves=st.lists(st.tuples(_gaps, _volts), min_size=1, max_size=6),
       probes=st.lists(st.floats(min_value=0.0, max_value=15e-3, allow_nan=False),
                       min_size=1, max_size=8))
def test_the_float_trajectory_is_the_array_trajectory(moves, probes) -> None:
    s = SupplyState(BenchPhysics())
    t = 0.0
    for gap, target in moves:
        t += gap
        s.retarget(t, target)
    ph = s.ph
    grid = np.sort(np.asarray(probes))
    as_array = s.output_v(grid)
    for tq, v in zip(grid, as_array, strict=True):
        i = max(int(np.searchsorted([g.t0 for g in s.segments], tq, side="right")) - 1, 0)
        general, _ = s.segments[i].eval(np.asarray(tq), ph.slew_v_per_s, ph.settle_tau_s)
        assert s.output_v(float(tq)) == pytest.approx(float(general), rel=1e-12, abs=1e-12)
        assert v == pytest.approx(float(general), rel=1e-12, abs=1e-12)


def test_a_settled_record_takes_the_target_the_lag_would_give() -> None:
    s = SupplyState(BenchPhysics())
    s.retarget(0.0, 4.2)
    ph = s.ph
    t = np.linspace(5e-3, 6e-3, 1000)  # 4.2 V at 20 V/ms is 0.21 ms, then 50 us lags
    seg = s.segments[-1]
    general, _ = seg.eval(t, ph.slew_v_per_s, ph.settle_tau_s)
    np.testing.assert_array_equal(s.output_v(t), general)  # the shortcut gives the same floats
    early = np.linspace(0.1e-3, 0.5e-3, 50)  # still slewing and lagging: the general path
    np.testing.assert_array_equal(s.output_v(early), seg.eval(early, ph.slew_v_per_s, ph.settle_tau_s)[0])


@pytest.mark.parametrize("board", ["beacon", "buffer", "replay"])
def test_the_float_current_law_is_the_array_law(board) -> None:
    model = load_board(board)
    for rail in (0.0, 0.3, 0.7, 1.2, 2.5, 4.9, 6.0):
        for on in (True, False):
            array = np.asarray(model.current_at(np.array([rail]), np.array([on])))[0]
            assert model.current_at(rail, on) == pytest.approx(float(array), rel=1e-12, abs=1e-15)


class _PartialConn:
    """A socket whose sendmsg takes only ``first`` bytes (the kernel may take less)."""

    def __init__(self, first: int) -> None:
        self.first = first
        self.out = bytearray()

    def sendmsg(self, parts) -> int:
        whole = b"".join(bytes(p) for p in parts)
        self.out += whole[: self.first]
        return min(self.first, len(whole))

    def sendall(self, data) -> None:
        self.out += bytes(data)


@pytest.mark.parametrize("first", [0, 1, 5, 6, 9, 10, 1000])
def test_a_partly_taken_gathering_send_sends_the_rest_in_order(first) -> None:
    parts = [b"1;", memoryview(b"#15abcde"), b"\n"]
    conn = _PartialConn(first)
    _send_parts(conn, parts)
    assert bytes(conn.out) == b"1;#15abcde\n"


def test_a_realtime_record_is_made_and_encoded_after_the_arming_reply(visa) -> None:
    with SimulatedBench(board="beacon", seed=2, realtime=True) as sim:
        sup, scope = visa(sim.resources["supply"]), visa(sim.resources["scope"])
        assert sup.query("VOLT 5;CURR 0.1;:OUTP ON;*OPC?") == "1"
        scope.write("SENS1:VOLT:RANG 4;:SENS:SWE:TIME 0.05;POIN 2000;:FORM INT,16")
        assert scope.query("INIT;:SYST:ERR?") == '0,"No error"'
        bm = sim.bench
        made = None
        deadline = time.monotonic() + 2.0
        for _ in range(200):  # bounded: the record is made right after the reply
            a = bm.acq
            if a is not None and a.early is not None:
                made = a.early[1]
                break
            if time.monotonic() > deadline:
                break
            time.sleep(0.005)
        assert made is not None, "no record was made while the 50 ms acquisition ran"
        assert bm.measuring()  # made before the acquisition's modelled end
        assert (1, 16, True) in made.cache  # already encoded in the format asked for
        assert scope.query("*OPC?") == "1"
        block = bytes(made.cache[(1, 16, True)])
        scope.write("TRAC? CH1")
        got = scope.read_bytes(len(block) + 1)  # the codes may hold the terminator byte
        assert got == block + b"\n"  # the block the client gets is the one made early
        assert bm.record is made
        codes = np.frombuffer(got[2 + int(chr(got[1])):-1], dtype=">i2")
        assert codes.size == 2000 and np.all(codes % 256 == 0)  # INTeger,16: the 8-bit code x 256
        assert np.ptp(codes.astype(np.int64)) > 256 * 20  # the running board's output, not a flat line
