"""End to end: the procedures drive the simulated bench through the drivers, pyvisa-py and
real 127.0.0.1 sockets, and what they report is checked against the simulated board's
analytic ground truth (``sim.truth``). Each tolerance is explained beside its check.
"""

from __future__ import annotations

import math

import pytest
from test_procedures_replay import DictContext, Exploding, _params

from benchctl.drivers.bench import load_bench_text, open_bench
from benchctl.simulated import SimulatedBench


class StepClock:
    """Real monotonic time, no sleeping: the accelerated bench models elapsed time itself."""

    def __init__(self):
        import time

        self._mono = time.monotonic

    def monotonic(self):
        return self._mono()

    def sleep(self, seconds):
        pass


@pytest.fixture
def rig(request):
    """``rig(board, seed, serial)`` -> (sim, bench); everything is closed after the test."""
    opened = []

    def make(board="beacon", seed=1, serial=None):
        kw = {"board": board, "seed": seed}
        if serial:
            kw["serial"] = serial
        sim = SimulatedBench(**kw).__enter__()
        opened.append(sim)
        bench = open_bench(load_bench_text(sim.bench_toml()), max_voltage_v=6.0)
        opened.append(bench)
        return sim, bench

    yield make
    for thing in reversed(opened):
        thing.__exit__(None, None, None)


def _run(bench, name, earlier=None, **given):
    ctx = DictContext(bench, earlier=earlier)
    ctx.clock = StepClock()
    proc, params = _params(name, **given)
    try:
        results = {r.name: r for r in proc.run(ctx, params)}
    finally:
        bench.generator.output(False)
        bench.supply.output(False)
    return results, ctx, params


def _acquisitions(sim):
    return sum(1 for c in sim.command_log("scope") if c.upper().startswith("INIT"))


UNITS = [("beacon", 1, "B0001"), ("beacon", 2, "B0002"), ("replay", 3, None)]


@pytest.mark.parametrize(("board", "seed", "serial"), UNITS)
def test_sweep_then_bisection_find_dropout_and_startup(rig, board, seed, serial):
    sim, bench = rig(board, seed, serial)
    truth = sim.truth
    sweep, sctx, _ = _run(bench, "rail_sweep", start_v=2.2, stop_v=5.4, step_v=0.2, records=1)
    # Coarse brackets from the two branches hold the truth (a bracket is two grid points
    # apart, so the truth must lie between them; 1 mV allows for the supply's settling).
    for name in ("dropout_v", "startup_v"):
        r = sweep[name]
        assert r.low - 1e-3 <= getattr(truth, name) <= r.high + 1e-3, (name, r)
    # Vpp at the nominal rail: linear interpolation between 0.2 V grid points in the
    # linear region is exact for a straight line; 0.5 % covers the fit noise (u ~ 0.2 mV)
    # and the soft compression of the model near the top of the region.
    assert sweep["vpp_at_nominal_v"].value == pytest.approx(truth.vpp_at(5.0), rel=5e-3)
    assert sweep["current_at_nominal_a"].value == pytest.approx(truth.current_at(5.0, True),
                                                                rel=0.01)

    earlier = {"rail_sweep": (sweep, list(sctx.rows.values()))}
    n0 = _acquisitions(sim)
    got, ctx, params = _run(bench, "dropout_startup", earlier=earlier, search="dropout")
    used = _acquisitions(sim) - n0
    d = got["dropout_v"]
    # Bisection to 5 mV: the truth lies in the final bracket; 1 mV for settling.
    assert d.high - d.low <= 0.005 + 1e-9
    assert d.low - 1e-3 <= truth.dropout_v <= d.high + 1e-3
    # Acquisition budget of the threshold search (the scope set-up comes from the sweep:
    # no extra acquisition): log2(range / resolution) + 4.
    lo, hi = sweep["dropout_v"].low - 0.05, sweep["dropout_v"].high + 0.05
    assert used <= math.log2((hi - lo) / 0.005) + 4, used

    got, ctx, params = _run(bench, "dropout_startup", earlier=earlier, search="startup")
    s = got["startup_v"]
    assert s.high - s.low <= 0.005 + 1e-9
    assert s.low - 1e-3 <= truth.startup_v <= s.high + 1e-3


def test_threshold_search_replays_from_its_rows_without_the_bench(rig):
    sim, bench = rig("beacon", 4, "B0004")
    first, ctx, params = _run(bench, "dropout_startup", lo_v=2.4, hi_v=3.3, source="")
    assert first["hysteresis_v"].low <= sim.truth.startup_v - sim.truth.dropout_v \
        <= first["hysteresis_v"].high + 2e-3
    ghost = type("Ghost", (), {})()
    ghost.supply = ghost.scope = ghost.generator = Exploding()
    ghost.wiring = bench.wiring
    replay = DictContext(ghost, recorded=ctx.rows)
    proc, _ = _params("dropout_startup")
    again = {r.name: r for r in proc.run(replay, params)}
    assert replay.measured == 0 and list(replay.rows) == list(ctx.rows)
    assert again == first


