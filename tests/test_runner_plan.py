"""Plan validation: every problem reported at once, one line each, naming file, key and reason."""

from __future__ import annotations

import tomllib

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from benchctl.errors import ConfigError, ConfigErrors
from benchctl.procedures import base
from benchctl.runner.plan import SpecLimit, parse_plan


@base.register
class _Probe(base.Procedure):
    """A test-only procedure with one parameter of each kind."""

    name = "test_probe"
    summary = "test-only"
    params = (
        base.Param("start_v", float, "V", rail=True),
        base.Param("stop_v", float, "V", default=5.0, rail=True),
        base.Param("records", int, "", default=2, minimum=1, maximum=64),
        base.Param("down", bool, "", default=False),
        base.Param("method", str, "", default="fit", choices=("fit", "robust")),
        base.Param("depths_vpp", list, "V", default=[0.1], minimum=0.0),
    )
    columns = (base.Column("rail_v", "V"),)
    results = ("dropout_v", "startup_v")

    def run(self, ctx, params):
        return []


GOOD = """
[board]
name = "beacon"
revision = "B"
serial = "B0001"

[limits]
max_rail_v = 6.0
current_limit_a = 0.1
ovp_v = 6.5
ramp_v_per_s = 20.0

[[steps]]
procedure = "test_probe"
name = "first"
[steps.params]
start_v = 2.0
[steps.spec]
dropout_v = { max = 3.0 }
"""


@pytest.fixture(autouse=True)
def _only_test_procedures(monkeypatch):
    # The plan layer is tested on its own: do not import the shipped procedures here.
    monkeypatch.setattr(base, "BUILTIN_MODULES", ())


def _errors(text: str) -> list[ConfigError]:
    with pytest.raises(ConfigErrors) as info:
        parse_plan(text, file="plan.toml")
    return info.value.errors


def test_good_plan_parses_with_defaults_filled():
    plan = parse_plan(GOOD, file="plan.toml")
    assert plan.board == base.BoardInfo("beacon", "B", "B0001")
    assert plan.limits == base.Limits(6.0, 0.1, 6.5, 20.0)
    (step,) = plan.steps
    assert step.name == "first" and step.procedure == "test_probe"
    assert step.params == {"start_v": 2.0, "stop_v": 5.0, "records": 2, "down": False,
                           "method": "fit", "depths_vpp": [0.1]}
    assert step.spec == {"dropout_v": SpecLimit(None, 3.0)}


def test_every_problem_is_reported_at_once_each_on_one_line():
    bad = GOOD.replace("current_limit_a = 0.1", "current_limit_a = -1").replace(
        "start_v = 2.0", "start_v = 7.5\nrecords = 0\nbogus = 1").replace("dropout_v", "nonsense_v")
    errors = _errors(bad)
    keys = {e.key for e in errors}
    assert {"limits.current_limit_a", "steps[0].params.start_v", "steps[0].params.records",
            "steps[0].params.bogus", "steps[0].spec.nonsense_v"} <= keys
    for e in errors:
        assert e.file == "plan.toml"
        assert "\n" not in str(e)
        assert str(e).startswith("plan.toml: ")


@pytest.mark.parametrize(
    ("edit", "key", "words"),
    [
        (("max_rail_v = 6.0\n", ""), "limits.max_rail_v", "missing"),
        (("ovp_v = 6.5", "ovp_v = 5.0"), "limits.ovp_v", ">= max_rail_v"),
        (("start_v = 2.0", "start_v = 6.01"), "steps[0].params.start_v", "above limits.max_rail_v"),
        (("start_v = 2.0", 'start_v = "2 V"'), "steps[0].params.start_v", "finite number"),
        (("start_v = 2.0", "start_v = nan"), "steps[0].params.start_v", "finite number"),
        (("start_v = 2.0", "start_v = 2.0\ndown = 1"), "steps[0].params.down", "true or false"),
        (("start_v = 2.0", 'start_v = 2.0\nmethod = "mean"'), "steps[0].params.method", "one of"),
        (("start_v = 2.0", "start_v = 2.0\ndepths_vpp = []"), "steps[0].params.depths_vpp", "non-empty"),
        (("start_v = 2.0", "start_v = 2.0\ndepths_vpp = [0.1, -0.2]"), "steps[0].params.depths_vpp", "element 1"),
        (("start_v = 2.0", "start_v = 2.0\nrecords = 1.5"), "steps[0].params.records", "integer"),
        (('procedure = "test_probe"', 'procedure = "no_such"'), "steps[0].procedure", "unknown procedure"),
        (('name = "first"', 'name = "1st step"'), "steps[0].name", "letter"),
        (("dropout_v = { max = 3.0 }", "dropout_v = { max = 3.0, min = 4.0 }"), "steps[0].spec.dropout_v", "above max"),
        (("dropout_v = { max = 3.0 }", "dropout_v = { most = 3.0 }"), "steps[0].spec.dropout_v", "unknown key"),
        (("[board]", "[bored]"), "bored", "unknown section"),
        (('serial = "B0001"', "serial = 1"), "board.serial", "non-empty string"),
    ],
)
def test_hand_written_bad_plans_name_key_and_reason(edit, key, words):
    errors = _errors(GOOD.replace(*edit))
    hits = [e for e in errors if e.key == key]
    assert hits, [str(e) for e in errors]
    assert words in hits[0].reason


