"""The runner's sequence on a recording fake bench: arming order, safe state on every exit
path, data kept, resume without re-measuring, exit codes.

The real stack (pyvisa-py sockets to the simulated bench) is exercised in
test_runner_e2e.py; here the bench is a fake so that the order of calls can be checked.
"""

from __future__ import annotations

import logging

import pytest

from benchctl.errors import ConnectionLost, InstrumentTimeout
from benchctl.procedures import base
from benchctl.runner.context import AbortFlag
from benchctl.runner.engine import EXIT_FAULT, EXIT_PASS, EXIT_SPEC_FAIL, execute
from benchctl.runner.plan import parse_plan
from benchctl.store import RunFolder


class FakeSupply:
    def __init__(self, calls, fail_on=None):
        self.calls, self.on, self.v, self.ilim, self.ovp, self.fail_on = calls, False, 0.0, None, None, fail_on

    def _c(self, name, *a):
        self.calls.append(("supply", name) + a)
        if self.fail_on == name:
            raise ConnectionLost("socket closed", command=name, resource="fake::supply")

    def output(self, on):
        self._c("output", on)
        self.on = on

    def set_voltage(self, v):
        self._c("set_voltage", v)
        self.v = v

    def set_current_limit(self, a):
        self._c("set_current_limit", a)
        self.ilim = a

    def get_current_limit(self):
        return self.ilim

    def set_ovp(self, v):
        self._c("set_ovp", v)
        self.ovp = v

    def get_ovp(self):
        return self.ovp

    def ramp_to(self, v, *, rate_v_per_s):
        self._c("ramp_to", v, rate_v_per_s)
        self.v = v

    def is_output_on(self):
        return self.on

    def get_voltage(self):
        return self.v

    def protection_tripped(self):
        return False

    def check_errors(self):
        self.calls.append(("supply", "check_errors"))

    resource = "fake::supply"


class FakeGenerator:
    def __init__(self, calls):
        self.calls, self.on = calls, False

    def output(self, on):
        self.calls.append(("generator", "output", on))
        self.on = on

    def is_output_on(self):
        return self.on

    def check_errors(self):
        pass


class FakeBench:
    def __init__(self, supply_fail_on=None, same_idn=False):
        self.calls = []
        self.supply = FakeSupply(self.calls, supply_fail_on)
        self.generator = FakeGenerator(self.calls)
        self.scope = None
        self.wiring = None
        self.idn = {"supply": "fake,supply,1,0", "generator": "fake,gen,2,0", "scope": "fake,scope,3,0"}
        if same_idn:
            self.idn["scope"] = self.idn["supply"]
        self.closed = False

    @property
    def instruments(self):
        return {"supply": self.supply, "generator": self.generator}

    def close(self):
        self.closed = True


MEASURED: list[str] = []


@base.register
class _Counter(base.Procedure):
    """Test-only: measures `n` points, optionally failing or asking to abort at `fail_at`."""

    name = "test_counter"
    summary = "test-only"
    params = (base.Param("n", int, default=4), base.Param("fail_at", int, default=-1),
              base.Param("fault", str, default="timeout", choices=("timeout", "abort", "bug")))
    columns = (base.Column("rail_v", "V"), base.Column("value", ""))
    results = ("total",)

    def run(self, ctx, params):
        ctx.bench.supply.output(True)
        total = 0.0
        for i in range(params["n"]):
            def measure(i=i):
                if i == params["fail_at"]:
                    if params["fault"] == "abort":
                        raise KeyboardInterrupt
                    if params["fault"] == "bug":
                        raise ZeroDivisionError("a bug in a procedure")
                    raise InstrumentTimeout("no reply", command="MEAS:VOLT?", timeout_s=0.1)
                MEASURED.append(f"{ctx.step_name}-{i}")
                return {"rail_v": 1.0 + i, "value": 0.1 * i + 1e-17}
            row = ctx.point(f"p{i:03d}", measure)
            total += row["value"]
        return [base.Result("total", total, "", 0.0, "sum of values")]


def _plan(n=4, fail_at=-1, fault="timeout", spec_max=100.0):
    return parse_plan(f"""
[board]
name = "fake"
[limits]
max_rail_v = 6.0
current_limit_a = 0.05
ovp_v = 6.6
ramp_v_per_s = 5.0
[[steps]]
procedure = "test_counter"
[steps.params]
n = {n}
fail_at = {fail_at}
fault = "{fault}"
[steps.spec]
total = {{ max = {spec_max} }}
""", file="plan.toml")


@pytest.fixture(autouse=True)
def _isolate(monkeypatch):
    monkeypatch.setattr(base, "BUILTIN_MODULES", ())
    MEASURED.clear()


def _folder(tmp_path, plan):
    return RunFolder.create(tmp_path / "run", plan_text=plan.text, bench_text="", meta={})


def _first(calls, item):
    return calls.index(item)


def test_protection_is_programmed_before_any_output_is_enabled_and_safe_state_at_end(tmp_path):
    plan = _plan()
    bench = FakeBench()
    out = execute(plan, open_bench=lambda: bench, folder=_folder(tmp_path, plan))
    assert out.exit_code == EXIT_PASS and out.status == "complete"
    calls = bench.calls
    on = _first(calls, ("supply", "output", True))
    assert _first(calls, ("supply", "set_current_limit", 0.05)) < on
    assert _first(calls, ("supply", "set_ovp", 6.6)) < on
    assert _first(calls, ("generator", "output", False)) < on
    # Safe state after the last step: generator off, ramp down at the plan's rate, supply off.
    tail = calls[on:]
    assert ("generator", "output", False) in tail
    ramp = tail.index(("supply", "ramp_to", 0.0, 5.0))
    assert tail.index(("supply", "output", False), ramp) > ramp
    assert out.safe_state.verified and bench.closed


