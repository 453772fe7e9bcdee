"""Pure logic of the procedures: decisions with repeats, threshold bisection, refinement."""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchctl.procedures.common import (
    Vote,
    decide,
    interpolate_at,
    point_key,
    rail_grid,
    refine_rails,
    search_threshold,
)

# ---------------------------------------------------------------- decide()


def test_one_clear_vote_decides_alone():
    assert decide([Vote(True, True, 30.0)], max_votes=5) is True
    assert decide([Vote(False, True, -30.0)], max_votes=5) is False


def test_ambiguous_votes_repeat_until_a_lead_of_two():
    amb_on, amb_off = Vote(True, False, 0.5), Vote(False, False, -0.5)
    assert decide([amb_on], max_votes=5) is None
    assert decide([amb_on, amb_off], max_votes=5) is None
    assert decide([amb_on, amb_off, amb_off], max_votes=5) is None
    assert decide([amb_on, amb_off, amb_off, amb_off], max_votes=5) is False
    assert decide([amb_on, amb_on], max_votes=5) is True


def test_vote_budget_ends_with_majority_or_score():
    amb_on, amb_off = Vote(True, False, 0.5), Vote(False, False, -0.2)
    # max_votes=2 and a 1:1 split: the summed score (+0.3) breaks the tie.
    assert decide([amb_on, amb_off], max_votes=2) is True
    assert decide([amb_on, amb_off, amb_on], max_votes=3) is True
    with pytest.raises(ValueError, match="max_votes"):
        decide([amb_on], max_votes=0)


# ---------------------------------------------------------------- search_threshold()


def _clear_probe(threshold_v, calls):
    def probe(rail_v, label, repeat):
        calls.append((rail_v, label, repeat))
        on = rail_v >= threshold_v
        return Vote(on, True, 10.0 if on else -10.0)

    return probe


@pytest.mark.parametrize("threshold_v", [2.6037, 2.0001, 3.9999, 3.1415926])
def test_bisection_costs_one_acquisition_per_clear_decision(threshold_v):
    calls = []
    res = search_threshold(_clear_probe(threshold_v, calls), lo_v=2.0, hi_v=4.0,
                           resolution_v=0.005, max_repeats=4)
    # Bisection bound |p_n - p| <= (b - a) / 2^n (Burden & Faires, Numerical Analysis,
    # Theorem 2.1): ceil(log2(2.0 / 0.005)) = 9 halvings reach the resolution.
    n_bisect = math.ceil(math.log2(2.0 / 0.005))
    assert res.acquisitions == n_bisect + 2 == len(calls)
    assert res.low_v <= threshold_v <= res.high_v
    assert res.high_v - res.low_v <= 0.005
    assert abs(res.value_v - threshold_v) <= 0.0025
    # GUM 4.3.7: a value spread uniformly over a width w has u = w / sqrt(12).
    assert res.u_v == pytest.approx((res.high_v - res.low_v) / math.sqrt(12))
    assert all(repeat == 0 for _, _, repeat in calls)


def test_bisection_repeats_only_where_detection_is_noisy():
    rng = np.random.default_rng(7)
    threshold_v, band_v = 2.6, 0.02
    calls = []

    def probe(rail_v, label, repeat):
        calls.append((rail_v, repeat))
        dist = rail_v - threshold_v
        if abs(dist) > band_v:
            return Vote(dist > 0, True, math.copysign(10.0, dist))
        # noisy band: right with probability 0.8, never clear
        right = rng.random() < 0.8
        on = (dist > 0) == right
        return Vote(on, False, 0.1 if on else -0.1)

    res = search_threshold(probe, lo_v=2.0, hi_v=4.0, resolution_v=0.005, max_repeats=4)
    repeats = [r for r in calls if r[1] > 0]
    assert repeats, "the noisy band must have caused repeats"
    assert all(abs(v - threshold_v) <= band_v for v, _ in repeats)
    assert res.value_v is not None and abs(res.value_v - threshold_v) < 0.05
    assert res.acquisitions == len(calls)
    assert max(len(d.votes) for d in res.decisions) <= 5


