"""Datasheet tables: Min/Typ/Max against numpy, guard bands against the exact tolerance factor."""

from __future__ import annotations

import csv
import io
import json
import math

import numpy as np
import pytest
from scipy import optimize, stats

from benchctl.errors import ConfigError
from benchctl.report import datasheet, howe_factor
from benchctl.store import RunFolder


def make_unit(path, revision, serial, params, *, status="complete", started=None, board="beacon"):
    meta = {"board": {"name": board, "revision": revision, "serial": serial}}
    if started:
        meta["started"] = started
    rf = RunFolder.create(path, plan_text="", bench_text="", meta=meta)
    rf.append_point(0, "sweep", {"point": "p", "rail_v": 5.0}, ["rail_v"])
    rf.write_parameters(params)
    rf.update_meta(status=status)
    return rf.path


def exact_two_sided_k(n, coverage, confidence):
    """Exact two-sided normal tolerance factor by numerical integration.

    confidence = sqrt(2n/pi) * integral_0^inf P(chi2_nu > nu r(z)^2 / k^2) exp(-n z^2/2) dz,
    with r(z) solving Phi(z + r) - Phi(z - r) = coverage (K. Krishnamoorthy and T. Mathew,
    "Statistical Tolerance Regions", Wiley 2009, section 2.3; formula from memory, and
    checked here against a Monte Carlo estimate below).
    """
    nu = n - 1
    # Gauss-Legendre quadrature on [0, 8/sqrt(n)] (the integrand is < exp(-32) beyond);
    # r(z) does not depend on k, so it is solved once per node.
    nodes, weights = np.polynomial.legendre.leggauss(160)
    half = 4 / math.sqrt(n)
    z = half * (nodes + 1)
    r = np.array([optimize.brentq(lambda r, zi=zi: stats.norm.cdf(zi + r) - stats.norm.cdf(zi - r) - coverage,
                                  0, 50, xtol=1e-14) for zi in z])
    dens = np.exp(-n * z * z / 2) * weights * half * math.sqrt(2 * n / math.pi)

    def gap(k):
        return float(np.sum(stats.chi2.sf(nu * r**2 / k**2, nu) * dens)) - confidence

    return optimize.brentq(gap, 1.0, 50.0)


def test_exact_factor_reference_by_monte_carlo():
    # Independent check of the reference itself: with k exact, the interval mean +/- k*s of
    # n normal samples covers >= 90 % of the population in 95 % of the samples.
    k = exact_two_sided_k(10, 0.90, 0.95)
    rng = np.random.default_rng(20261201)
    x = rng.normal(size=(100_000, 10))
    m, s = x.mean(axis=1), x.std(axis=1, ddof=1)
    content = stats.norm.cdf(m + k * s) - stats.norm.cdf(m - k * s)
    frac = (content >= 0.90).mean()
    assert frac == pytest.approx(0.95, abs=0.004)  # ~5.5 binomial standard errors


@pytest.mark.parametrize(("n", "p", "g"), [(5, 0.90, 0.95), (10, 0.90, 0.95), (10, 0.99, 0.95), (30, 0.95, 0.99)])
def test_howe_factor_close_to_exact(n, p, g):
    # Howe (1969) is accurate to well under 1 % for these n (Krishnamoorthy & Mathew 2009,
    # section 2.3.1, from memory); the exact value is computed above.
    assert howe_factor(n, coverage=p, confidence=g) == pytest.approx(exact_two_sided_k(n, p, g), rel=0.01)


def test_howe_factor_refuses_one_unit():
    with pytest.raises(ValueError, match="n=1"):
        howe_factor(1, coverage=0.9, confidence=0.95)


