"""Run folder: creation, metadata, points tables, torn lines, waveforms, parameters."""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import struct

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from benchctl import __version__
from benchctl.errors import ConfigError
from benchctl.store import RunFolder, sanitise_key, sanitise_name

PLAN = '[board]\nname = "beacon"\nrevision = "B"\nserial = "B0001"\n'
BENCH = '[bench]\nname = "sim-bench"\n'
COLUMNS = ["rail_v", "vpp_v", "oscillating", "note"]


def _new(tmp_path, name="run", **meta):
    return RunFolder.create(
        tmp_path / name, plan_text=PLAN, bench_text=BENCH, meta={"board": {"name": "beacon"}, **meta}
    )


def test_create_writes_files_and_metadata(tmp_path):
    fixed = dt.datetime(2026, 3, 4, 5, 6, 7, tzinfo=dt.UTC)
    rf = RunFolder.create(
        tmp_path / "a" / "b", plan_text=PLAN, bench_text=BENCH, meta={"seed": np.int64(7)}, now=lambda: fixed
    )
    assert (rf.path / "plan.toml").read_text() == PLAN
    assert (rf.path / "bench.toml").read_text() == BENCH
    meta = json.loads((rf.path / "run.json").read_text())
    assert meta["status"] == "running" and meta["seed"] == 7
    assert meta["software_version"] == __version__ and meta["host"]
    # ISO 8601 UTC, parsed back with the standard library (datetime.fromisoformat).
    assert dt.datetime.fromisoformat(meta["started"]) == fixed
    assert rf.log_path == rf.path / "log.txt"


def test_create_refuses_non_empty_folder_and_open_refuses_non_run(tmp_path):
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "x.txt").write_text("x")
    with pytest.raises(ConfigError, match="not empty"):
        RunFolder.create(tmp_path / "busy", plan_text="", bench_text="", meta={})
    (tmp_path / "empty").mkdir()
    RunFolder.create(tmp_path / "empty", plan_text="", bench_text="", meta={})  # empty is fine
    with pytest.raises(ConfigError, match="no run.json"):
        RunFolder.open(tmp_path / "busy")
    with pytest.raises(ConfigError, match="no such folder"):
        RunFolder.open(tmp_path / "nowhere")
    (tmp_path / "broken").mkdir()
    (tmp_path / "broken" / "run.json").write_text("{not json")
    with pytest.raises(ConfigError, match="unreadable"):
        RunFolder.open(tmp_path / "broken")


def test_update_meta_is_atomic(tmp_path, monkeypatch):
    rf = _new(tmp_path)
    rf.update_meta(status="complete", ended="2026-01-01T00:00:00Z")
    assert RunFolder.open(rf.path).meta["status"] == "complete"
    before = (rf.path / "run.json").read_bytes()

    def failing_replace(src, dst):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(os, "replace", failing_replace)
    with pytest.raises(OSError, match="disk full"):
        rf.update_meta(status="aborted")
    monkeypatch.undo()
    assert (rf.path / "run.json").read_bytes() == before  # old content intact
    assert [p.name for p in rf.path.iterdir() if p.name.endswith(".tmp")] == []  # no litter
    with pytest.raises(ConfigError, match="status"):
        rf.update_meta(status="weird")


def test_points_round_trip_and_frame(tmp_path):
    rf = _new(tmp_path)
    rows = [
        {"point": "2.000", "rail_v": 2.0, "vpp_v": 0.1 + 0.2, "oscillating": False, "note": None},
        {"point": "2.100", "rail_v": 2.1, "vpp_v": math.inf, "oscillating": True, "note": "ok, \"q\""},
        {"point": "x\ny", "rail_v": -0.0, "vpp_v": math.nan, "oscillating": True, "note": "1.5"},
    ]
    for row in rows:
        rf.append_point(1, "sweep up!", row, COLUMNS)
    assert rf.steps() == [(1, "sweep_up_")]
    back = RunFolder.open(rf.path).points(1, "sweep up!")
    assert len(back) == 3 and back[0] == rows[0]
    assert back[1]["note"] == 'ok, "q"' and back[2]["note"] == "1.5" and back[2]["point"] == "x\ny"
    assert struct.pack("<d", back[2]["rail_v"]) == struct.pack("<d", -0.0)
    assert math.isnan(back[2]["vpp_v"]) and back[1]["vpp_v"] == math.inf
    frame = rf.points_frame(1, "sweep up!")
    assert isinstance(frame, pd.DataFrame)
    assert list(frame.columns) == ["point", *COLUMNS]
    np.testing.assert_array_equal(frame["rail_v"].to_numpy(float), [2.0, 2.1, -0.0])
    header = (rf.path / "points" / "01-sweep_up_.csv").read_text().splitlines()[0]
    assert header == "point,rail_v,vpp_v,oscillating,note"


def test_append_only_and_header_mismatch(tmp_path):
    rf = _new(tmp_path)
    rf.append_point(0, "s", {"point": "a", "rail_v": 1.0}, ["rail_v"])
    path = rf.points_file(0, "s")
    first = path.read_bytes()
    rf.append_point(0, "s", {"point": "b", "rail_v": 2.0}, ["rail_v"])
    assert path.read_bytes().startswith(first)  # earlier bytes never rewritten
    with pytest.raises(ConfigError, match="differ from header"):
        RunFolder.open(rf.path).append_point(0, "s", {"point": "c"}, ["vpp_v"])


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    values=st.lists(
        st.tuples(
            st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=12),
            st.floats(allow_nan=False),
            st.one_of(st.none(), st.booleans(), st.text(max_size=8, alphabet=st.characters(blacklist_categories=("Cs",)))),
        ),
        min_size=1,
        max_size=6,
    )
)
def test_points_round_trip_property(tmp_path_factory, values):
    rf = _new(tmp_path_factory.mktemp("prop"))
    rows = [{"point": k, "x": x, "y": y} for k, x, y in values]
    for row in rows:
        rf.append_point(3, "p", row, ["x", "y"])
    back = RunFolder.open(rf.path).points(3, "p")
    assert [r["point"] for r in back] == [r["point"] for r in rows]
    assert [struct.pack("<d", r["x"]) for r in back] == [struct.pack("<d", r["x"]) for r in rows]
    assert [(type(r["y"]), r["y"]) for r in back] == [(type(r["y"]), r["y"]) for r in rows]
    assert rf.damage == ()


