"""Board models of the simulated bench: laws, truth, revisions, unit spread, board files."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from benchctl.errors import ConfigError
from benchctl.simulated import load_board
from benchctl.simulated.models import BOARDS_DIR, read_table


@pytest.fixture(scope="module")
def beacon():
    return load_board("beacon")


def test_linear_region_is_exactly_linear(beacon):
    t = beacon.truth()
    r = np.linspace(t.linear_lo_v, t.linear_hi_v, 25)
    # reference: numpy.polyfit least squares; a straight line fits to rounding error
    slope, icpt = np.polyfit(r, t.vpp_at(r), 1)
    assert slope == pytest.approx(t.slope_vpp_per_v, rel=1e-12)
    assert icpt == pytest.approx(t.intercept_vpp, abs=1e-12)
    # outside the region the line no longer holds (onset below, compression above)
    assert t.vpp_at(t.linear_lo_v - 0.3) < t.intercept_vpp + t.slope_vpp_per_v * (t.linear_lo_v - 0.3)
    assert t.vpp_at(t.linear_hi_v + 0.5) < t.intercept_vpp + t.slope_vpp_per_v * (t.linear_hi_v + 0.5)


@pytest.mark.parametrize("edge", ["linear_lo_v", "linear_hi_v"])
def test_onset_and_compression_join_smoothly(beacon, edge):
    t = beacon.truth()
    r0 = getattr(t, edge)
    h = 1e-6
    # value and first derivative continuous (central differences, numpy only)
    left = (t.vpp_at(r0) - t.vpp_at(r0 - h)) / h
    right = (t.vpp_at(r0 + h) - t.vpp_at(r0)) / h
    assert left == pytest.approx(t.slope_vpp_per_v, rel=1e-4)
    assert right == pytest.approx(t.slope_vpp_per_v, rel=1e-4)


def test_amplitude_monotonic_and_zero_below_dropout(beacon):
    t = beacon.truth()
    r = np.linspace(t.dropout_v, 8.0, 2000)
    assert np.all(np.diff(t.vpp_at(r)) > 0)
    assert t.vpp_at(t.dropout_v - 1e-3) == 0.0
    assert t.startup_v > t.dropout_v  # hysteresis
    assert 0.2 < t.vpp_at(t.dropout_v) < 0.3  # onset_vpp_v = 0.25 plus unit spread


def test_startup_time_matches_ode_integration(beacon):
    """The closed-form 90 % time against scipy's ODE solver on the same envelope law."""
    t = beacon.truth()
    rail = 5.0
    final = t.vpp_at(rail)
    tau_env = beacon.tau_env_s
    p = beacon.growth_tau_at(rail) / tau_env

    # d ln a / dt = (1 - (a/A)^p) / tau_grow, i.e. the logistic law in u = (a/A)^p
    def rhs(_, y):
        return [(1.0 - math.exp(p * (y[0] - math.log(final)))) / (p * tau_env)]

    def reach90(_, y):
        return y[0] - math.log(0.9 * final)

    reach90.terminal = True
    sol = solve_ivp(rhs, (0.0, 1.0), [math.log(beacon.seed_vpp_v)], events=reach90,
                    rtol=1e-10, atol=1e-12, max_step=tau_env)
    # reference: scipy.integrate.solve_ivp (RK45) event time
    assert sol.t_events[0][0] == pytest.approx(t.startup_time_s(rail), rel=1e-5)
    # small-signal growth is exponential with time constant tau_grow
    g = beacon.growth_factor(np.array([1e-4, 2e-4]), rail)
    assert math.log(g[1] / g[0]) == pytest.approx(1e-4 / beacon.growth_tau_at(rail), rel=1e-3)
    assert math.isinf(t.startup_time_s(t.startup_v - 0.01))


