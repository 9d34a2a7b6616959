"""pipeline.measure against frames rendered by sunpy's frames, analytic integrals and Monte Carlo; `polecast measure`."""

from __future__ import annotations

import json

import numpy as np
import pytest

from pipeline.config import MeasureSettings
from pipeline.measure import JSON_KEYS, cap_statistics, measure_file, profile_edges_deg
from pipeline.synth.instrument import ObservingSetup, frame_header, geometry_for, write_magnetogram
from tests._frames import AU_M, RSUN_M, make_observer, write_frame, write_sunpy_frame


# --- frames rendered by sunpy's frames (tests/_frames.sunpy_surface), not by pipeline.projection ----------
# A wrong mu, latitude or area in pipeline.projection no longer cancels between rendering and measuring.

def _uniform(north, south, cap_deg=60.0, elsewhere=0.5):
    def br(lat):
        return np.where(lat >= cap_deg, north, np.where(lat <= -cap_deg, south, elsewhere))
    return br


@pytest.mark.parametrize("b0_deg", [-7.25, 0.0, 4.4, 7.25])
@pytest.mark.parametrize("rotation_deg, compression", [(0.0, None), (180.0, "RICE_1"), (-64.0, "GZIP_2"),
                                                       (211.0, "HCOMPRESS_1")])
def test_uniform_cap_field_recovered_from_sunpy_rendered_frames(tmp_path, b0_deg, rotation_deg, compression):
    """Reference library: Blos = Br mu with mu from sunpy's frames (3-D vectors, finite distance).
    Br = Blos / mu with polecast's mu gives back the uniform cap field on every pixel, so the cap means
    agree to 1e-4 (quantisation bscale 1e-4 G over mu >= 0.1 is at most 5e-4 G a pixel; measured 3e-6)
    for any B0 in [-7.25, 7.25] deg and any rotation.  An orthographic mu misses by 1-2.5 %."""
    obs = make_observer(b0_deg=b0_deg, crln_deg=77.0)
    path, _ = write_sunpy_frame(tmp_path / "f.fits", _uniform(12.5, -8.0), observer=obs, size=128,
                                rotation_deg=rotation_deg, compression=compression)
    rec = measure_file(path)
    assert rec.status == "ok", rec.reason
    assert rec.north_br_gauss == pytest.approx(12.5, rel=1e-4)
    assert rec.south_br_gauss == pytest.approx(-8.0, rel=1e-4)
    assert rec.b0_deg == pytest.approx(b0_deg, abs=1e-9)  # HGLT_OBS as written (regression only)


@pytest.mark.parametrize("b0_deg", [-7.25, 0.0, 7.25])
def test_flux_coverage_and_mean_equal_sunpy_pixel_sums(tmp_path, b0_deg):
    """Reference library: with sunpy's latitude, mu and area of every pixel (tests/_frames.sunpy_surface:
    corner solid angles, Van Oosterom & Strackee 1983, times |O - P|^2 / mu) the cap is the pixels with
    mu >= mu_min and latitude >= 60; its flux sum(Br area) (1 G = 1 Mx cm^-2), coverage
    sum(area) / 2 pi R^2 (1 - sin 60) and area-weighted mean of Br = 10 sin(lat) G must equal polecast's.
    mu_min = 0.3 keeps every cap pixel more than a pixel inside the limb, where polecast's area is the
    midpoint area (its exact limb footprints are checked against the spherical cap in test_projection).
    Tolerances: 1e-5 for flux and mean (quantisation, measured 2e-6), 1e-7 for coverage (centre
    solid angle vs the exact quadrilateral: second order in the pixel size, measured 1.6e-9)."""
    obs = make_observer(b0_deg=b0_deg, crln_deg=77.0)
    settings = MeasureSettings(mu_min=0.3)
    br = lambda lat: 10.0 * np.sin(np.deg2rad(lat))  # noqa: E731
    path, surf = write_sunpy_frame(tmp_path / "f.fits", br, observer=obs, size=128, rotation_deg=23.0)
    rec = measure_file(path, settings)
    lat, mu, area = surf["latitude_deg"], surf["mu"], surf["area_m2"]
    whole = 2 * np.pi * RSUN_M ** 2 * (1 - np.sin(np.deg2rad(60.0)))
    for pole, sign in (("north", 1.0), ("south", -1.0)):
        with np.errstate(invalid="ignore"):
            sel = (mu >= 0.3) & (sign * lat >= 60.0)
        assert getattr(rec, f"{pole}_pixels") == int(sel.sum()) > 20
        flux = float((br(lat[sel]) * area[sel]).sum()) * 1e4
        assert getattr(rec, f"{pole}_flux_mx") == pytest.approx(flux, rel=1e-5)
        # the cap mean (measurement version 2): inverse-noise weights area * mu^2 within 1-deg latitude bins,
        # the bins combined by their areas (pipeline.measure.stratified_cap_statistics), from sunpy's pixels
        x, a, m = br(lat[sel]), area[sel], mu[sel]
        b = np.floor((lat[sel] + 90.0) / 1.0).astype(int)
        w = a * m * m
        bins = np.unique(b)
        m_b = np.array([(w[b == k] * x[b == k]).sum() / w[b == k].sum() for k in bins])
        a_b = np.array([a[b == k].sum() for k in bins])
        assert getattr(rec, f"{pole}_br_gauss") == pytest.approx((a_b * m_b).sum() / a_b.sum(), rel=1e-5)
        # ... and it stays close to the plain area-weighted mean of the pixels (the same estimand): 0.1 %
        assert getattr(rec, f"{pole}_br_gauss") == pytest.approx(flux / 1e4 / area[sel].sum(), rel=1e-3)
        assert getattr(rec, f"{pole}_coverage") == pytest.approx(area[sel].sum() / whole, rel=1e-7)


