"""pipeline.measure: closed loop through rendered frames, coverage, errors; `polecast measure`."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from pipeline.config import MeasureSettings
from pipeline.measure import JSON_KEYS, cap_statistics, measure_file, profile_edges_deg
from tests._frames import AU_M, RSUN_M, make_observer, uniform_caps, write_frame


@pytest.mark.parametrize("b0_deg", [-7.25, -3.1, 0.0, 4.4, 7.25])
@pytest.mark.parametrize("rotation_deg, compression", [(0.0, None), (180.0, "RICE_1"), (-64.0, "GZIP_2"),
                                                       (211.0, "HCOMPRESS_1")])
def test_closed_loop_recovers_radial_cap_field(tmp_path, b0_deg, rotation_deg, compression):
    """Closed loop: Blos = Br mu rendered with exact geometry, read back, Br = Blos / mu recovered
    to 0.1 % (the issue's tolerance) for any B0 in [-7.25, 7.25] deg and any rotation."""
    obs = make_observer(b0_deg=b0_deg, crln_deg=77.0)
    path = write_frame(tmp_path / "f.fits", uniform_caps(12.5, -8.0), observer=obs, size=256,
                       rotation_deg=rotation_deg, compression=compression, offset=(2.5, -1.5))
    rec = measure_file(path)
    assert rec.status == "ok", rec.reason
    assert rec.north_br_gauss == pytest.approx(12.5, rel=1e-3)
    assert rec.south_br_gauss == pytest.approx(-8.0, rel=1e-3)
    assert rec.b0_deg == pytest.approx(b0_deg, abs=1e-9)
    # flux is the mean times the measured area: Br [G] x area [cm^2] = Mx
    area_n_m2 = rec.north_coverage * 2 * np.pi * RSUN_M ** 2 * (1 - np.sin(np.deg2rad(60.0)))
    assert rec.north_flux_mx == pytest.approx(rec.north_br_gauss * area_n_m2 * 1e4, rel=1e-9)


def _coverage_by_quadrature(b0_deg, cap_deg, mu_min, distance_m=AU_M, r=RSUN_M):
    """Independent check: visible fraction of the north cap with mu >= mu_min, integrated on a
    latitude-longitude grid with mu = (D cos psi - R) / sqrt(D^2 + R^2 - 2 D R cos psi),
    cos psi = sin B0 sin lat + cos B0 cos lat cos lon (spherical trigonometry, handbook)."""
    lat = np.deg2rad(np.arange(cap_deg + 0.01, 90.0, 0.02))[:, None]
    lon = np.deg2rad(np.arange(-180.0 + 0.05, 180.0, 0.1))[None, :]
    b0 = np.deg2rad(b0_deg)
    cos_psi = np.sin(b0) * np.sin(lat) + np.cos(b0) * np.cos(lat) * np.cos(lon)
    mu = (distance_m * cos_psi - r) / np.sqrt(distance_m ** 2 + r ** 2 - 2 * distance_m * r * cos_psi)
    weight = np.cos(lat) * np.ones_like(lon)
    return float((weight * (mu >= mu_min)).sum() / weight.sum())


@pytest.mark.parametrize("b0_deg", [-7.0, 0.0, 6.0])
def test_coverage_matches_spherical_quadrature(tmp_path, b0_deg):
    obs = make_observer(b0_deg=b0_deg)
    rec = measure_file(write_frame(tmp_path / "f.fits", observer=obs, size=512))
    expected = _coverage_by_quadrature(b0_deg, 60.0, 0.1)
    # 2 %: pixels are in or out by their centre's mu, and near mu = 0.1 one pixel covers ten times
    # its projected area, so the cut's discretisation dominates at this 512^2 size
    assert rec.north_coverage == pytest.approx(expected, rel=2e-2)


def test_standard_error_matches_noise(tmp_path):
    """Claim: with Gaussian noise of known sigma on Blos, the reported error is within 20 % of the
    Monte Carlo scatter of the cap mean over seeds (sampling statistics, no outside source)."""
    obs = make_observer(b0_deg=6.0)
    means, errors = [], []
    for seed in range(12):
        rec = measure_file(write_frame(tmp_path / f"f{seed}.fits", observer=obs, size=160, noise_gauss=4.0,
                                       seed=seed, compression=None))
        means.append(rec.north_br_gauss)
        errors.append(rec.north_br_error_gauss)
    assert np.mean(errors) == pytest.approx(np.std(means, ddof=1), rel=0.45)
    assert np.mean(means) == pytest.approx(10.0, abs=3 * np.mean(errors))


def test_cap_statistics_weighted_mean_and_error():
    """Weighted mean and the linearised standard error (Gatz & Smith 1995, eq. 2) by hand."""
    x = np.array([1.0, 2.0, 4.0])
    w = np.array([1.0, 1.0, 2.0])
    s = cap_statistics(x, w, whole_cap_area_m2=8.0)
    mean = (1 + 2 + 8) / 4.0
    se = np.sqrt(3 / 2 * ((1 - mean) ** 2 + (2 - mean) ** 2 + 4 * (4 - mean) ** 2) / 16.0)
    assert s.br_gauss == pytest.approx(mean, rel=1e-15)
    assert s.br_error_gauss == pytest.approx(se, rel=1e-15)
    assert s.coverage == pytest.approx(0.5)
    assert s.flux_mx == pytest.approx(11.0 * 1e4)
    empty = cap_statistics(np.array([]), np.array([]), 1.0)
    assert empty.br_gauss is None and empty.coverage == 0.0 and empty.pixels == 0


def test_hidden_cap_has_null_values(tmp_path):
    """A cap with no measured pixel has null values and coverage 0 (issue contract): with
    cap latitude 89.5 deg and B0 = +7 the south cap is behind the limb."""
    obs = make_observer(b0_deg=7.0)
    rec = measure_file(write_frame(tmp_path / "f.fits", observer=obs, size=128),
                       MeasureSettings(cap_latitude_deg=89.5))
    assert rec.status == "ok"
    assert rec.south_pixels == 0 and rec.south_coverage == 0.0
    assert rec.south_br_gauss is None and rec.south_flux_mx is None and rec.south_br_error_gauss is None


def test_profile_holds_the_cap_field(tmp_path):
    rec = measure_file(write_frame(tmp_path / "f.fits", uniform_caps(9.0, -4.0), size=256))
    edges = np.array(rec.profile_edges_deg)
    assert np.array_equal(edges, profile_edges_deg(MeasureSettings()))
    br = np.array([np.nan if v is None else v for v in rec.profile_br_gauss])
    centres = 0.5 * (edges[1:] + edges[:-1])
    north = (centres > 61) & np.isfinite(br)
    assert north.sum() > 10
    assert np.allclose(br[north], 9.0, rtol=1e-3)
    assert np.nansum(np.array(rec.profile_area_m2)[centres > 60]) == pytest.approx(
        rec.north_coverage * 2 * np.pi * RSUN_M ** 2 * (1 - np.sin(np.deg2rad(60))), rel=1e-9)


# --- the command ------------------------------------------------------------------------------

def _run(*args):
    return subprocess.run([sys.executable, "-m", "pipeline", "measure", *map(str, args)],
                          capture_output=True, text=True)


def test_cli_json_contract_and_exit_codes(tmp_path):
    good = write_frame(tmp_path / "good.fits", size=96)
    bad = tmp_path / "bad.fits"
    bad.write_bytes(b"")
    ok = _run(good, "--format", "json")
    assert ok.returncode == 0, ok.stderr
    rows = json.loads(ok.stdout)
    assert isinstance(rows, list) and len(rows) == 1
    assert list(rows[0]) == list(JSON_KEYS)
    assert rows[0]["status"] == "ok" and rows[0]["reason"] is None
    assert rows[0]["time"] == "2031-03-04T05:06:07.000Z"
    mixed = _run(bad, good, "--format", "json", "--cap-latitude", "65", "--mu-min", "0.2")
    assert mixed.returncode == 1
    rows = json.loads(mixed.stdout)
    assert [r["file"] for r in rows] == [str(bad), str(good)]
    assert rows[0]["status"] == "skipped" and rows[0]["reason"] == "empty file"
    assert "Traceback" not in mixed.stderr


def test_cli_csv_and_usage_errors(tmp_path):
    good = write_frame(tmp_path / "good.fits", size=96)
    out = _run(good, "--format", "csv")
    assert out.returncode == 0
    lines = out.stdout.strip().splitlines()
    assert lines[0].split(",") == list(JSON_KEYS) and len(lines) == 2
    assert _run().returncode == 2
    assert _run(good, "--format", "xml").returncode == 2
    bad_cfg = _run(good, "--mu-min", "1.5")
    assert bad_cfg.returncode == 2 and "measure.mu_min" in bad_cfg.stderr
    conf = tmp_path / "c.toml"
    conf.write_text("[measure]\ncap_latitude = 60\n")
    res = _run(good, "--config", conf)
    assert res.returncode == 2 and "unknown key" in res.stderr and "Traceback" not in res.stderr
