"""The main job end to end: `benchctl run` through pyvisa-py sockets to the simulated bench.

Checks the reported parameters against the simulated board's ground truth, that bad input
sends nothing to any instrument, that every injected fault class ends with the bench in its
safe state (read on the simulated supply and generator), the data on disk intact and exit 3,
and that a resumed run gives the same parameters as an uninterrupted one with the same seed.
"""

from __future__ import annotations

import io
import json
import math
import os
import signal
import subprocess
import sys
import threading
import time

import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from rich.console import Console

from benchctl.cli import main
from benchctl.errors import ConfigErrors
from benchctl.runner.plan import parse_plan
from benchctl.simulated import SimulatedBench
from benchctl.store import RunFolder

# A short plan: every procedure, small sweeps, so one run takes a few seconds.
PLAN = """
[board]
name = "beacon"
revision = "B"
serial = "B0001"

[limits]
max_rail_v = 6.0
current_limit_a = 0.05
ovp_v = 6.5
ramp_v_per_s = 50.0

[[steps]]
procedure = "rail_sweep"
name = "sweep"
[steps.params]
start_v = 2.2
stop_v = 5.8
step_v = 0.2
down = true

[[steps]]
procedure = "dropout_startup"
name = "thresholds"
[steps.params]
lo_v = 2.0
hi_v = 4.0
resolution_v = 0.005

[[steps]]
procedure = "linear_region"
name = "linear"
[steps.params]
start_v = 3.0
stop_v = 5.8
step_v = 0.1

[[steps]]
procedure = "pushing"
name = "pushing"
[steps.params]
source = "sweep"
[steps.spec]
pushing_hz_per_v = { min = 0.0 }
"""

QUIET = ["--quiet"]


def _run(argv):
    out = io.StringIO()
    code = main(argv, console=Console(file=out, width=120))
    return code, out.getvalue()


