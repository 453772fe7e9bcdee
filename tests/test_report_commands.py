"""CLI: report, compare and datasheet through benchctl.cli.main, exit codes and output."""

from __future__ import annotations

import io
import json

from rich.console import Console

from benchctl.cli import main
from benchctl.store import RunFolder


def _console():
    buf = io.StringIO()
    return Console(file=buf, width=200, color_system=None), buf


def make_run(path, revision, serial, dropout_v, *, u=0.01):
    rf = RunFolder.create(path, plan_text="", bench_text="",
                          meta={"board": {"name": "beacon", "revision": revision, "serial": serial}})
    for r in (3.0, 4.0, 5.0):
        rf.append_point(0, "sweep", {"point": f"{r}", "rail_v": r, "vpp_v": 0.8 * (r - 2.5)}, ["rail_v", "vpp_v"])
    rf.write_parameters({"dropout_v": {"value": dropout_v, "uncertainty": u, "unit": "V", "step": "sweep"}})
    rf.update_meta(status="complete")
    return str(rf.path)


def test_report_command(tmp_path):
    run = make_run(tmp_path / "run", "B", "B0001", 2.6)
    console, buf = _console()
    assert main(["report", run, "--out", str(tmp_path / "rep")], console=console) == 0
    assert (tmp_path / "rep" / "index.html").is_file() and "report written" in buf.getvalue()


def test_not_a_run_folder_is_exit_2_with_one_line(tmp_path):
    (tmp_path / "plain").mkdir()
    for argv in (["report", str(tmp_path / "plain")],
                 ["compare", str(tmp_path / "plain"), str(tmp_path / "plain")],
                 ["datasheet", str(tmp_path / "plain")]):
        console, buf = _console()
        assert main(argv, console=console) == 2, argv
        lines = buf.getvalue().strip().splitlines()
        assert len(lines) == 1 and str(tmp_path / "plain") in lines[0] and "run.json" in lines[0]


def test_compare_exit_codes_and_json(tmp_path):
    a = make_run(tmp_path / "a", "B", "B0001", 2.60)
    same = make_run(tmp_path / "same", "C", "C0001", 2.605)  # 0.35 sigma: same
    moved = make_run(tmp_path / "moved", "C", "C0002", 2.70)  # 7 sigma and 3.8 %: shifted
    console, buf = _console()
    assert main(["compare", a, same], console=console) == 0
    assert "no parameter shifted" in buf.getvalue()
    console, buf = _console()
    assert main(["compare", a, moved, "--json"], console=console) == 1
    data = json.loads(buf.getvalue())
    assert data["shifted"] == ["dropout_v"]
    # a wide tolerance turns the shift into "same"
    console, buf = _console()
    assert main(["compare", a, moved, "--tolerance", "0.05", "--markdown", str(tmp_path / "c.md")],
                console=console) == 0
    assert "| dropout_v |" in (tmp_path / "c.md").read_text(encoding="utf-8")


def test_datasheet_command(tmp_path):
    runs = [make_run(tmp_path / f"u{i}", "B", f"B{i:04d}", v) for i, v in enumerate([2.5, 2.6, 2.8])]
    console, buf = _console()
    assert main(["datasheet", *runs, "--out", str(tmp_path / "ds"), "--coverage", "0.9"], console=console) == 0
    assert (tmp_path / "ds" / "datasheet.csv").is_file() and (tmp_path / "ds" / "datasheet.md").is_file()
    assert "dropout_v" in buf.getvalue()
    console, buf = _console()
    assert main(["datasheet", *runs, "--json"], console=console) == 0
    row = json.loads(buf.getvalue())["groups"][0]["rows"][0]
    assert (row["minimum"], row["typical"], row["maximum"], row["n_units"]) == (2.5, 2.6, 2.8, 3)
    console, buf = _console()
    assert main(["datasheet", *runs, "--coverage", "2"], console=console) == 2
    assert "coverage" in buf.getvalue()