def test_torn_last_line_is_skipped_reported_and_never_merged(tmp_path):
    rf = _new(tmp_path)
    for i in range(3):
        rf.append_point(0, "sweep", {"point": f"p{i}", "rail_v": 2.0 + i, "vpp_v": 1.0}, ["rail_v", "vpp_v"])
    path = rf.points_file(0, "sweep")
    with open(path, "ab") as fh:  # a crash in the middle of writing the next row
        fh.write(b"p3,5.0,1.2")  # would have 3 fields: looks complete, but has no line end
    reopened = RunFolder.open(rf.path)
    assert [d.line for d in reopened.damage] == [5] and "torn" in reopened.damage[0].reason
    assert [r["point"] for r in reopened.points(0, "sweep")] == ["p0", "p1", "p2"]
    # Resume: the next row must not be glued onto the fragment.
    reopened.append_point(0, "sweep", {"point": "p3", "rail_v": 5.0, "vpp_v": 1.3}, ["rail_v", "vpp_v"])
    again = RunFolder.open(rf.path)
    pts = again.points(0, "sweep")
    assert [r["point"] for r in pts] == ["p0", "p1", "p2", "p3"]
    assert pts[-1]["vpp_v"] == 1.3
    assert [d.line for d in again.damage] == [5]  # still reported, from the side file
    assert (path.parent / (path.name + ".torn")).read_text().split() == ["5"]


def test_torn_header_line(tmp_path):
    rf = _new(tmp_path)
    path = rf.points_file(2, "s")
    path.write_bytes(b"point,rail")  # crashed while writing the header + first row
    again = RunFolder.open(rf.path)
    assert again.points(2, "s") == [] and len(again.damage) == 1
    again.append_point(2, "s", {"point": "a", "rail_v": 1.0}, ["rail_v"])
    assert RunFolder.open(rf.path).points(2, "s") == [{"point": "a", "rail_v": 1.0}]


def test_malformed_middle_line_is_reported(tmp_path):
    rf = _new(tmp_path)
    rf.append_point(0, "s", {"point": "a", "rail_v": 1.0}, ["rail_v"])
    with open(rf.points_file(0, "s"), "ab") as fh:
        fh.write(b"b,1.0,extra\n")
    rf2 = RunFolder.open(rf.path)
    assert len(rf2.points(0, "s")) == 1
    assert "malformed" in rf2.damage[0].reason and rf2.damage[0].line == 3


def test_waveform_round_trip(tmp_path):
    rf = _new(tmp_path)
    rng = np.random.default_rng(1)
    volts = rng.normal(size=1000)
    rel = rf.save_waveform(4, "start up", "4.500", volts=volts, dt_s=1e-6, t0_s=-2e-4)
    assert rel == "waveforms/04-start_up/4.500.npz"
    back = rf.load_waveform(rel)
    np.testing.assert_array_equal(back["volts"], volts)  # lossless (zip deflate)
    assert back["dt_s"] == 1e-6 and back["t0_s"].shape == ()
    with pytest.raises(ConfigError, match="leaves the run folder"):
        rf.load_waveform("../../etc/passwd")
    with pytest.raises(ConfigError, match="missing"):
        rf.load_waveform("waveforms/nothing.npz")


def test_parameters_round_trip_and_validation(tmp_path):
    rf = _new(tmp_path)
    assert rf.parameters() == {}
    rf.write_parameters(
        {
            "dropout_v": {"value": np.float64(2.71), "unit": "V", "uncertainty": 0.01, "step": "sweep",
                          "spec": {"max": 3.0}, "verdict": "pass"},
            "linear_lo_v": {"value": 3.2, "unit": "V"},
        }
    )
    params = RunFolder.open(rf.path).parameters()
    assert params["dropout_v"]["value"] == 2.71 and params["dropout_v"]["spec"] == {"min": None, "max": 3.0}
    assert params["linear_lo_v"]["verdict"] is None and params["linear_lo_v"]["method"] == ""
    with pytest.raises(ConfigError, match="verdict"):
        rf.write_parameters({"x": {"value": 1.0, "verdict": "maybe"}})
    with pytest.raises(ConfigError, match="spec"):
        rf.write_parameters({"x": {"value": 1.0, "spec": {"typ": 1}}})


def test_sanitising():
    assert sanitise_name("sweep up/down") == "sweep_up_down"
    assert sanitise_name("") == "step"
    assert sanitise_key("../x") == "___x"
    assert sanitise_key("4.500") == "4.500"


@pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="needs /proc to name file descriptors")
def test_every_row_is_fsynced(tmp_path, monkeypatch):
    # Durability: each row reaches the disk before append_point returns (POSIX fsync(2)).
    rf = _new(tmp_path)
    synced = []
    real_fsync = os.fsync

    def naming_fsync(fd):
        synced.append(os.readlink(f"/proc/self/fd/{fd}"))
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", naming_fsync)
    for i in range(3):
        rf.append_point(0, "s", {"point": str(i), "rail_v": float(i)}, ["rail_v"])
    assert synced.count(str(rf.points_file(0, "s").resolve())) == 3