def test_bisection_reports_a_threshold_outside_the_range():
    calls = []
    above = search_threshold(_clear_probe(5.0, calls), lo_v=2.0, hi_v=4.0, resolution_v=0.01)
    assert above.value_v is None and above.low_v == 4.0 and "top" in above.note
    below = search_threshold(_clear_probe(1.0, calls), lo_v=2.0, hi_v=4.0, resolution_v=0.01)
    assert below.value_v is None and below.high_v == 2.0 and "bottom" in below.note
    with pytest.raises(ValueError, match="resolution_v"):
        search_threshold(_clear_probe(1.0, calls), lo_v=2.0, hi_v=4.0, resolution_v=0.0)
    with pytest.raises(ValueError, match="hi_v"):
        search_threshold(_clear_probe(1.0, calls), lo_v=4.0, hi_v=2.0, resolution_v=0.1)


# ---------------------------------------------------------------- refine_rails()


def test_refinement_converges_on_a_state_flip_to_the_resolution():
    threshold_v = 3.037

    def vpp(v):
        return 0.6 * v if v >= threshold_v else 0.0

    rails = rail_grid(2.0, 4.0, 0.25)
    for _round in range(12):  # bounded
        osc = [v >= threshold_v for v in rails]
        new = refine_rails(rails, [vpp(v) for v in rails], osc, resolution_v=0.01,
                           bend_tol_vpp=0.05)
        if not new:
            break
        assert not set(new) & set(rails)
        rails = sorted(rails + new)
    else:
        pytest.fail("refinement did not converge in 12 rounds")
    off = max(v for v in rails if v < threshold_v)
    on = min(v for v in rails if v >= threshold_v)
    assert on - off <= 0.01
    # Away from the flip and on a straight line nothing was added: spacing stays 0.25 V.
    high = [v for v in rails if v > 3.3]
    assert np.allclose(np.diff(high), 0.25)


def test_refinement_adds_points_where_the_curve_bends():
    # A knee at 3.5 V: slope 0.6 below, 0.1 above.
    def vpp(v):
        return 0.6 * v if v < 3.5 else 2.1 + 0.1 * (v - 3.5)

    rails = rail_grid(2.0, 5.0, 0.5)
    new = refine_rails(rails, [vpp(v) for v in rails], [True] * len(rails),
                       resolution_v=0.05, bend_tol_vpp=0.02)
    assert new == [3.25, 3.75]
    # Below the tolerance nothing happens (a straight line has zero second difference).
    assert refine_rails(rails, [0.6 * v for v in rails], [True] * len(rails),
                        resolution_v=0.05, bend_tol_vpp=0.02) == []


# ---------------------------------------------------------------- small helpers


def test_rail_grid_includes_both_ends_and_goes_down():
    assert rail_grid(2.0, 3.0, 0.25) == [2.0, 2.25, 2.5, 2.75, 3.0]
    assert rail_grid(3.0, 2.0, 0.3) == [3.0, 2.75, 2.5, 2.25, 2.0]
    with pytest.raises(ValueError, match="step_v"):
        rail_grid(2.0, 3.0, 0.0)


def test_point_keys_are_file_name_safe_and_deterministic():
    key = point_key("up", 3, 2.6)
    assert key == "up-3-2.600000"
    assert point_key("a/b", 0.1 + 0.2) == "a_b-0.300000"


def test_interpolation_matches_numpy_interp_and_propagates_uncertainty():
    x = [2.0, 3.0, 4.0, 5.0]
    y = [0.1, 1.3, 1.9, 2.5]
    u = [0.01, 0.02, 0.02, 0.04]
    for x0 in (2.0, 2.5, 3.7, 5.0):
        val, _ = interpolate_at(x, y, x0, u)
        # numpy.interp as reference library
        assert val == pytest.approx(float(np.interp(x0, x, y)), abs=1e-12)
    _, unc = interpolate_at(x, y, 4.5, u)
    # GUM 5.1.2, equal weights 0.5: u = sqrt(0.25 * 0.02^2 + 0.25 * 0.04^2)
    assert unc == pytest.approx(math.sqrt(0.25 * 0.02**2 + 0.25 * 0.04**2))
    assert interpolate_at(x, y, 5.5, u) == (None, None)