def test_modulation_index_in_linear_region(beacon):
    t = beacon.truth()
    # AM index m = (Amax - Amin) / (Amax + Amin) (handbook definition of the modulation
    # index of an AM envelope); in the linear region it is slope * a / vpp
    a = 0.1
    expected = t.slope_vpp_per_v * a / t.vpp_at(4.5)
    assert t.modulation_index(4.5, 2 * a) == pytest.approx(expected, rel=1e-12)
    # in compression the index drops below the linear prediction
    lin = t.slope_vpp_per_v * a / t.vpp_at(6.2)
    assert t.modulation_index(6.2, 2 * a) < lin


def test_frequency_pushing_and_current(beacon):
    t = beacon.truth()
    df = t.freq_at(5.5) - t.freq_at(4.5)
    assert df == pytest.approx(t.pushing_hz_per_v, rel=1e-9)
    # current law: 8 mA + 3 mA/V while running, less while stopped (board file numbers)
    i_run = t.current_at(5.0, True)
    assert i_run == pytest.approx(beacon.current_osc_a + 5.0 * beacon.current_osc_a_per_v)
    assert t.current_at(5.0, False) < i_run
    assert t.current_at(0.0, True) == 0.0


def test_revision_c_shifts_a_little():
    b = load_board("beacon", revision="B", serial="X1")
    c = load_board("beacon", revision="C", serial="X1")
    assert c.serial == "X1" and c.revision == "C"
    assert b.truth().dropout_v - c.truth().dropout_v == pytest.approx(0.1, abs=0.05)
    assert c.truth().slope_vpp_per_v / b.truth().slope_vpp_per_v == pytest.approx(1.05, abs=0.03)
    assert load_board("beacon", revision="C").serial == "C0001"


def test_unit_spread_is_seeded_per_serial():
    a1 = load_board("beacon", serial="B0001").truth()
    a2 = load_board("beacon", serial="B0001").truth()
    b = load_board("beacon", serial="B0002").truth()
    assert a1.dropout_v == a2.dropout_v
    assert a1.dropout_v != b.dropout_v
    # spread is small: 3 sigma clip of sigma = 0.01 V around 2.6 V
    drops = [load_board("beacon", serial=f"S{i}").truth().dropout_v for i in range(30)]
    assert max(abs(d - 2.6) for d in drops) <= 0.03 + 1e-12
    assert np.std(drops) > 0.002


def test_table_board_interpolates_csv():
    m = load_board("replay")
    table = read_table(BOARDS_DIR / "replay.csv", file="replay.csv")
    r = np.linspace(3.2, 6.2, 17)
    # reference: numpy.interp on the CSV table itself
    assert np.allclose(m.vpp_at(r), np.interp(r, table["rail_v"], table["vpp_v"]))
    assert np.allclose(m.freq_at(r), np.interp(r, table["rail_v"], table["freq_hz"]))
    t = m.truth()
    assert t.dropout_v == 2.7 and t.startup_v == 3.1
    sel = (table["rail_v"] >= t.linear_lo_v) & (table["rail_v"] <= t.linear_hi_v)
    assert t.slope_vpp_per_v == pytest.approx(np.polyfit(table["rail_v"][sel], table["vpp_v"][sel], 1)[0])
    assert t.linear_hi_v - t.linear_lo_v > 1.0


def test_amplifier_gain_and_clipping():
    m = load_board("buffer")
    t = m.truth()
    assert t.gain_at(6.0) - t.gain_at(5.0) == pytest.approx(t.gain_per_v)
    small = m.output(np.array([0.01]), 5.0)[0]
    assert small == pytest.approx(t.gain_at(5.0) * 0.01, rel=1e-3)  # linear for small input
    big = m.output(np.array([10.0, -10.0]), 5.0)
    half = t.swing_vpp_at(5.0) / 2
    assert np.all(np.abs(big) <= half) and abs(big[0]) == pytest.approx(half, rel=1e-6)
    assert t.swing_vpp_at(5.0) == pytest.approx(5.0 - 2 * t.headroom_v)
    assert m.output(np.array([0.1]), 1.0)[0] == 0.0  # below min_rail_v


