"""Run report: files made from the folder alone, parameters in the page, escaping, partial runs."""

from __future__ import annotations

import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from matplotlib.patches import Rectangle

from benchctl.report import build_report
from benchctl.report import plots as plots_mod
from benchctl.report.formatting import fmt
from benchctl.report.runview import load_run
from benchctl.store import RunFolder

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948, section 5.2)

# Invented demo numbers for the "beacon" board, revision B (not measurements).
PARAMS = {
    "dropout_v": {"value": 2.613, "uncertainty": 0.012, "unit": "V", "method": "bisection",
                  "step": "sweep", "spec": {"min": None, "max": 3.0}, "verdict": "pass"},
    "startup_v": {"value": 3.21, "uncertainty": 0.02, "unit": "V", "method": "bisection",
                  "step": "sweep", "spec": {"min": None, "max": 3.1}, "verdict": "fail"},
    "linear_lo_v": {"value": 3.0, "unit": "V", "step": "sweep"},
    "linear_hi_v": {"value": 5.5, "unit": "V", "step": "sweep"},
}


def make_run(path, *, board="beacon", params=PARAMS, status="complete", waveform=True):
    rf = RunFolder.create(
        path, plan_text=f'[board]\nname = "{board}"\nrevision = "B"\nserial = "B0001"\n',
        bench_text="[bench]\nname = \"sim-bench\"\n",
        meta={"board": {"name": board, "revision": "B", "serial": "B0001"},
              "instruments": {"supply": {"maker": "SIMLAB", "model": "PSU-1", "serial": "17",
                                         "firmware": "1.0", "raw": "SIMLAB,PSU-1,17,1.0"}}},
    )
    cols = ["rail_v", "direction", "vpp_v", "vpp_u_v", "freq_hz", "current_a", "thd_db", "oscillating"]
    for direction, rails in (("up", np.linspace(2.0, 6.0, 9)), ("down", np.linspace(6.0, 2.0, 9))):
        for r in rails:
            on = r > (3.2 if direction == "up" else 2.6)
            rf.append_point(0, "sweep", {
                "point": f"{direction}-{r:.3f}", "rail_v": float(r), "direction": direction,
                "vpp_v": 0.8 * (r - 2.5) if on else 0.0, "vpp_u_v": 0.004, "freq_hz": 10.0e6 + 1500 * r,
                "current_a": 0.008 + 0.003 * r, "thd_db": -45.0 + r, "oscillating": on}, cols)
    if waveform:
        t = np.arange(500) * 2e-6
        rel = rf.save_waveform(1, "startup", "5.000", volts=np.sin(2e4 * t) * (1 - np.exp(-t / 2e-4)),
                               envelope_v=1 - np.exp(-t / 2e-4), dt_s=2e-6, t0_s=0.0)
        rf.append_point(1, "startup", {"point": "5.000", "rail_v": 5.0, "waveform": rel,
                                       "startup_time_s": 2e-4}, ["rail_v", "waveform", "startup_time_s"])
    if params is not None:
        rf.write_parameters(params)
    rf.update_meta(status=status)
    return rf


class _Page(HTMLParser):
    """Collects tables (as rows of cell texts), image sources, and every start tag."""

    def __init__(self):
        super().__init__()
        self.tables, self.images, self.tags, self.text = [], [], [], []
        self._row = self._cell = None

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = []
        elif tag == "img":
            self.images.append(dict(attrs))

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.tables[-1].append(self._row)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)


def _parse(path):
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    return page


def _parameter_table(page):
    return next(t for t in page.tables if t and t[0][:2] == ["Parameter", "Value"])


def test_report_files_and_parameters_table(tmp_path):
    rf = make_run(tmp_path / "run")
    index = build_report(rf.path)
    assert index == rf.path / "report" / "index.html"
    assert (index.parent / "summary.md").is_file()
    page = _parse(index)
    table = _parameter_table(page)
    header, rows = table[0], {r[0]: dict(zip(table[0], r, strict=True)) for r in table[1:]}
    assert set(rows) == set(PARAMS)
    for name, p in PARAMS.items():
        assert float(rows[name]["Value"]) == float(fmt(p["value"]))
        assert rows[name]["Unit"] == p["unit"]
    assert rows["dropout_v"]["Verdict"] == "pass" and rows["startup_v"]["Verdict"] == "fail"
    assert float(rows["startup_v"]["Spec max"]) == 3.1 and "Uncertainty" in header
    assert any(r == ["supply", "SIMLAB,PSU-1,17,1.0"] for t in page.tables for r in t)
    facts = {r[0]: r[1] for r in page.tables[0]}
    assert facts["Board"] == "beacon" and facts["Serial"] == "B0001" and facts["Status"] == "complete"
    assert facts["Spec limits"] == "1 pass, 1 fail (startup_v)"
    # every image referenced relatively, present, and a real PNG
    sources = [img["src"] for img in page.images]
    assert sources and all("/" not in s for s in sources)
    for src in sources:
        assert (index.parent / src).read_bytes()[:8] == PNG_MAGIC
    kinds = {s.rsplit("-", 1)[-1].removesuffix(".png") for s in sources}
    assert {"amplitude", "frequency", "current", "thd", "hysteresis", "waveform"} <= kinds