# Linearity tolerance (fraction of full scale) and region-end tolerances per board (V).
# beacon: the model leaves its line smoothly (quadratic onset below, tanh compression
# above), so a deviation of 0.2 % of full scale is reached only some way past the true
# ends -- from the model's laws, onset deviation 0.81 V^-1 (dV)^2 and compression
# 0.6 (dV - 0.8 tanh(dV / 0.8)): 0.15 V below, 0.35 V above.
# replay: its true region is where the table's 0.2 V segment slopes stay within 10 % of
# their median; the table's own mV-level wiggles inside the region make a 0.2 % line fit
# ambiguous, so 0.5 % of full scale (11 mV) is used: the neighbouring segments outside
# (slopes 0.70 and 0.48 against 0.55 Vpp/V) then leave the line by 15 mV within 0.1 V
# below 3.2 V and by 11 mV about 0.15 V above 5.6 V: 0.15 V below, 0.25 V above.
REGION = {"beacon": (0.002, 0.15, 0.35), "replay": (0.005, 0.15, 0.25)}


@pytest.mark.parametrize(("board", "seed", "serial"), UNITS)
def test_linear_region_and_pushing_match_the_board(rig, board, seed, serial):
    sim, bench = rig(board, seed, serial)
    tol_fs, lo_tol, hi_tol = REGION[board]
    truth = sim.truth
    reg, ctx, _ = _run(bench, "linear_region", start_v=3.1, stop_v=5.9, step_v=0.1, records=1,
                       tol_fraction_fs=tol_fs)
    slope = reg["supply_sensitivity_vpp_per_v"]
    # Supply sensitivity: the region's line fit against the true slope; 4 standard
    # uncertainties plus 1 % for the model's smooth joins at the region ends, which a
    # linearity tolerance lets into the fitted window.
    assert abs(slope.value - truth.slope_vpp_per_v) <= 4 * slope.uncertainty \
        + 0.01 * truth.slope_vpp_per_v
    assert abs(reg["linear_lo_v"].value - truth.linear_lo_v) <= lo_tol
    assert abs(reg["linear_hi_v"].value - truth.linear_hi_v) <= hi_tol
    assert reg["linearity_r2"].value > 0.999

    earlier = {"linear_region": (reg, list(ctx.rows.values()))}
    push, _, _ = _run(bench, "pushing", earlier=earlier)
    p = push["pushing_hz_per_v"]
    # Pushing: weighted line fit of frequency in the region; 4 u + 1 % (the table board
    # interpolates its frequency column piecewise, so its slope varies a little).
    assert abs(p.value - truth.pushing_hz_per_v) <= 4 * p.uncertainty \
        + 0.01 * abs(truth.pushing_hz_per_v)
    i_slope = truth.current_at(5.0, True) - truth.current_at(4.0, True)
    # Current: readback resolution 10 uA and noise 20 uA over ~25 points: 5 %.
    assert push["current_slope_a_per_v"].value == pytest.approx(i_slope, rel=0.05)


def test_modulation_index_matches_the_prediction(rig):
    sim, bench = rig("beacon", 5, "B0005")
    got, ctx, params = _run(bench, "modulation", centre_v=4.4)
    # Measured / predicted at the smallest depth: the board's envelope bandwidth (first
    # order, 50 kHz in the model) attenuates a 2 kHz tone by 1 - 1/sqrt(1 + (2/50)^2)
    # = 0.08 %; the envelope estimate's noise at m ~ 0.02 is ~1 %: 3 %.
    assert got["modulation_ratio"].value == pytest.approx(1.0, abs=0.03)
    for row in (r for r in ctx.rows.values() if r["kind"] == "depth"):
        want = sim.truth.modulation_index(4.4, row["depth_vpp"])
        # the simulated board's own quasi-static prediction, same 3 % (relative) or 1e-3
        assert row["m_envelope"] == pytest.approx(want, rel=0.03, abs=1e-3)
    assert got["max_clean_depth_vpp"].value == max(params["depths_vpp"])
    assert sim.generator_state()["output_on"] is False


def test_startup_time_matches_the_board(rig):
    sim, bench = rig("beacon", 6, "B0006")
    got, ctx, _ = _run(bench, "startup_time", rail_v=5.0)
    want = sim.truth.startup_time_s(5.0)
    # The truth counts from an ideal step; the measurement from the rail's 50 % crossing.
    # The supply slews at 20 V/ms, so the rail passes start-up (~3.0 V) (3.0 - 2.5) / 20e3
    # = 25 us after its 50 % point: allow 25 us plus 3 % for the envelope smoothing.
    assert abs(got["startup_time_s"].value - want) <= 25e-6 + 0.03 * want
    shots = [r for r in ctx.rows.values() if r["kind"] == "shot"]
    assert shots and all(r["settled"] for r in shots)