def _cap_quadrature(b0_deg, cap_deg, mu_min, br=None, distance_m=AU_M, r=RSUN_M):
    """Analytic visible-part integral on a latitude-longitude grid (0.02 x 0.1 deg midpoints):
    the visible fraction of the north cap with mu >= mu_min and the area-weighted mean of br(lat) there,
    with mu = (D cos psi - R) / sqrt(D^2 + R^2 - 2 D R cos psi) (finite distance; law of cosines) and
    cos psi = sin B0 sin lat + cos B0 cos lat cos lon (spherical trigonometry, handbook)."""
    lat = np.deg2rad(np.arange(cap_deg + 0.01, 90.0, 0.02))[:, None]
    lon = np.deg2rad(np.arange(-180.0 + 0.05, 180.0, 0.1))[None, :]
    b0 = np.deg2rad(b0_deg)
    cos_psi = np.sin(b0) * np.sin(lat) + np.cos(b0) * np.cos(lat) * np.cos(lon)
    mu = (distance_m * cos_psi - r) / np.sqrt(distance_m ** 2 + r ** 2 - 2 * distance_m * r * cos_psi)
    weight = np.cos(lat) * np.ones_like(lon)
    seen = weight * (mu >= mu_min)
    mean = None if br is None else float((seen * br(np.rad2deg(lat))).sum() / seen.sum())
    return float(seen.sum() / weight.sum()), mean


@pytest.mark.parametrize("b0_deg", [-7.25, 0.0, 7.25])
def test_latitude_dependent_cap_mean_matches_visible_integral(tmp_path, b0_deg):
    """Analytic: Br = 10 sin(lat) G; the mean over the visible part of each cap with mu >= 0.1 is the
    quadrature of _cap_quadrature (the south cap by symmetry: B0 -> -B0, Br -> -Br).  1 %: pixels are in
    or out by their centre's latitude and mu, which at 128 px moves the mean by up to 0.4 % (measured;
    DEVELOPERS.md, known rough edges); an orthographic mu moves it by 1.6-2.2 %."""
    br = lambda lat: 10.0 * np.sin(np.deg2rad(lat))  # noqa: E731
    path, _ = write_sunpy_frame(tmp_path / "f.fits", br, observer=make_observer(b0_deg=b0_deg), size=128)
    rec = measure_file(path)
    _, north = _cap_quadrature(b0_deg, 60.0, 0.1, br)
    _, south = _cap_quadrature(-b0_deg, 60.0, 0.1, br)
    assert rec.north_br_gauss == pytest.approx(north, rel=1e-2)
    assert rec.south_br_gauss == pytest.approx(-south, rel=1e-2)