def test_instrument_fault_ends_in_safe_state_with_points_kept_and_exit_3(tmp_path):
    plan = _plan(n=5, fail_at=3)
    bench = FakeBench()
    folder = _folder(tmp_path, plan)
    out = execute(plan, open_bench=lambda: bench, folder=folder)
    assert out.exit_code == EXIT_FAULT and out.status == "failed"
    assert "no reply" in out.message
    assert not bench.supply.on and not bench.generator.on
    assert out.safe_state.verified
    reopened = RunFolder.open(folder.path)
    assert [r["point"] for r in reopened.points(0, "test_counter")] == ["p000", "p001", "p002"]
    assert reopened.meta["status"] == "failed"


def test_unreachable_supply_still_turns_generator_off_and_reports_unverified(tmp_path):
    plan = _plan(n=2, fail_at=1)
    bench = FakeBench(supply_fail_on="ramp_to")
    out = execute(plan, open_bench=lambda: bench, folder=_folder(tmp_path, plan))
    assert out.exit_code == EXIT_FAULT
    assert not bench.generator.on
    assert ("supply", "output", False) in bench.calls[-3:]  # still tried after the failed ramp
    assert not out.safe_state.verified and out.safe_state.failures


def test_ctrl_c_inside_a_point_is_an_abort_with_safe_state(tmp_path):
    plan = _plan(n=4, fail_at=2, fault="abort")
    bench = FakeBench()
    out = execute(plan, open_bench=lambda: bench, folder=_folder(tmp_path, plan))
    assert out.status == "aborted" and out.exit_code == EXIT_FAULT
    assert not bench.supply.on and out.safe_state.verified


def test_abort_flag_stops_before_the_next_point(tmp_path):
    plan = _plan(n=4)
    flag = AbortFlag()
    flag.set("SIGTERM received")
    bench = FakeBench()
    out = execute(plan, open_bench=lambda: bench, folder=_folder(tmp_path, plan), abort=flag)
    assert out.status == "aborted" and "SIGTERM" in out.message
    assert MEASURED == [] and not bench.supply.on


def test_spec_failure_gives_exit_1_and_verdict_in_parameters(tmp_path):
    plan = _plan(n=3, spec_max=0.1)
    folder = _folder(tmp_path, plan)
    out = execute(plan, open_bench=FakeBench, folder=folder)
    assert out.exit_code == EXIT_SPEC_FAIL
    params = RunFolder.open(folder.path).parameters()
    assert params["total"]["verdict"] == "fail"
    assert params["total"]["value"] == pytest.approx(0.3, rel=1e-12)
    assert params["total"]["spec"] == {"min": None, "max": 0.1}


def test_resume_replays_recorded_points_and_gives_the_same_parameters(tmp_path):
    whole = _plan(n=6)
    ref = execute(whole, open_bench=FakeBench, folder=RunFolder.create(tmp_path / "ref", plan_text=whole.text, bench_text="", meta={}))
    MEASURED.clear()
    broken = _plan(n=6, fail_at=4)
    folder = _folder(tmp_path, broken)
    assert execute(broken, open_bench=FakeBench, folder=folder).exit_code == EXIT_FAULT
    MEASURED.clear()
    out = execute(whole, open_bench=FakeBench, folder=RunFolder.open(folder.path), resume=True)
    assert out.exit_code == EXIT_PASS
    assert MEASURED == ["test_counter-4", "test_counter-5"]  # only the missing points
    assert (out.replayed, out.measured) == (4, 2)
    assert out.parameters["total"]["value"] == ref.parameters["total"]["value"]  # bit-identical
    assert RunFolder.open(folder.path).meta["resumes"] == 1


def test_a_bench_that_cannot_be_opened_is_a_fault_without_safe_state_attempts(tmp_path):
    plan = _plan()

    def refuse():
        raise ConnectionLost("connection refused", resource="TCPIP::127.0.0.1::1::SOCKET")

    out = execute(plan, open_bench=refuse, folder=_folder(tmp_path, plan))
    assert out.exit_code == EXIT_FAULT and "refused" in out.message
    assert out.safe_state is None


def test_log_records_the_safe_state(tmp_path, caplog):
    plan = _plan(n=1)
    with caplog.at_level(logging.INFO, logger="benchctl.runner"):
        execute(plan, open_bench=FakeBench, folder=_folder(tmp_path, plan))
    assert any("safe state: generator off (read back), supply off (read back)" in r.getMessage() for r in caplog.records)


def test_one_instrument_named_for_two_roles_is_bad_input_and_nothing_is_enabled(tmp_path):
    plan = _plan()
    bench = FakeBench(same_idn=True)
    out = execute(plan, open_bench=lambda: bench, folder=_folder(tmp_path, plan))
    assert out.exit_code == 2 and "two roles" in out.message
    assert ("supply", "output", True) not in bench.calls and out.safe_state.verified


def test_a_bug_in_a_procedure_still_ends_in_safe_state_with_data_kept(tmp_path):
    plan = _plan(n=4, fail_at=2, fault="bug")
    bench = FakeBench()
    folder = _folder(tmp_path, plan)
    out = execute(plan, open_bench=lambda: bench, folder=folder)
    assert out.exit_code == EXIT_FAULT and "internal error (ZeroDivisionError)" in out.message
    assert out.safe_state.verified and not bench.supply.on
    reopened = RunFolder.open(folder.path)
    assert len(reopened.points(0, "test_counter")) == 2 and reopened.meta["status"] == "failed"