def test_missing_start_is_required_and_duplicate_step_names_refused():
    text = GOOD.replace("start_v = 2.0", "") + '\n[[steps]]\nprocedure = "test_probe"\nname = "first"\n[steps.params]\nstart_v = 1.0\n'
    keys = [e.key for e in _errors(text)]
    assert "steps[0].params.start_v" in keys
    assert "steps[1].name" in keys


def test_not_toml_is_one_error_naming_the_file():
    (e,) = _errors("[board\nname = 'x'")
    assert e.file == "plan.toml" and "not valid TOML" in e.reason


def test_spec_verdicts():
    assert SpecLimit(None, 3.0).verdict(2.9) == "pass"
    assert SpecLimit(None, 3.0).verdict(3.1) == "fail"
    assert SpecLimit(1.0, None).verdict(0.5) == "fail"
    assert SpecLimit(1.0, 2.0).verdict(None) == "fail"
    assert SpecLimit(1.0, 2.0).verdict(float("nan")) == "fail"


# Values hypothesis may put anywhere in a plan: TOML-representable scalars and small containers.
_scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6),
                     st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8))
_values = st.one_of(_scalars, st.lists(_scalars, max_size=3), st.dictionaries(st.text(max_size=6), _scalars, max_size=3))
_paths = st.sampled_from([
    ("board", "name"), ("board", "serial"), ("limits", "max_rail_v"), ("limits", "current_limit_a"),
    ("limits", "ovp_v"), ("limits", "ramp_v_per_s"), ("limits", "extra"), ("steps", 0, "procedure"),
    ("steps", 0, "name"), ("steps", 0, "params", "start_v"), ("steps", 0, "params", "records"),
    ("steps", 0, "params", "down"), ("steps", 0, "params", "depths_vpp"), ("steps", 0, "spec", "dropout_v"),
    ("steps", 0, "params", "unknown_k"),
])


def _dump(doc) -> str:
    """A tiny TOML writer for the plan shapes used here (values hypothesis can produce)."""
    import json
    import math

    def val(v):
        if v is None:
            return None
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, float):
            return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf") if math.isinf(v) else repr(v)
        if isinstance(v, int):
            return str(v)
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, list):
            items = [val(x) for x in v if x is not None]
            return "[" + ", ".join(items) + "]" if all(isinstance(x, type(v[0])) for x in v if x is not None) else "[]"
        if isinstance(v, dict):
            items = [f"{json.dumps(k)} = {val(x)}" for k, x in v.items() if x is not None]
            return "{ " + ", ".join(items) + " }"
        raise TypeError(v)

    lines = []
    for section in ("board", "limits"):
        lines.append(f"[{section}]")
        for k, v in doc[section].items():
            if val(v) is not None:
                lines.append(f"{json.dumps(k)} = {val(v)}")
    for step in doc["steps"]:
        lines.append("[[steps]]")
        for k, v in step.items():
            if k in ("params", "spec"):
                continue
            if val(v) is not None:
                lines.append(f"{json.dumps(k)} = {val(v)}")
        for sub in ("params", "spec"):
            if sub in step and isinstance(step[sub], dict):
                lines.append(f"[steps.{sub}]")
                for k, v in step[sub].items():
                    if val(v) is not None:
                        lines.append(f"{json.dumps(k)} = {val(v)}")
    return "\n".join(lines) + "\n"


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(edits=st.lists(st.tuples(_paths, _values), min_size=1, max_size=4))
def test_generated_plans_either_parse_or_give_one_line_errors(edits):
    doc = tomllib.loads(GOOD)
    for path, value in edits:
        node = doc
        for part in path[:-1]:
            node = node[part]
        node[path[-1]] = value
    try:
        text = _dump(doc)
        tomllib.loads(text)
    except (TypeError, tomllib.TOMLDecodeError):
        return  # not a TOML document this writer can express; nothing to check
    try:
        plan = parse_plan(text, file="gen.toml")
    except ConfigErrors as exc:
        assert exc.errors
        for e in exc.errors:
            assert isinstance(e, ConfigError) and e.file == "gen.toml"
            assert e.reason and "\n" not in str(e)
        return
    # A plan that parses obeys the safety rules it states.
    assert plan.limits.max_rail_v > 0 and plan.limits.current_limit_a > 0
    assert plan.limits.ovp_v >= plan.limits.max_rail_v
    for step in plan.steps:
        assert 0 <= step.params["start_v"] <= plan.limits.max_rail_v