def _ones_frame(path, observer, size):
    """A frame whose every pixel holds 1 G: coverage depends on the geometry alone, not on the field."""
    geom = geometry_for(ObservingSetup(size=size), observer)
    write_magnetogram(path, np.ones((size, size)), frame_header(geom, observer, "2031-03-04T05:06:07"),
                      compression=None, bscale=1e-3)
    return path


@pytest.mark.parametrize("b0_deg", [-7.0, 0.0, 6.0])
def test_coverage_matches_spherical_quadrature(tmp_path, b0_deg):
    """Analytic: coverage = visible fraction of the cap with mu >= 0.1 (_cap_quadrature).  2 %: pixels
    are in or out by their centre's mu, and near mu = 0.1 one pixel covers ten times its projected area,
    so the cut's discretisation dominates; at 128 px it reaches 16 %, hence 512 px here (measured)."""
    obs = make_observer(b0_deg=b0_deg)
    rec = measure_file(_ones_frame(tmp_path / "f.fits", obs, 512))
    expected, _ = _cap_quadrature(b0_deg, 60.0, 0.1)
    assert rec.north_coverage == pytest.approx(expected, rel=2e-2)


def test_standard_error_matches_monte_carlo_scatter():
    """Claim (Gatz & Smith 1995, Atmos. Environ. 29, 1185, eq. 2): for pixel values with independent
    noise and unequal area weights, the reported standard error is the scatter of the weighted mean.
    4000 seeded draws of 200 pixels (weights 1..10, like foreshortened limb pixels; sigma 4 G): the
    standard deviation of the 4000 means has a relative standard error 1 / sqrt(2 (N - 1)) = 1.1 %
    (normal sampling theory), so the mean reported SE must agree within 3 of those (3.4 %), two-sided.
    The formula's own bias for these weights is -0.15 % in SE (exact expectation for fixed weights).
    An unweighted SE (s / sqrt(n)) would be 10 % low."""
    rng = np.random.default_rng(17)
    n_draws, n_pix = 4000, 200
    weights = np.linspace(1.0, 10.0, n_pix)
    means, errors = np.empty(n_draws), np.empty(n_draws)
    for k in range(n_draws):
        s = cap_statistics(10.0 + rng.normal(0.0, 4.0, n_pix), weights, whole_cap_area_m2=1.0)
        means[k], errors[k] = s.br_gauss, s.br_error_gauss
    window = 3.0 / np.sqrt(2.0 * (n_draws - 1))
    assert np.mean(errors) == pytest.approx(np.std(means, ddof=1), rel=window)
    # and the weighted mean is unbiased: within 4 standard errors of the mean of 4000 draws
    assert np.mean(means) == pytest.approx(10.0, abs=4.0 * np.std(means, ddof=1) / np.sqrt(n_draws))


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
    assert s.pixels == 3 and s.area_m2 == pytest.approx(4.0)
    empty = cap_statistics(np.array([]), np.array([]), 1.0)
    assert (empty.br_gauss, empty.flux_mx, empty.br_error_gauss, empty.coverage, empty.pixels) == \
        (None, None, None, 0.0, 0)
    single = cap_statistics(np.array([3.0]), np.array([2.0]), 4.0)
    assert (single.br_gauss, single.br_error_gauss, single.coverage) == (3.0, None, 0.5)


def test_hidden_cap_has_null_values(tmp_path):
    """A cap with no measured pixel has null values and coverage 0 (issue contract): with
    cap latitude 84 deg and B0 = +7 the whole south cap lies at least 91 deg from disk centre, behind the
    limb (spherical geometry: its nearest point is 90 + 7 - 6 deg away), while the north cap is seen."""
    obs = make_observer(b0_deg=7.0)
    path, _ = write_sunpy_frame(tmp_path / "f.fits", _uniform(10.0, -7.0), observer=obs, size=128)
    rec = measure_file(path, MeasureSettings(cap_latitude_deg=84.0))
    assert rec.status == "ok"
    assert rec.north_pixels > 0 and rec.north_br_gauss == pytest.approx(10.0, rel=1e-4)
    assert rec.south_pixels == 0 and rec.south_coverage == 0.0
    assert rec.south_br_gauss is None and rec.south_flux_mx is None and rec.south_br_error_gauss is None