def test_summary_markdown_has_the_parameters(tmp_path):
    rf = make_run(tmp_path / "run", waveform=False)
    rf.append_point(1, "few", {"point": "a", "rail_v": 1.0}, ["rail_v"])  # a step with nothing to plot
    rf.write_parameters({"dropout_v": PARAMS["dropout_v"]})
    build_report(rf.path, out_dir=tmp_path / "elsewhere")
    text = (tmp_path / "elsewhere" / "summary.md").read_text(encoding="utf-8")
    assert "![Output amplitude vs rail](00-sweep-amplitude.png)" in text
    table_lines = [ln for ln in text.splitlines() if ln.startswith("| dropout_v ")]
    assert len(table_lines) == 1
    cells = [c.strip() for c in table_lines[0].strip("|").split("|")]
    assert cells[1] == "2.613" and cells[2] == "0.012" and cells[7] == "pass"


def test_text_from_files_is_escaped(tmp_path):
    evil = "<script>alert(1)</script>"
    params = {evil: {"value": 1.0, "unit": "<b>V</b>", "note": "a | b & <i>c</i>"}}
    rf = make_run(tmp_path / "run", board='x"><img src=y>', params=params, waveform=False)
    index = build_report(rf.path)
    page = _parse(index)
    assert "script" not in page.tags and "b" not in page.tags and "i" not in page.tags
    assert all(img["src"].endswith(".png") for img in page.images)  # no injected <img>
    names = [r[0] for r in _parameter_table(page)[1:]]
    assert names == [evil]  # shown as text, verbatim
    md = (index.parent / "summary.md").read_text(encoding="utf-8")
    row = next(ln for ln in md.splitlines() if "alert" in ln)
    assert row.count(" | ") == 9  # 10 cells: the pipe inside the note is escaped
    assert "<script>" not in md


def test_aborted_run_without_parameters_or_columns(tmp_path):
    rf = RunFolder.create(tmp_path / "run", plan_text="", bench_text="", meta={})
    rf.append_point(0, "odd", {"point": "a", "label": "x"}, ["label"])
    rf.append_point(1, "nothing", {"point": "b"}, [])
    rf.update_meta(status="aborted")
    with open(rf.points_file(0, "odd"), "ab") as fh:
        fh.write(b"torn,")
    index = build_report(rf.path)
    page = _parse(index)
    text = " ".join(page.text)
    assert "aborted" in text and "no parameters.json" in text and "torn" in text
    assert "not plotted (no numbers): label" in text
    assert page.images == []


def test_missing_waveform_file_is_a_note(tmp_path):
    rf = make_run(tmp_path / "run")
    (rf.path / "waveforms" / "01-startup" / "5.000.npz").unlink()
    page = _parse(build_report(rf.path))
    assert "waveform file missing" in " ".join(page.text)


def test_linear_region_is_shaded(tmp_path):
    rf = make_run(tmp_path / "run")
    run = load_run(rf.path)
    step = run.steps[0]
    ctx = plots_mod._Ctx(run, step, "rail_v", {"point", "rail_v"}, [])
    [(title, fig)] = plots_mod.KINDS["amplitude"](ctx)
    ax = fig.axes[0]
    spans = [p for p in ax.patches if isinstance(p, Rectangle)]
    assert len(spans) == 1
    x0, x1 = spans[0].get_x(), spans[0].get_x() + spans[0].get_width()
    assert (x0, x1) == (3.0, 5.5)
    # the region found by another step still shades the sweep
    rf.write_parameters({"linear_lo_v": {"value": 3.5, "step": "linear_region"},
                         "linear_region.linear_hi_v": {"value": 5.0, "step": "linear_region"}})
    run = load_run(rf.path)
    ctx = plots_mod._Ctx(run, run.steps[0], "rail_v", {"point", "rail_v"}, [])
    [(_, fig)] = plots_mod.KINDS["amplitude"](ctx)
    [span] = [p for p in fig.axes[0].patches if isinstance(p, Rectangle)]
    assert (span.get_x(), span.get_x() + span.get_width()) == (3.5, 5.0)
    assert "vpp_u_v" in ctx.used  # drawn as error bars, not as a plot of its own
    assert ax.containers and len(ax.containers[0].lines[2]) == 1  # one errorbar collection


