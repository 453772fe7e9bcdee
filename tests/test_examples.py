"""The shipped examples are valid, and the example plan runs to a pass on the simulated bench."""

from __future__ import annotations

import io
import json
from pathlib import Path

from rich.console import Console

from benchctl.cli import main
from benchctl.drivers import load_bench_file
from benchctl.runner.commands import demo_plan_text
from benchctl.runner.plan import load_plan, parse_plan
from benchctl.simulated import SimulatedBench

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"


def test_example_files_validate():
    plan = load_plan(EXAMPLES / "beacon_plan.toml")
    assert [s.procedure for s in plan.steps] == ["rail_sweep", "dropout_startup", "linear_region",
                                                 "modulation", "pushing", "startup_time"]
    bench = load_bench_file(EXAMPLES / "lan_bench.toml")
    assert bench.roles["scope"].resource.startswith("TCPIP::192.168.")


def test_demo_plan_covers_all_six_procedures():
    class Args:
        board, revision, serial = "beacon", "B", "B0001"

    plan = parse_plan(demo_plan_text(Args()), file="<demo>")
    assert len({s.procedure for s in plan.steps}) == 6


def test_example_plan_passes_on_the_simulated_revision_c(tmp_path):
    with SimulatedBench(board="beacon", revision="C", serial="C0007", seed=2) as sim:
        bench = sim.write_bench(tmp_path / "bench.toml")
        out = io.StringIO()
        code = main(["run", str(EXAMPLES / "beacon_plan.toml"), "--bench", str(bench), "--out",
                     str(tmp_path / "run"), "--quiet"], console=Console(file=out, width=120))
        truth = sim.truth
    assert code == 0, out.getvalue()
    params = json.loads((tmp_path / "run" / "parameters.json").read_text())
    # Revision C's dropout is 0.1 V below revision B's (the board file); the bisection
    # brackets the unit's true value to 5 mV plus the supply's 1 mV readback step.
    p = params["thresholds.dropout_v"]
    assert p["low"] - 0.002 <= truth.dropout_v <= p["high"] + 0.002