def test_profile_holds_the_cap_field(tmp_path):
    """Reference library: frames rendered by sunpy's frames; every profile bin inside a uniform cap
    holds the cap's field (to 1e-4, quantisation), the band 55-60 deg holds the 0.5 G written there, and
    the profile's area above 60 deg is the cap's measured area (identity, to rounding)."""
    path, _ = write_sunpy_frame(tmp_path / "f.fits", _uniform(9.0, -4.0), size=128)
    rec = measure_file(path)
    edges = np.array(rec.profile_edges_deg)
    assert np.array_equal(edges, profile_edges_deg(MeasureSettings()))
    br = np.array([np.nan if v is None else v for v in rec.profile_br_gauss])
    centres = 0.5 * (edges[1:] + edges[:-1])
    north = (centres > 60) & np.isfinite(br)
    south = (centres < -60) & np.isfinite(br)
    band = (np.abs(centres) > 55) & (np.abs(centres) < 60) & np.isfinite(br)
    assert north.sum() >= 10 and south.sum() >= 10 and band.sum() >= 6
    assert np.allclose(br[north], 9.0, rtol=1e-4)
    assert np.allclose(br[south], -4.0, rtol=1e-4)
    assert np.allclose(br[band], 0.5, rtol=1e-3)
    assert np.nansum(np.array(rec.profile_area_m2)[centres > 60]) == pytest.approx(
        rec.north_coverage * 2 * np.pi * RSUN_M ** 2 * (1 - np.sin(np.deg2rad(60))), rel=1e-9)


# --- the command (in process: pipeline.cli.main) ------------------------------------------------------------

def _run(capsys, *args):
    from pipeline.cli import main

    code = main(["measure", *map(str, args)])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_cli_json_contract_and_exit_codes(tmp_path, capsys):
    """The JSON contract (issue): one object per file with exactly JSON_KEYS, in input order, the values
    of measure_file; exit 0 when all were measured, 1 when any was skipped (CLI exit codes, DEVELOPERS.md)."""
    good = write_frame(tmp_path / "good.fits", size=96)
    bad = tmp_path / "bad.fits"
    bad.write_bytes(b"")
    code, out, err = _run(capsys, good, "--format", "json")
    assert code == 0, err
    rows = json.loads(out)
    assert [list(r) for r in rows] == [list(JSON_KEYS)]
    expected = measure_file(good).to_json()
    assert rows[0] == pytest.approx(expected)
    assert rows[0]["status"] == "ok" and rows[0]["reason"] is None
    assert rows[0]["time"] == "2031-03-04T05:06:07.000Z"  # DATE-OBS written by tests/_frames
    code, out, err = _run(capsys, bad, good, "--format", "json", "--cap-latitude", "65", "--mu-min", "0.2")
    assert code == 1
    rows = json.loads(out)
    assert [r["file"] for r in rows] == [str(bad), str(good)]
    assert (rows[0]["status"], rows[0]["reason"]) == ("skipped", "empty file")
    assert rows[1] == pytest.approx(measure_file(good, MeasureSettings(cap_latitude_deg=65.0, mu_min=0.2)).to_json())
    assert f"skipped {bad}: empty file" in err


def test_cli_csv_and_usage_errors(tmp_path, capsys):
    good = write_frame(tmp_path / "good.fits", size=96)
    code, out, _ = _run(capsys, good, "--format", "csv")
    assert code == 0
    lines = out.strip().splitlines()
    assert lines[0].split(",") == list(JSON_KEYS) and len(lines) == 2
    assert lines[1].split(",")[JSON_KEYS.index("north_pixels")] == str(measure_file(good).north_pixels)
    for argv in ([], [good, "--format", "xml"]):  # argparse usage errors exit 2 (argparse's convention)
        with pytest.raises(SystemExit) as info:
            _run(capsys, *argv)
        assert info.value.code == 2
    code, _, err = _run(capsys, good, "--mu-min", "1.5")
    assert code == 2 and "measure.mu_min" in err
    conf = tmp_path / "c.toml"
    conf.write_text("[measure]\ncap_latitude = 60\n")
    code, _, err = _run(capsys, good, "--config", conf)
    assert code == 2 and "unknown key" in err


