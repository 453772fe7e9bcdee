"""Whole stack: two short runs on the simulated bench (pyvisa-py over 127.0.0.1 sockets),
then report, comparison and datasheet from the run folders, checked against the simulated
boards' ground truth."""

from __future__ import annotations

import io
import json
import math
from html.parser import HTMLParser

import numpy as np
import pytest
from rich.console import Console

from benchctl.cli import main
from benchctl.report import compare_runs, datasheet
from benchctl.report.formatting import fmt
from benchctl.simulated import load_board

pytestmark = pytest.mark.slow

PLAN = """\
[board]
name = "beacon"
revision = "{rev}"
serial = "{serial}"

[limits]
max_rail_v = 6.0
current_limit_a = 0.05
ovp_v = 6.5
ramp_v_per_s = 50.0

[[steps]]
procedure = "rail_sweep"
name = "sweep"
[steps.params]
start_v = 3.0
stop_v = 5.5
step_v = 0.5
"""
UNITS = (("B", "B0001"), ("C", "C0007"))


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    base = tmp_path_factory.mktemp("bench")
    out = {}
    for rev, serial in UNITS:
        plan = base / f"plan-{rev}.toml"
        plan.write_text(PLAN.format(rev=rev, serial=serial), encoding="utf-8")
        folder = base / f"run-{rev}"
        console = Console(file=io.StringIO(), width=200)
        code = main(["demo", "--plan", str(plan), "--revision", rev, "--serial", serial,
                     "--out", str(folder), "--quiet"], console=console)
        assert code == 0, console.file.getvalue()
        out[rev] = folder
    return out


class _Cells(HTMLParser):
    def __init__(self):
        super().__init__()
        self.rows, self._row, self._cell = [], None, None

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def test_report_shows_the_parameters_of_the_run(runs):
    folder = runs["B"]
    assert main(["report", str(folder)], console=Console(file=io.StringIO())) == 0
    params = json.loads((folder / "parameters.json").read_text(encoding="utf-8"))
    page = _Cells()
    page.feed((folder / "report" / "index.html").read_text(encoding="utf-8"))
    shown = {r[0]: r for r in page.rows if r and r[0] in params}
    assert set(shown) == set(params)
    for name, p in params.items():
        assert shown[name][1] == fmt(p["value"])
    assert any(r[:2] == ["Serial", "B0001"] for r in page.rows)
    assert (folder / "report" / "00-sweep-amplitude.png").is_file()


def test_revision_comparison_matches_the_boards_truth(runs):
    truth = {rev: load_board("beacon", revision=rev, serial=serial).truth() for rev, serial in UNITS}
    cmp = compare_runs(runs["B"], runs["C"])
    vpp = next(p for p in cmp.parameters if p.name == "vpp_at_nominal_v")
    expected = truth["C"].vpp_at(5.0) - truth["B"].vpp_at(5.0)  # simulated ground truth
    # within 5 combined standard uncertainties plus 1 mV for the model (common practice,
    # no published source)
    assert vpp.difference == pytest.approx(expected, abs=5 * vpp.combined_uncertainty + 1e-3)
    # the true shift is far beyond both limits of the rule, so the verdict must be "shifted"
    assert abs(expected) > 10 * vpp.combined_uncertainty and abs(expected) > 2 * 0.01 * vpp.value_b
    assert vpp.verdict == "shifted" and "vpp_at_nominal_v" in cmp.shifted
    curve = next(c for c in cmp.curves if c.column.startswith("vpp_v"))
    grid = np.arange(3.0, 5.5001, 0.5)
    true_diff = np.abs(truth["C"].vpp_at(grid) - truth["B"].vpp_at(grid))
    assert curve.max_abs_diff == pytest.approx(float(np.max(true_diff)), abs=0.01)
    assert math.isfinite(curve.rms_diff)


def test_datasheet_of_the_two_units(runs):
    sheet = datasheet([runs["B"], runs["C"]])
    assert [(g.board, g.revision, g.units) for g in sheet.groups] == [
        ("beacon", "B", ("B0001",)), ("beacon", "C", ("C0007",))]
    for group, folder in zip(sheet.groups, (runs["B"], runs["C"]), strict=True):
        params = json.loads((folder / "parameters.json").read_text(encoding="utf-8"))
        row = next(r for r in group.rows if r.parameter == "vpp_at_nominal_v")
        assert row.typical == row.minimum == row.maximum == params["vpp_at_nominal_v"]["value"]