def test_min_typ_max_against_numpy(tmp_path):
    rng = np.random.default_rng(7)
    dropout_b = rng.normal(2.6, 0.05, size=5)  # invented demo values, 5 units of revision B
    dropout_c = rng.normal(2.4, 0.05, size=4)  # and 4 of revision C
    sens = rng.normal(0.8, 0.01, size=5)
    runs = []
    for i, (d, s) in enumerate(zip(dropout_b, sens, strict=True)):
        params = {"dropout_v": {"value": float(d), "unit": "V", "spec": {"max": 3.0}},
                  "sensitivity_vpp_per_v": {"value": float(s) if i != 2 else None, "unit": "V/V"}}
        runs.append(make_unit(tmp_path / f"b{i}", "B", f"B{i:04d}", params))
    for i, d in enumerate(dropout_c):
        runs.append(make_unit(tmp_path / f"c{i}", "C", f"C{i:04d}", {"dropout_v": {"value": float(d), "unit": "V"}}))
    sheet = datasheet(runs, coverage=0.90, confidence=0.95)
    groups = {(g.board, g.revision): g for g in sheet.groups}
    assert set(groups) == {("beacon", "B"), ("beacon", "C")}
    rows_b = {r.parameter: r for r in groups["beacon", "B"].rows}
    drop = rows_b["dropout_v"]
    # numpy as the reference library: min, median (our Typ), max, mean, std(ddof=1)
    assert (drop.minimum, drop.typical, drop.maximum) == (
        float(np.min(dropout_b)), float(np.median(dropout_b)), float(np.max(dropout_b)))
    assert drop.n_units == 5 and drop.unit == "V" and drop.spec_max == 3.0
    assert drop.k == pytest.approx(exact_two_sided_k(5, 0.90, 0.95), rel=1e-6)  # exact by default
    howe = datasheet(runs, coverage=0.90, confidence=0.95, factor="howe")
    k_howe = next(r.k for r in howe.groups[0].rows if r.parameter == "dropout_v")
    assert k_howe == pytest.approx(drop.k, rel=0.01) and k_howe != drop.k
    assert drop.guard_low == pytest.approx(np.mean(dropout_b) - drop.k * np.std(dropout_b, ddof=1), rel=1e-12)
    assert drop.guard_high == pytest.approx(np.mean(dropout_b) + drop.k * np.std(dropout_b, ddof=1), rel=1e-12)
    s_row = rows_b["sensitivity_vpp_per_v"]
    kept = np.delete(sens, 2)
    assert s_row.n_units == 4 and s_row.typical == float(np.median(kept)) and "1 unit without" in s_row.note
    c_drop = next(r for r in groups["beacon", "C"].rows if r.parameter == "dropout_v")
    assert c_drop.typical == float(np.median(dropout_c))  # even count: mean of the middle two


def test_one_run_per_unit_and_incomplete_runs(tmp_path):
    p = lambda v: {"x": {"value": v, "unit": "V"}}  # noqa: E731
    old = make_unit(tmp_path / "old", "B", "B0001", p(1.0), started="2026-01-01T00:00:00Z")
    new = make_unit(tmp_path / "new", "B", "B0001", p(2.0), started="2026-02-01T00:00:00Z")
    other = make_unit(tmp_path / "other", "B", "B0002", p(4.0), started="2026-01-15T00:00:00Z")
    aborted = make_unit(tmp_path / "ab", "B", "B0003", p(9.0), status="aborted")
    sheet = datasheet([new, old, other, aborted])
    [group] = sheet.groups
    [row] = group.rows
    assert group.units == ("B0001", "B0002") and row.typical == 3.0 and row.k is None
    assert any("older run" in s and "old" in s for s in sheet.skipped)
    assert any("aborted" in s for s in sheet.skipped)
    with_aborted = datasheet([new, other, aborted], include_incomplete=True)
    assert with_aborted.groups[0].rows[0].n_units == 3
    with pytest.raises(ConfigError, match="no complete run"):
        datasheet([aborted])


def test_outputs_csv_markdown_json(tmp_path):
    values = [2.5, 2.6, 2.75]
    runs = [make_unit(tmp_path / f"u{i}", "B", f"B{i}", {"dropout_v": {"value": v, "unit": "V"}})
            for i, v in enumerate(values)]
    sheet = datasheet(runs, coverage=0.99)
    md_path, csv_path = sheet.write(tmp_path / "out")
    rows = list(csv.DictReader(io.StringIO(csv_path.read_text(encoding="utf-8"))))
    assert len(rows) == 1
    assert float(rows[0]["typ"]) == float(np.median(values)) and float(rows[0]["min"]) == 2.5
    assert float(rows[0]["std"]) == float(np.std(values, ddof=1))  # repr(): exact round trip
    md = md_path.read_text(encoding="utf-8")
    assert "median" in md and "| dropout_v | V | 2.5 | 2.6 | 2.75 | 3 |" in md
    data = json.loads(json.dumps(sheet.to_dict(), allow_nan=False))
    assert data["groups"][0]["rows"][0]["typical"] == 2.6 and data["coverage"] == 0.99


def test_bad_arguments(tmp_path):
    with pytest.raises(ValueError, match="coverage"):
        datasheet([], coverage=1.5)
    with pytest.raises(ConfigError, match="not a run folder"):
        datasheet([tmp_path])
