"""Revision comparison: verdicts on constructed shifts, and curve differences."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from benchctl.errors import ConfigError
from benchctl.report import compare_runs
from benchctl.report.compare import judge
from benchctl.store import RunFolder


def make_run(path, revision, params, rails, vpp, *, direction=None, dcol="direction"):
    rf = RunFolder.create(path, plan_text="", bench_text="",
                          meta={"board": {"name": "beacon", "revision": revision, "serial": f"{revision}0001"}})
    cols = ["rail_v", "vpp_v"] + ([dcol] if direction else [])
    for i, (r, v) in enumerate(zip(rails, vpp, strict=True)):
        row = {"point": f"{i}", "rail_v": float(r), "vpp_v": float(v)}
        if direction:
            row[dcol] = direction[i]
        rf.append_point(0, "sweep", row, cols)
    rf.write_parameters(params)
    rf.update_meta(status="complete")
    return rf.path


def _p(value, u, unit="V"):
    return {"value": value, "uncertainty": u, "unit": unit}


def test_five_sigma_is_shifted_half_sigma_is_same(tmp_path):
    # Invented demo values. The combined standard uncertainty of a difference of two
    # independent estimates is sqrt(ua^2 + ub^2) (JCGM 100:2008 "GUM", 5.1.2).
    ua, ub = 0.010, 0.020
    sigma = math.sqrt(ua**2 + ub**2)
    a = {"dropout_v": _p(2.60, ua), "startup_v": _p(3.20, ua), "pushing_hz_per_v": _p(1500.0, 20.0, "Hz/V"),
         "only_in_a": _p(1.0, 0.1)}
    b = {"dropout_v": _p(2.60 + 5 * sigma, ub), "startup_v": _p(3.20 - 0.5 * sigma, ub),
         "pushing_hz_per_v": _p(1500.0, 20.0, "Hz/V"), "only_in_b": _p(1.0, 0.1)}
    rails = np.linspace(2, 6, 9)
    ra = make_run(tmp_path / "a", "B", a, rails, rails)
    rb = make_run(tmp_path / "b", "C", b, rails, rails)
    cmp = compare_runs(ra, rb, tolerance=0.001)
    verdicts = {p.name: p.verdict for p in cmp.parameters}
    assert verdicts == {"dropout_v": "shifted", "startup_v": "same", "pushing_hz_per_v": "same",
                        "only_in_a": "missing", "only_in_b": "missing"}
    d = next(p for p in cmp.parameters if p.name == "dropout_v")
    assert d.difference == pytest.approx(5 * sigma, rel=1e-12)
    assert d.combined_uncertainty == pytest.approx(sigma, rel=1e-12)
    assert cmp.shifted == ("dropout_v",) and cmp.any_shifted
    assert "rev B" in cmp.label_a and "rev C" in cmp.label_b


def test_relative_tolerance_suppresses_tiny_but_significant_shifts():
    # 10 sigma, yet only 0.1 % of the value: same under a 1 % tolerance, shifted under 0.01 %.
    assert judge(10.0, 10.01, 0.0005, 0.0005, tolerance=0.01, coverage_k=2)[0] == "same"
    assert judge(10.0, 10.01, 0.0005, 0.0005, tolerance=0.0001, coverage_k=2)[0] == "shifted"
    # No uncertainties at all: only the tolerance decides.
    assert judge(1.0, 1.02, None, None, tolerance=0.01, coverage_k=2)[0] == "shifted"
    assert judge(1.0, 1.005, None, None, tolerance=0.01, coverage_k=2)[0] == "same"
    # exactly on the k * uc boundary is not beyond it: 2 * 0.5 == 1.0
    assert judge(0.0, 1.0, 0.5, 0.0, tolerance=0.0, coverage_k=2)[0] == "same"


def test_value_none_and_unit_mismatch_are_missing(tmp_path):
    rails = np.linspace(2, 6, 5)
    ra = make_run(tmp_path / "a", "B", {"x": _p(None, None), "y": _p(1.0, 0.1, "V")}, rails, rails)
    rb = make_run(tmp_path / "b", "C", {"x": _p(1.0, 0.1), "y": _p(1.0, 0.1, "mV")}, rails, rails)
    cmp = compare_runs(ra, rb)
    notes = {p.name: (p.verdict, p.note) for p in cmp.parameters}
    assert notes["x"][0] == "missing" and "no value in run A" in notes["x"][1]
    assert notes["y"][0] == "missing" and "units differ" in notes["y"][1]
    assert not cmp.any_shifted


def test_curve_difference_over_the_overlap(tmp_path):
    # Linear curves are reproduced exactly by linear interpolation, so the difference of
    # two lines is known in closed form: (B - A)(r) = 0.05 + 0.02 * (r - 3).
    rails_a = np.linspace(2.0, 6.0, 17)  # 0.25 V steps
    rails_b = np.linspace(3.0, 7.0, 11)  # 0.4 V steps, overlap 3..6 V
    vpp_a = 0.8 * (rails_a - 2.5)
    vpp_b = 0.8 * (rails_b - 2.5) + 0.05 + 0.02 * (rails_b - 3.0)
    ra = make_run(tmp_path / "a", "B", {}, rails_a, vpp_a)
    rb = make_run(tmp_path / "b", "C", {}, rails_b, vpp_b)
    [curve] = compare_runs(ra, rb).curves
    assert (curve.overlap_lo_v, curve.overlap_hi_v) == (3.0, 6.0)
    grid = np.union1d(rails_a[(rails_a >= 3) & (rails_a <= 6)], rails_b[(rails_b >= 3) & (rails_b <= 6)])
    expected = 0.05 + 0.02 * (grid - 3.0)
    assert curve.n_points == grid.size
    assert curve.max_abs_diff == pytest.approx(expected.max(), abs=1e-12)
    assert curve.rail_at_max_v == pytest.approx(6.0)
    assert curve.rms_diff == pytest.approx(math.sqrt(np.mean(expected**2)), abs=1e-12)


@pytest.mark.parametrize("dcol", ["direction", "branch"])
def test_curves_per_direction_and_no_overlap(tmp_path, dcol):
    rails = [2.0, 3.0, 4.0, 4.0, 3.0, 2.0]
    dirs = ["up", "up", "up", "down", "down", "down"]
    vpp_a = [0.0, 1.0, 2.0, 2.0, 1.0, 0.5]
    vpp_b = [0.0, 1.0, 2.0, 2.0, 1.0, 0.0]  # differs only going down, at 2 V
    ra = make_run(tmp_path / "a", "B", {}, rails, vpp_a, direction=dirs, dcol=dcol)
    rb = make_run(tmp_path / "b", "C", {}, rails, vpp_b, direction=dirs, dcol=dcol)
    curves = {c.column: c for c in compare_runs(ra, rb).curves}
    assert curves["vpp_v (up)"].max_abs_diff == 0.0
    assert curves["vpp_v (down)"].max_abs_diff == pytest.approx(0.5) and curves["vpp_v (down)"].rail_at_max_v == 2.0
    rc = make_run(tmp_path / "c", "C", {}, [7.0, 8.0], [1.0, 2.0])
    [c] = compare_runs(ra, rc).curves
    assert c.max_abs_diff is None and "do not overlap" in c.note


def test_json_and_markdown_outputs(tmp_path):
    rails = np.linspace(2, 6, 5)
    ra = make_run(tmp_path / "a", "B", {"dropout_v": _p(2.6, 0.01)}, rails, rails)
    rb = make_run(tmp_path / "b", "C", {"dropout_v": _p(2.9, 0.01)}, rails, rails)
    cmp = compare_runs(ra, rb)
    data = json.loads(json.dumps(cmp.to_dict(), allow_nan=False))
    assert data["shifted"] == ["dropout_v"] and data["parameters"][0]["verdict"] == "shifted"
    md = cmp.to_markdown()
    assert "| dropout_v | V | 2.6 |" in md and "shifted" in md and "sqrt(u(A)^2 + u(B)^2)" in md


def test_bad_inputs(tmp_path):
    rails = np.linspace(2, 6, 5)
    ra = make_run(tmp_path / "a", "B", {}, rails, rails)
    with pytest.raises(ConfigError, match="no such folder"):
        compare_runs(ra, tmp_path / "missing")
    with pytest.raises(ValueError, match="tolerance"):
        compare_runs(ra, ra, tolerance=-1)


def test_parameters_matched_on_step_and_name(tmp_path):
    # The runner keys a repeated name as "<step>.<name>": the same quantity must still meet.
    rails = np.linspace(2, 6, 5)
    a = {"startup_v": {"value": 3.0, "uncertainty": 0.01, "unit": "V", "step": "thresholds"}}
    b = {"startup_v": {"value": 2.9, "uncertainty": 0.01, "unit": "V", "step": "sweep"},
         "thresholds.startup_v": {"value": 3.0, "uncertainty": 0.01, "unit": "V", "step": "thresholds"}}
    cmp = compare_runs(make_run(tmp_path / "a", "B", a, rails, rails), make_run(tmp_path / "b", "C", b, rails, rails))
    got = {(p.step, p.name): p.verdict for p in cmp.parameters}
    assert got == {("thresholds", "thresholds.startup_v"): "same", ("sweep", "sweep.startup_v"): "missing"}
