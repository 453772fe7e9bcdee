"""A read-only look at a real bench: skipped unless BENCHCTL_HARDWARE_BENCH names a bench file.

Nothing here changes an output: it identifies the three instruments, reads the supply's
programmed limits and readback, and checks the answers are physical numbers.
"""

from __future__ import annotations

import math
import os

import pytest

from benchctl.drivers import load_bench_file, open_bench

BENCH_FILE = os.environ.get("BENCHCTL_HARDWARE_BENCH", "")

pytestmark = [
    pytest.mark.hardware,
    pytest.mark.skipif(not BENCH_FILE, reason="set BENCHCTL_HARDWARE_BENCH to a bench file"),
]


def test_real_bench_identifies_and_reads_back() -> None:
    cfg = load_bench_file(BENCH_FILE)
    with open_bench(cfg, max_voltage_v=1.0, strict=True) as bench:
        for role, idn in bench.idn.items():
            assert idn.maker and idn.model, role  # IEEE 488.2 10.14: four fields, maker first
        v = bench.supply.measure_voltage()
        i = bench.supply.measure_current()
        assert math.isfinite(v) and math.isfinite(i)
        assert bench.supply.get_current_limit() > 0