def _bench_file(sim, tmp_path, timeout_s=5.0, name="bench.toml"):
    text = sim.bench_toml().replace("timeout_s = 5.0", f"timeout_s = {timeout_s}")
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _plan_file(tmp_path, text=PLAN, name="plan.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _assert_safe(sim):
    supply, gen = sim.supply_state(), sim.generator_state()
    assert supply["output_on"] is False, supply
    assert gen["output_on"] is False, gen
    assert supply["setpoint_v"] <= 0.05, supply  # ramped down before switching off


def _assert_intact(run_dir):
    folder = RunFolder.open(run_dir)
    assert folder.damage == ()  # no torn or merged lines
    rows = [{**r, "_step": name} for i, name in folder.steps() for r in folder.points(i, name)]
    return folder, rows


def _rows_of(run_dir, step):
    folder = RunFolder.open(run_dir)
    return sum(len(folder.points(i, name)) for i, name in folder.steps() if name == step)


@pytest.mark.parametrize("seed", [1, 5])
def test_run_reports_the_boards_truth(tmp_path, seed):
    with SimulatedBench(board="beacon", revision="B", serial="B0001", seed=seed) as sim:
        code, text = _run(["run", str(_plan_file(tmp_path)), "--bench", str(_bench_file(sim, tmp_path)),
                           "--out", str(tmp_path / "run"), *QUIET])
        truth = sim.truth
        _assert_safe(sim)
    assert code == 0, text
    params = json.loads((tmp_path / "run" / "parameters.json").read_text())
    # Bisection to 5 mV: the truth lies inside the reported bracket widened by the rail
    # readback noise and resolution of the simulated supply (0.5 mV rms, 1 mV steps).
    for name, true_v in (("thresholds.dropout_v", truth.dropout_v), ("thresholds.startup_v", truth.startup_v)):
        p = params[name]
        assert p["low"] - 0.003 <= true_v <= p["high"] + 0.003, (name, p, true_v)
        assert abs(p["value"] - true_v) <= 0.006
    # Supply sensitivity: a least-squares slope over >= 15 points of sine-fit Vpp with
    # 0.1 % noise; 2 % covers the compression the tolerance admits at the region's ends.
    assert params["supply_sensitivity_vpp_per_v"]["value"] == pytest.approx(truth.slope_vpp_per_v, rel=0.02)
    # Pushing is linear in the simulated board's frequency law; the sine fit's frequency
    # error is far below 1 Hz at these record lengths, so 2 % is loose.
    assert params["pushing_hz_per_v"]["value"] == pytest.approx(truth.pushing_hz_per_v, rel=0.02)
    assert params["pushing_hz_per_v"]["verdict"] == "pass"
    meta = json.loads((tmp_path / "run" / "run.json").read_text())
    assert meta["status"] == "complete" and meta["exit_code"] == 0
    assert set(meta["instruments"]) == {"supply", "generator", "scope"}
    assert (tmp_path / "run" / "report" / "index.html").exists()


def test_a_failed_spec_limit_gives_exit_1(tmp_path):
    plan = PLAN.replace("pushing_hz_per_v = { min = 0.0 }", "pushing_hz_per_v = { max = 10.0 }")
    with SimulatedBench(seed=2) as sim:
        code, text = _run(["run", str(_plan_file(tmp_path, plan)), "--bench", str(_bench_file(sim, tmp_path)),
                           "--out", str(tmp_path / "run"), *QUIET])
        _assert_safe(sim)
    assert code == 1, text
    assert "spec failed: pushing_hz_per_v" in text


def test_bad_plan_and_bench_are_all_reported_and_nothing_is_sent(tmp_path):
    bad_plan = PLAN.replace("max_rail_v = 6.0", "max_rail_v = 5.0").replace("step_v = 0.2", "step_v = -1")
    with SimulatedBench(seed=1) as sim:
        bench = _bench_file(sim, tmp_path).read_text().replace('generator = "rail"', 'generator = "sideways"')
        bench_path = tmp_path / "bad_bench.toml"
        bench_path.write_text(bench)
        code, text = _run(["run", str(_plan_file(tmp_path, bad_plan)), "--bench", str(bench_path),
                           "--out", str(tmp_path / "run")])
        sent = {role: sim.command_log(role) for role in ("supply", "generator", "scope")}
    assert code == 2
    lines = [ln for ln in text.splitlines() if ln.startswith("benchctl: ")]
    assert any("plan.toml: steps[0].params.stop_v" in ln and "max_rail_v" in ln for ln in lines), text
    assert any("steps[0].params.step_v" in ln for ln in lines), text
    assert any("bad_bench.toml" in ln and "wiring.generator" in ln for ln in lines), text
    assert sent == {"supply": [], "generator": [], "scope": []}
    assert not (tmp_path / "run").exists()


def _run_in_thread(argv):
    result = {}

    def target():
        result["code"], result["text"] = _run(argv)

    th = threading.Thread(target=target, daemon=True)
    th.start()
    return th, result


def _wait_for_points(run_dir, n, timeout_s=30.0):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        files = list((run_dir / "points").glob("*.csv")) if (run_dir / "points").exists() else []
        lines = sum(max(0, len(f.read_text().splitlines()) - 1) for f in files)
        if lines >= n:
            return
        time.sleep(0.02)
    raise AssertionError(f"no {n} points in {run_dir} within {timeout_s} s")


# Every fault class of the simulated bench, injected while the sweep is running. Counts are
# high enough to outlast the drivers' bounded retries of idempotent queries (a single late or
# truncated reply is recovered, rightly).
FAULTS = [
    ("scope", "drop_after", {"n": 3}, "ConnectionLost"),
    ("supply", "drop_after", {"n": 2}, "ConnectionLost"),
    ("scope", "delay", {"seconds": 1.5, "count": 10}, "InstrumentTimeout"),
    ("scope", "stall", {}, "InstrumentTimeout"),
    ("scope", "corrupt_block", {"count": 10}, "ProtocolError"),
    ("scope", "truncate", {"count": 10}, "instrument fault"),
    ("generator", "push_error", {"code": -222, "message": "Data out of range"}, "-222"),
    ("supply", "trip_ovp", {}, "protection tripped"),
]


@pytest.mark.parametrize(("role", "fault", "kw", "words"), FAULTS, ids=[f"{r}-{f}" for r, f, _, _ in FAULTS])
def test_each_fault_ends_in_safe_state_with_data_intact_and_exit_3(tmp_path, role, fault, kw, words):
    with SimulatedBench(seed=3) as sim:
        run_dir = tmp_path / "run"
        th, result = _run_in_thread(["run", str(_plan_file(tmp_path)), "--bench", str(_bench_file(sim, tmp_path, 0.5)),
                                     "--out", str(run_dir), *QUIET])
        _wait_for_points(run_dir, 3)
        sim.inject(role, fault, **kw)
        th.join(timeout=60)
        assert not th.is_alive(), "the run did not end after the fault"
        sim.clear_faults()
        _assert_safe(sim)
    assert result["code"] == 3, result["text"]
    assert words.lower() in result["text"].lower(), result["text"]
    folder, rows = _assert_intact(run_dir)
    assert len(rows) >= 3
    assert folder.meta["status"] == "failed"
    assert "supply off (read back)" in folder.meta["safe_state"]


def test_a_resumed_run_gives_the_same_parameters_as_an_uninterrupted_one(tmp_path):
    plan = _plan_file(tmp_path)
    with SimulatedBench(seed=11) as sim:
        code, _ = _run(["run", str(plan), "--bench", str(_bench_file(sim, tmp_path, name="a.toml")),
                        "--out", str(tmp_path / "whole"), *QUIET])
        assert code == 0
    run_dir = tmp_path / "broken"
    with SimulatedBench(seed=11) as sim:
        th, result = _run_in_thread(["run", str(plan), "--bench", str(_bench_file(sim, tmp_path, 0.5, "b.toml")),
                                     "--out", str(run_dir), *QUIET])
        _wait_for_points(run_dir, 45)  # the sweep (38 points) done, the thresholds begun
        sim.inject("scope", "drop_after", n=0)
        th.join(timeout=60)
        assert result["code"] == 3
    _, before = _assert_intact(run_dir)
    with SimulatedBench(seed=11) as sim:  # a fresh bench: new ports, same seed
        code, text = _run(["run", "--resume", str(run_dir), "--bench", str(_bench_file(sim, tmp_path, name="c.toml")), *QUIET])
        _assert_safe(sim)
    assert code == 0, text
    folder, after = _assert_intact(run_dir)
    assert folder.meta["resumes"] == 1 and folder.meta["points_replayed"] == len(before)
    whole = json.loads((tmp_path / "whole" / "parameters.json").read_text())
    resumed = json.loads((run_dir / "parameters.json").read_text())
    assert resumed.keys() == whole.keys()
    # Every point the broken run recorded is replayed, not re-measured, so the steps it had
    # finished give bit-identical parameters. Later steps ran on a fresh bench whose board
    # has another history (how long it has run, which the simulated physics keeps, as a
    # real board would): they agree within twice their combined standard uncertainty, or
    # within 5 % where a parameter carries none (R^2, largest deviation).
    counts = {}
    for row in before:
        counts[row["_step"]] = counts.get(row["_step"], 0) + 1
    finished = {step for step, n in counts.items() if n == _rows_of(tmp_path / "whole", step)}
    assert finished, counts
    for name, p in whole.items():
        q = resumed[name]
        if p["step"] in finished or p["value"] is None:
            assert q["value"] == p["value"], name
        elif p["uncertainty"]:
            u = math.hypot(p["uncertainty"], q["uncertainty"] or 0.0)
            assert abs(q["value"] - p["value"]) <= 2.0 * u, (name, p["value"], q["value"], u)
        else:
            assert q["value"] == pytest.approx(p["value"], rel=0.05), name


def test_resume_refuses_a_different_plan(tmp_path):
    run_dir = tmp_path / "run"
    folder = RunFolder.create(run_dir, plan_text=PLAN, bench_text="", meta={})
    folder.update_meta(status="aborted")
    other = _plan_file(tmp_path, PLAN.replace("step_v = 0.2", "step_v = 0.3"), "other.toml")
    code, text = _run(["run", str(other), "--resume", str(run_dir)])
    assert code == 2 and "differs from the plan" in text


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")
def test_sigterm_mid_run_ends_in_safe_state_and_exit_3(tmp_path):
    with SimulatedBench(seed=4) as sim:
        run_dir = tmp_path / "run"
        cmd = [sys.executable, "-m", "benchctl", "run", str(_plan_file(tmp_path)), "--bench",
               str(_bench_file(sim, tmp_path)), "--out", str(run_dir), "--quiet"]
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, env={**os.environ, "COLUMNS": "120"})
        try:
            _wait_for_points(run_dir, 3)
            proc.send_signal(signal.SIGTERM)
            out, _ = proc.communicate(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
        _assert_safe(sim)
    assert proc.returncode == 3, out
    assert b"aborted" in out and b"SIGTERM" in out
    folder, rows = _assert_intact(run_dir)
    assert folder.meta["status"] == "aborted" and len(rows) >= 3


def test_json_mode_prints_one_json_object_per_line(tmp_path):
    plan = PLAN.split("[[steps]]")[0] + """[[steps]]
procedure = "rail_sweep"
[steps.params]
start_v = 3.5
stop_v = 4.5
step_v = 0.5
down = false
"""
    with SimulatedBench(seed=6) as sim:
        code, text = _run(["run", str(_plan_file(tmp_path, plan)), "--bench", str(_bench_file(sim, tmp_path)),
                           "--out", str(tmp_path / "run"), "--json"])
    assert code == 0, text
    events = [json.loads(line) for line in text.splitlines() if line.strip()]
    kinds = [e["event"] for e in events]
    assert kinds[0] == "run_started" and kinds[-1] == "run_finished"
    points = [e for e in events if e["event"] == "point"]
    assert [p["row"]["rail_set_v"] for p in points] == pytest.approx([3.5, 4.0, 4.5])
    assert events[-1]["status"] == "complete" and events[-1]["exit_code"] == 0
    assert "supply off (read back)" in events[-1]["safe_state"]


_junk = st.one_of(st.integers(-5, 50), st.floats(allow_nan=True), st.text(max_size=5), st.booleans(),
                  st.lists(st.integers(-1, 9), max_size=2))
_targets = st.sampled_from(["max_rail_v", "current_limit_a", "ovp_v", "ramp_v_per_s", "start_v", "stop_v",
                            "step_v", "down", "records", "procedure"])
SMALL = PLAN.split("[[steps]]")[0] + """[[steps]]
procedure = "rail_sweep"
[steps.params]
start_v = 3.5
stop_v = 4.5
step_v = 0.5
down = false
records = 1
"""


def _edit(text, key, value):
    """Replace the first assignment of ``key`` by ``value`` written as TOML."""
    lines = text.splitlines()
    cell = repr(value) if isinstance(value, float) else json.dumps(value)
    for i, line in enumerate(lines):
        if line.startswith(f"{key} = "):
            lines[i] = f"{key} = {cell}"
            break
    return "\n".join(lines) + "\n"


def test_generated_bad_plans_exit_2_with_one_line_each_and_send_nothing(tmp_path):
    roles = ("supply", "generator", "scope")
    with SimulatedBench(seed=1) as sim:
        bench = str(_bench_file(sim, tmp_path))
        counter = iter(range(10**6))

        @settings(max_examples=30, deadline=None)
        @given(edits=st.lists(st.tuples(_targets, _junk), min_size=1, max_size=3))
        def check(edits):
            text = SMALL
            for key, value in edits:
                text = _edit(text, key, value)
            n = next(counter)
            plan = tmp_path / f"gen-{n}.toml"
            plan.write_text(text)
            try:
                valid = parse_plan(text, file=str(plan))
            except ConfigErrors:
                valid = None
            if valid is not None:  # it will run for real: keep that short (a ramp of
                # 0.03 V/s or a 0.1 mV grid is a valid plan that would take minutes)
                assume(valid.limits.ramp_v_per_s >= 1.0 and valid.steps[0].params["step_v"] >= 0.05)
            out_dir = tmp_path / f"gen-run-{n}"
            sent = {role: len(sim.command_log(role)) for role in roles}
            code, out = _run(["run", str(plan), "--bench", bench, "--out", str(out_dir), "--quiet"])
            if code == 2:
                lines = [ln for ln in out.splitlines() if ln.strip()]
                assert lines and all(ln.startswith("benchctl: ") for ln in lines), out
                assert not out_dir.exists()
                assert {role: len(sim.command_log(role)) for role in roles} == sent  # nothing sent
            else:  # the edits happened to leave a valid plan: it ran, and ended safely
                # (exit 3 when the instrument itself refuses a valid setting, e.g. a current
                # limit above the simulated supply's 3 A: the armed readback catches it)
                assert code in (0, 1) or (code == 3 and "reads back" in out), out
                _assert_safe(sim)

        check()