# ---------------------------------------------------------------- votes from the detector


def _record(amplitude_v, *, seed, n=2048, fs_hz=16e6, freq_hz=1.0e6, noise_v=0.01):
    t = np.arange(n) / fs_hz
    rng = np.random.default_rng(seed)
    return amplitude_v * np.sin(2 * np.pi * freq_hz * t + 0.4) + rng.normal(0, noise_v, n)


def test_votes_are_clear_far_from_the_detector_threshold_and_ambiguous_near_it():
    from benchctl.analysis import detect_oscillation
    from benchctl.procedures.measure import vote_from

    fs = 16e6
    strong = vote_from(detect_oscillation(_record(0.5, seed=1), fs_hz=fs), clear_margin_db=6.0)
    assert strong.oscillating and strong.clear and strong.score >= 6.0
    silent = vote_from(detect_oscillation(_record(0.0, seed=2), fs_hz=fs), clear_margin_db=6.0)
    assert not silent.oscillating and silent.clear and silent.score <= -6.0
    # Near the threshold: SNR = A^2 / 2 / sigma^2 (a sine's power A^2/2 over white noise
    # of variance sigma^2, the IEEE 1241 SNR definition) of 10 dB, the detector's default
    # min_snr_db, gives A = sigma * sqrt(2 * 10).
    a = 0.01 * math.sqrt(2 * 10 ** (10 / 10))
    marginal = [vote_from(detect_oscillation(_record(a, seed=s), fs_hz=fs), clear_margin_db=6.0)
                for s in range(10)]
    assert not any(v.clear for v in marginal)
    assert all(abs(v.score) < 6.0 for v in marginal)


def test_a_flat_record_is_a_clear_no():
    from benchctl.analysis import detect_oscillation
    from benchctl.procedures.measure import vote_from

    vote = vote_from(detect_oscillation(np.zeros(256), fs_hz=1e6), clear_margin_db=6.0)
    assert not vote.oscillating and vote.clear and vote.score <= -6.0


@pytest.mark.parametrize(("fraction", "retune"), [(0.9, True), (0.86, True), (0.84, False),
                                                   (0.7, False), (0.56, False), (0.54, True),
                                                   (0.3, True)])
def test_a_kept_record_near_a_screen_edge_retunes_the_remembered_scale(fraction, retune) -> None:
    from benchctl.procedures.measure import ScopeSetup, _retuned

    setup = ScopeSetup(scale_v_div=0.25, offset_v=0.0, window_s=1e-4, sample_rate_hz=1e8)
    span = fraction * 8 * 0.25  # V, on a 2 V screen
    t = np.arange(4000) / 1e8
    volts = 0.3 + 0.5 * span * np.sin(2 * np.pi * 2e6 * t + 0.1)
    got = _retuned(setup, float(volts.max()), float(volts.min()))
    if not retune:
        assert got is None
        return
    seen = float(volts.max() - volts.min())
    # the span seen fills 75 % of the new screen (6 of 8 divisions), centred on the record
    assert got.scale_v_div * 8 * 0.75 == pytest.approx(seen, rel=1e-12)
    assert got.offset_v == pytest.approx(0.5 * (volts.max() + volts.min()), abs=1e-12)
    assert (got.window_s, got.sample_rate_hz, got.coupling) == (setup.window_s, setup.sample_rate_hz, setup.coupling)


def test_a_flat_record_does_not_retune() -> None:
    from benchctl.procedures.measure import ScopeSetup, _retuned

    setup = ScopeSetup(scale_v_div=0.25, offset_v=0.0, window_s=1e-4, sample_rate_hz=1e8)
    assert _retuned(setup, 0.2, 0.2) is None