def test_no_pyplot_state(tmp_path):
    rf = make_run(tmp_path / "run")
    code = (
        "import sys\n"
        "from benchctl.report import build_report\n"
        f"build_report({str(rf.path)!r})\n"
        "sys.exit(3 if 'matplotlib.pyplot' in sys.modules else 0)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr.decode()[-2000:]


def test_procedure_style_columns(tmp_path):
    # Column names as the procedures declare them: rail_set_v beside rail_v, u_<col>
    # uncertainties, a "branch" column for up/down, m_* modulation indices vs depth_vpp.
    rf = RunFolder.create(tmp_path / "run", plan_text="", bench_text="", meta={})
    cols = ["rail_set_v", "rail_v", "branch", "vpp_v", "u_vpp_v", "scope_window_s", "vpp_method"]
    for i, (branch, r) in enumerate([("up", 3.0), ("up", 4.0), ("down", 4.0), ("down", 3.0)]):
        rf.append_point(0, "sweep", {"point": str(i), "rail_set_v": r, "rail_v": r - 0.001, "branch": branch,
                                     "vpp_v": 0.5 * r, "u_vpp_v": 0.01, "scope_window_s": 1e-4,
                                     "vpp_method": "sine fit"}, cols)
    for i, depth in enumerate([0.0, 0.2, 0.4]):
        rf.append_point(1, "modulation", {"point": str(i), "depth_vpp": depth, "m_envelope": depth * 0.9,
                                          "u_m_envelope": 0.01, "m_predicted": depth},
                        ["depth_vpp", "m_envelope", "u_m_envelope", "m_predicted"])
    run = load_run(rf.path)
    out = tmp_path / "out"
    out.mkdir()
    sweep = plots_mod.draw_step(run, run.steps[0], out)
    assert [d.kind for d in sweep.drawn] == ["amplitude", "hysteresis"]  # nothing else left to plot
    assert any("scope_window_s = 0.0001" in n for n in sweep.notes)
    assert any("vpp_method" in n for n in sweep.notes)
    mod = plots_mod.draw_step(run, run.steps[1], out)
    assert [d.kind for d in mod.drawn] == ["modulation"]


def test_envelope_of_a_sine_burst():
    # The magnitude of the analytic signal of A*sin(wt) is A (Hilbert transform identity,
    # e.g. Oppenheim & Schafer, "Discrete-Time Signal Processing", 3rd ed., 12.4; from memory).
    t = np.arange(4000) / 1e6
    amp = np.where(t > 2e-3, 0.8, 0.2)
    env = plots_mod._envelope(amp * np.sin(2 * np.pi * 50e3 * t))
    np.testing.assert_allclose(env[400:1600], 0.2, rtol=0.03)
    np.testing.assert_allclose(env[2400:3600], 0.8, rtol=0.03)


def test_rebuild_removes_only_its_own_old_plots(tmp_path):
    rf = RunFolder.create(tmp_path / "run", plan_text="", bench_text="", meta={})
    rf.append_point(0, "s", {"point": "a", "label": "x"}, ["label"])
    out = tmp_path / "run" / "report"
    out.mkdir()
    (out / "03-gone-other-7.png").write_bytes(PNG_MAGIC)  # left by an earlier report
    (out / "keep.png").write_bytes(PNG_MAGIC)  # someone else's file
    build_report(rf.path)
    assert not (out / "03-gone-other-7.png").exists() and (out / "keep.png").exists()


NAMES = ["rail_v", "rail_set_v", "vpp_v", "u_vpp_v", "freq_hz", "current_a", "thd_db", "branch",
         "direction", "depth_vpp", "m_envelope", "m_predicted", "waveform", "records", "note"]
CELLS = st.one_of(st.none(), st.booleans(), st.floats(allow_nan=True, allow_infinity=True),
                  st.sampled_from(["up", "down", "", "x.npz", "../../etc/x.npz", "<b>"]),
                  st.integers(-3, 3))


# No shrink phase: drawing is slow, and the loop must stay bounded in time.
@settings(max_examples=12, deadline=None, phases=[Phase.explicit, Phase.reuse, Phase.generate],
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(columns=st.lists(st.sampled_from(NAMES), min_size=1, max_size=6, unique=True),
       data=st.data())
def test_plots_never_crash_on_odd_points(tmp_path_factory, columns, data):
    # Robustness: any mix of known column names and odd cell values draws or notes, never raises.
    rf = RunFolder.create(tmp_path_factory.mktemp("odd") / "run", plan_text="", bench_text="", meta={})
    n_rows = data.draw(st.integers(1, 5))
    for i in range(n_rows):
        row = {"point": str(i), **{c: data.draw(CELLS) for c in columns}}
        rf.append_point(0, "odd", row, columns)
    run = load_run(rf.path)
    out = tmp_path_factory.mktemp("out")
    result = plots_mod.draw_step(run, run.steps[0], out)
    for drawn in result.drawn:
        assert (out / drawn.file).read_bytes()[:8] == PNG_MAGIC
    assert result.drawn or result.notes  # says something either way