def test_faint_onset_repeats_only_near_the_threshold_and_still_brackets_it(rig, tmp_path):
    """A board whose amplitude just above dropout (20 mVpp) is near the noise (4 mV rms)."""
    from importlib import resources

    text = resources.files("benchctl.simulated").joinpath("boards/beacon.toml").read_text()
    lines = []
    for line in text.splitlines():
        if line.startswith("onset_vpp_v"):
            line = "onset_vpp_v = 0.02"
        elif line.startswith("noise_v_rms"):
            line = "noise_v_rms = 0.004"
        lines.append(line)
    board = tmp_path / "faint.toml"
    board.write_text("\n".join(lines) + "\n")
    sim, bench = rig(str(board), 7, None)
    truth = sim.truth
    got, ctx, _ = _run(bench, "dropout_startup", lo_v=2.4, hi_v=3.3, source="", search="dropout")
    probes = [r for k, r in ctx.rows.items() if k != "setup"]  # one acquisition each
    d = got["dropout_v"]
    # The detector sees 20 mVpp in 4 mV rms noise through its peak-prominence test (the
    # periodogram gains 10 log10(N/2) = 27 dB at N = 1024): the bracket still holds the
    # truth, 1 mV for settling.
    assert d.low - 1e-3 <= truth.dropout_v <= d.high + 1e-3
    repeated = [r for r in probes if r["repeat"] > 0]
    # repeats happen, and only close to the threshold (within 30 mV, where the onset's
    # amplitude is within a few noise sigmas of the detection limit)
    assert all(abs(r["rail_set_v"] - truth.dropout_v) < 0.03 for r in repeated)
    assert repeated
    assert len(probes) <= math.log2(0.9 / 0.005) + 4


def test_modulation_refuses_a_depth_that_would_lift_the_rail_over_the_limit(rig):
    from benchctl.errors import SafetyError

    sim, bench = rig("beacon", 8, "B0008")
    before = {role: len(sim.command_log(role)) for role in ("supply", "generator", "scope")}
    with pytest.raises(SafetyError, match=r"max_rail_v"):
        # 5.5 V + 1.2 Vpp / 2 = 6.1 V > 6.0 V: refused before anything is sent
        _run(bench, "modulation", centre_v=5.5, depths_vpp=[0.2, 1.2])
    for role, n in before.items():
        sent = sim.command_log(role)[n:]
        # only the test's own clean-up (outputs off) and the drivers' error-queue checks
        assert all(c.endswith(" OFF") or c.startswith("SYST") for c in sent), (role, sent)
    assert sim.supply_state()["setpoint_v"] == 0.0
    assert sim.generator_state()["output_on"] is False


def test_an_abort_between_modulation_points_leaves_the_generator_off(rig):
    from benchctl.errors import AbortRequested

    sim, bench = rig("beacon", 9, "B0009")

    class AbortAfter(DictContext):
        def check_abort(self):
            if len(self.rows) >= 5:  # three static points and two depths done
                raise AbortRequested("test abort")

    ctx = AbortAfter(bench)
    ctx.clock = StepClock()
    proc, params = _params("modulation", centre_v=4.4)
    with pytest.raises(AbortRequested):
        proc.run(ctx, params)
    assert len(ctx.rows) == 5
    assert sim.generator_state()["output_on"] is False
    bench.supply.output(False)


def _sweep_setup_counts(caplog):
    import re

    for rec in caplog.records:
        m = re.match(r"rail_sweep: (\d+) autoscales, (\d+) points measured with the previous "
                     r"set-up \((\d+) retuned it\)", rec.getMessage())
        if m:
            return tuple(int(g) for g in m.groups())
    raise AssertionError("the sweep did not log its set-up counts")


def test_a_fine_sweep_retunes_the_remembered_scale_instead_of_autoscaling(rig, caplog, monkeypatch):
    import logging

    from benchctl.procedures import measure

    caplog.set_level(logging.INFO, logger="test")
    sim, bench = rig("beacon", 1)
    truth = sim.truth
    grid = dict(start_v=3.4, stop_v=5.0, step_v=0.04, records=1, hold_s=0.02)
    _, ctx, _ = _run(bench, "rail_sweep", **grid)
    autoscales, reused, retunes = _sweep_setup_counts(caplog)
    rows = list(ctx.rows.values())
    # The amplitude grows about 2.5x over the sweep (a straight line in the linear region):
    # the first point autoscales, then each kept record near a screen edge retunes the scale.
    assert autoscales == 1 and retunes >= 2 and reused == len(rows) - 1
    assert all(r["rescales"] == 0 for r in rows)  # no record clipped after a retune
    for r in rows:
        if r["rail_set_v"] >= truth.linear_lo_v + 0.1:
            # the retuned screens keep the 8-bit record good enough for a 1 % Vpp (the fit
            # error at 0.5-0.9 of the screen is well below that; our tolerance)
            assert r["vpp_v"] == pytest.approx(truth.vpp_at(r["rail_set_v"]), rel=0.01), r
    # without the retune the same sweep runs into autoscales part way
    caplog.clear()
    monkeypatch.setattr(measure, "_retuned", lambda setup, top_v, bottom_v: None)
    sim2, bench2 = rig("beacon", 1)
    _run(bench2, "rail_sweep", **grid)
    assert _sweep_setup_counts(caplog)[0] >= 2
