"""Cross-step and wiring checks of the shipped procedures, made before any instrument is opened."""

from __future__ import annotations

import pytest

from benchctl.drivers import Wiring
from benchctl.errors import ConfigErrors
from benchctl.runner.plan import parse_plan

HEAD = """
[board]
name = "beacon"
[limits]
max_rail_v = 6.0
current_limit_a = 0.05
"""


def _keys(text, **kw):
    with pytest.raises(ConfigErrors) as info:
        parse_plan(HEAD + text, file="p.toml", **kw)
    return {(e.file, e.key): e.reason for e in info.value.errors}


def test_a_sweep_that_ends_below_its_start_is_refused():
    keys = _keys('[[steps]]\nprocedure = "rail_sweep"\n[steps.params]\nstart_v = 5.0\nstop_v = 3.0\n')
    assert "must be above start_v" in keys[("p.toml", "steps[0].params.stop_v")]


def test_a_step_that_needs_an_earlier_one_names_it():
    keys = _keys('[[steps]]\nprocedure = "modulation"\n[steps.params]\nsource = "linear"\n'
                 '[[steps]]\nprocedure = "pushing"\n[steps.params]\nsource = "sweep"\n')
    assert "no earlier step 'linear'" in keys[("p.toml", "steps[0].params.source")]
    assert "no earlier step 'sweep'" in keys[("p.toml", "steps[1].params.source")]


def test_the_same_steps_in_the_right_order_pass():
    plan = parse_plan(HEAD + '[[steps]]\nprocedure = "linear_region"\nname = "linear"\n'
                      '[[steps]]\nprocedure = "modulation"\n[steps.params]\nsource = "linear"\n',
                      file="p.toml")
    assert [s.name for s in plan.steps] == ["linear", "modulation"]


def test_wiring_needs_are_reported_against_the_bench_file():
    wiring = Wiring(output_channel=1, rail_channel=0, generator="none")
    keys = _keys('[[steps]]\nprocedure = "modulation"\n[steps.params]\ncentre_v = 4.0\n'
                 '[[steps]]\nprocedure = "startup_time"\n', wiring=wiring, bench_file="b.toml")
    assert "generator summed onto the rail" in keys[("b.toml", "wiring.generator")]
    assert "rail_channel > 0" in keys[("b.toml", "wiring.rail_channel")]