BASE = """
[board]
name = "t"
kind = "oscillator"
[revisions.A]
nominal_rail_v = 5.0
dropout_v = 2.6
startup_v = 3.0
linear_lo_v = 3.2
linear_hi_v = 5.6
slope_vpp_per_v = 0.6
vpp_at_lo_v = 0.9
onset_vpp_v = 0.25
compression_v = 0.8
freq_nominal_hz = 1.0e6
current_idle_a = 0.002
current_osc_a = 0.008
envelope_bandwidth_hz = 5e4
growth_tau_s = 1e-4
"""


@pytest.mark.parametrize(("edit", "key", "why"), [
    (("dropout_v = 2.6", "dropout_v = 2.6\ncolour = 3"), "revisions.A.colour", "unknown key"),
    (("dropout_v = 2.6", 'dropout_v = "low"'), "revisions.A.dropout_v", "must be a number"),
    (("dropout_v = 2.6", ""), "revisions.A.dropout_v", "missing"),
    (("startup_v = 3.0", "startup_v = 2.0"), "revisions.A.startup_v", "must exceed dropout_v"),
    (("growth_tau_s = 1e-4", "growth_tau_s = -1"), "revisions.A.growth_tau_s", "must be >"),
    (('kind = "oscillator"', 'kind = "blender"'), "board.kind", "unknown kind"),
    (('name = "t"', 'name = "t"\nowner = "x"'), "board.owner", "unknown key"),
    (("[revisions.A]", "[revisions.A]\ninherits = \"Z\""), "revisions.A.inherits", "no revision"),
    (("[revisions.A]", "[revisions.A.spread]\nvolume = 1\n[revisions.A]"), "revisions.A.spread.volume",
     "unknown key"),
])
def test_bad_board_file_names_the_key(tmp_path, edit, key, why):
    path = tmp_path / "bad.toml"
    path.write_text(BASE.replace(*edit, 1))
    with pytest.raises(ConfigError) as exc:
        load_board(path)
    assert exc.value.key == key
    assert why in exc.value.reason
    assert str(path) in str(exc.value)


def test_good_base_file_loads(tmp_path):
    path = tmp_path / "good.toml"
    path.write_text(BASE)
    m = load_board(path)
    assert m.truth().linear_lo_v == 3.2 and m.serial == "A0001"


def test_table_board_without_table_names_the_key(tmp_path):
    toml = (BOARDS_DIR / "replay.toml").read_text().replace('table = "replay.csv"', "")
    (tmp_path / "r.toml").write_text(toml)
    with pytest.raises(ConfigError) as exc:
        load_board(tmp_path / "r.toml")
    assert exc.value.key == "revisions.T1.table"


def test_bad_toml_and_missing_file(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("[board\nname=")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_board(path)
    with pytest.raises(ConfigError, match="not found"):
        load_board(tmp_path / "nope.toml")
    with pytest.raises(ConfigError) as exc:
        load_board("beacon", revision="Q")
    assert exc.value.key == "revisions" and "Q" in exc.value.reason


@pytest.mark.parametrize(("csv_text", "key"), [
    ("rail_v,amps\n1,2\n", "header"),
    ("rail_v,vpp_v\n3,1\n4,x\n5,2\n", "line 3.vpp_v"),
    ("rail_v,vpp_v\n3,1\n4\n5,2\n", "line 3"),
    ("rail_v,vpp_v\n3,1\n3,2\n5,2\n", "rail_v"),
    ("rail_v,vpp_v\n3,1\n", "rows"),
])
def test_bad_table_names_file_and_key(tmp_path, csv_text, key):
    toml = (BOARDS_DIR / "replay.toml").read_text()
    (tmp_path / "replay.toml").write_text(toml)
    (tmp_path / "replay.csv").write_text(csv_text)
    with pytest.raises(ConfigError) as exc:
        load_board(tmp_path / "replay.toml")
    assert exc.value.key == key
    assert exc.value.file.endswith("replay.csv")