# --- noise-weighted cap means (measurement version 2, issue 11) ----------------------------------------------

def _band_mean_sin8(l1_deg, l2_deg, b_gauss):
    """Exact area mean of b sin^8(lat) over the band l1..l2 (0 <= l1 < l2 <= 90) of a sphere:
    int sin^8 cos dl / int cos dl = (sin^9 l2 - sin^9 l1) / (9 (sin l2 - sin l1)) (elementary integral)."""
    s1, s2 = np.sin(np.deg2rad(l1_deg)), np.sin(np.deg2rad(l2_deg))
    return b_gauss * (s2 ** 9 - s1 ** 9) / (9.0 * (s2 - s1))


@pytest.mark.parametrize("b0_deg", [-7.25, 0.0, 7.25])
def test_sin8_cap_mean_is_the_sphere_area_mean_over_the_measured_bins(tmp_path, b0_deg):
    """Analytic, on a frame rendered by sunpy's frames without noise: Br = 10 sin^8(lat) G (the shape of
    Svalgaard, Duvall & Scherrer 1978).  The noise weights only act within a 1-deg bin, so the cap mean must be
    the sphere-area mean of the field over each measured bin (exact band integral, _band_mean_sin8) combined
    with the bins' measured areas (profile_area_m2).  1 %: pixel centres sample a bin unevenly at 128 px
    (measured at most 0.74 %); weighting by mu^2 across latitudes instead would tilt it toward the low
    latitudes by several per cent."""
    br = lambda lat: 10.0 * np.sin(np.deg2rad(lat)) ** 8  # noqa: E731
    path, _ = write_sunpy_frame(tmp_path / "f.fits", br, observer=make_observer(b0_deg=b0_deg), size=128)
    rec = measure_file(path)
    edges, area = np.array(rec.profile_edges_deg), np.array(rec.profile_area_m2)
    lo, hi = np.minimum(np.abs(edges[:-1]), np.abs(edges[1:])), np.maximum(np.abs(edges[:-1]), np.abs(edges[1:]))
    centres = 0.5 * (edges[:-1] + edges[1:])
    for pole, sign in (("north", 1.0), ("south", -1.0)):
        sel = (sign * centres > 60.0) & (area > 0)
        assert sel.sum() >= 5  # occupied 1-deg bins (at 128 px some near the pole hold no pixel centre)
        expected = float((area[sel] * _band_mean_sin8(lo[sel], hi[sel], 10.0)).sum() / area[sel].sum())
        assert getattr(rec, f"{pole}_br_gauss") == pytest.approx(expected, rel=1e-2)


def test_cap_boundary_inside_a_bin_keeps_only_the_cap_part(tmp_path):
    """A cap boundary at 62.5 deg falls inside the 62-63 deg bin: the cap mean must use only pixels with
    |lat| >= 62.5.  With 12 / -6 G at and above 62.5 deg and 0.5 G below, the means are the cap values to 1e-4
    (quantisation); one pixel of the band below would move them by about 0.1 G.  And a latitude-dependent
    field matches the visible-cap quadrature (_cap_quadrature, 1 % as above)."""
    path, _ = write_sunpy_frame(tmp_path / "f.fits", _uniform(12.0, -6.0, cap_deg=62.5), size=128)
    rec = measure_file(path, MeasureSettings(cap_latitude_deg=62.5))
    assert rec.north_br_gauss == pytest.approx(12.0, rel=1e-4)
    assert rec.south_br_gauss == pytest.approx(-6.0, rel=1e-4)
    br = lambda lat: 10.0 * np.sin(np.deg2rad(lat))  # noqa: E731
    path, _ = write_sunpy_frame(tmp_path / "g.fits", br, observer=make_observer(b0_deg=4.0), size=128)
    rec = measure_file(path, MeasureSettings(cap_latitude_deg=62.5))
    assert rec.north_br_gauss == pytest.approx(_cap_quadrature(4.0, 62.5, 0.1, br)[1], rel=1e-2)
    assert rec.south_br_gauss == pytest.approx(-_cap_quadrature(-4.0, 62.5, 0.1, br)[1], rel=1e-2)
